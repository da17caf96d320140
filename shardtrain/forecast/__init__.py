"""Stage 4, forecast: this machine's calibration and the epoch-time projection onto
described hardware.
"""

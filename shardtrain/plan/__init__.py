"""Stage 2, plan: partitioners, shards and their halos, the exchange schedule, the
survey's predictions.
"""

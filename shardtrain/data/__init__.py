"""Stage 1, data: the graph value, input readers, the demo network, split masks,
memory estimates.
"""

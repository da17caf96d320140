"""Stage 3, train: the model, the single-process reference, the worker, the coordinator
and MPI driver, checkpoints, run accounting.
"""

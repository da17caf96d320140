"""Stage 3, train: the library API (`api.RunConfig`, `api.run`) and what it runs: the model,
the single-process reference, the worker (halo kernels, codec, training loop, process entry
point), the pipes coordinator and the MPI driver, the run session (checkpoints, signals,
temporary shards) and the run accounting.
"""

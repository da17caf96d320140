"""`shardtrain train SHARD_DIR --transport mpi`, run on every rank by mpiexec.

Rank 0 checks the options exactly as the pipes run does, trains its own shard, prints the
progress and the per-worker table and writes the outputs; the other ranks only train.
Errors: one line from rank 0 when its checks fail (every rank then exits with status 2);
once training has started, the failing rank prints its error (naming itself) and ends the
whole MPI job, so that no rank is left waiting.
"""
from __future__ import annotations

import sys
import traceback

from shardtrain.errors import (
    EXIT_BAD_INPUT,
    EXIT_INTERRUPTED,
    EXIT_RUN_FAILED,
    InputError,
    RunError,
)

STOP_TIMEOUT_S = 60.0
UNSUPPORTED = ("checkpoint", "resume", "slow_worker", "emulate_link")


def _prepare(args):
    """Rank 0's checks: (settings, shard facts, init weights); InputError otherwise."""
    from shardtrain.cli import train
    from shardtrain.train.coordinator import model_dims_of, shard_dir_facts

    if not train._is_shard_dir(args.graph):
        raise InputError(f"--transport mpi: {args.graph} is not a shard directory (write one "
                         f"with `shardtrain split`; every rank must see it at this path)")
    settings, _ = train._check_options(args)
    for name in UNSUPPORTED:                 # options of the pipes run only (if present)
        if getattr(args, name, None):
            raise InputError(f"--{name.replace('_', '-')}: not supported with --transport mpi")
    facts = shard_dir_facts(args.graph)
    if args.workers is not None and args.workers != facts.workers:
        raise InputError(f"--workers {args.workers}: {args.graph} holds {facts.workers} shards")
    train.check_model_fits(model_dims_of(facts, settings), settings)
    init = (train.load_init_weights(args.init_weights, model_dims_of(facts, settings), settings)
            if args.init_weights else None)
    return settings, facts, init


def _finish(args, settings, facts, result) -> None:
    """The outputs and the closing lines of `shardtrain train`, written by rank 0."""
    from shardtrain.cli import train
    from shardtrain.train import rundoc

    doc = rundoc.run_document(settings, rundoc.graph_of_shards(args.graph, facts), result,
                              mode="partitioned", transport="mpi")
    train.write_outputs(args, result, result.labels, doc)
    if not args.quiet:
        last = result.epochs[-1]
        print(f"final: loss {last['loss']:.6f}  train {train._acc(last['train_acc'])}  "
              f"val {train._acc(last['val_acc'])}  test {train._acc(last['test_acc'])}")
        train._say_early_stop(result.early_stop, args.quiet)
        print(train._worker_table(result.workers))
        for line in train._traffic_lines(result.traffic):
            print(line)


def run_mpi(args) -> int:
    from shardtrain.cli import train
    from shardtrain.train import mpi_driver as mpirun

    comm = mpirun.world()
    rank = comm.Get_rank()
    progress = None
    try:
        settings = facts = init = None
        max_frame = getattr(args, "max_frame_bytes", None)     # the same on every rank
        if rank == mpirun.ROOT:
            try:
                settings, facts, init = _prepare(args)
            except InputError as exc:
                mpirun.stop_job(comm, EXIT_BAD_INPUT, STOP_TIMEOUT_S)
                raise mpirun.JobStopped(str(exc), EXIT_BAD_INPUT, report=True) from None
            if not args.quiet:
                print(train._shard_dir_line(args.graph, facts), flush=True)
            progress = train._Progress(settings.epochs, args.quiet)
        result = mpirun.train_mpi(args.graph, settings, comm=comm, timeout_s=args.timeout,
                                  init_params=init, on_epoch=progress,
                                  max_frame_bytes=max_frame)
        if progress is not None:
            progress.close()
            progress = None
        if result is not None:
            _finish(args, settings, facts, result)
        return 0
    except mpirun.JobStopped as exc:
        if exc.report:
            print(f"shardtrain: error: {exc}", file=sys.stderr)
        return exc.code
    except BaseException as exc:  # noqa: BLE001 - one rank's failure must end every rank
        if progress is not None:
            progress.close()
        if isinstance(exc, InputError):
            code, what = EXIT_BAD_INPUT, "error"
        elif isinstance(exc, RunError):
            code, what = EXIT_RUN_FAILED, "run failed"
        elif isinstance(exc, KeyboardInterrupt):
            code, what = EXIT_INTERRUPTED, "interrupted"
        else:                              # a bug: show where, then end the job all the same
            traceback.print_exc()
            code, what = EXIT_RUN_FAILED, "internal error"
        print(f"shardtrain: {what}: rank {rank} of {comm.Get_size()}: {exc}", file=sys.stderr,
              flush=True)
        mpirun.abort_job(comm, code)
        return code

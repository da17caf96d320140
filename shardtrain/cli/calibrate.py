"""Time this machine's kernels once (JSON), and optionally write a worker spec of this machine.

`--json CAL.json` keeps the timing (the file `forecast --calibration` reads): when CAL.json
already holds a calibration of this version and dtype it is used as it is, otherwise the
kernels are timed (a few seconds, one thread; the roofs on 1 and 2 threads) and written there.
`--spec-out THIS.toml` writes a worker spec (the format `forecast --worker-spec` reads) of one
core of this machine: its measured stream bandwidth and GEMM flop rate as the roofs, its
calibrated kernel efficiencies, its memory, and the network given by --network-gbps and
--latency-us (not measured: a local machine has no network card of a cluster's).
"""
from __future__ import annotations

from pathlib import Path

from shardtrain import defaults
from shardtrain.errors import InputError


def add_arguments(parser) -> None:
    add = parser.add_argument
    add("--json", required=True, metavar="CAL.json",
        help="the calibration file: read when it holds a usable calibration, else written")
    add("--spec-out", default=None, metavar="THIS.toml",
        help="write a worker spec of this machine (cores = 1) to THIS.toml")
    add("--dtype", default=defaults.DTYPE, help=f"training dtype (default {defaults.DTYPE})")
    add("--network-gbps", type=float, default=defaults.SPEC_NETWORK_GBPS, metavar="G",
        help=f"network of the written spec, Gbit/s (default {defaults.SPEC_NETWORK_GBPS:g})")
    add("--latency-us", type=float, default=defaults.LATENCY_US, metavar="US",
        help=f"latency of the written spec, microseconds (default {defaults.LATENCY_US:g})")


def run(args) -> int:
    import math

    from shardtrain.files import check_paths, write_json_atomic, write_text_atomic
    from shardtrain.forecast.calibrate import calibrate, read_calibration
    from shardtrain.forecast.specs import spec_of_this_machine, specs_to_toml

    if args.dtype not in ("float32", "float64"):
        raise InputError(f"--dtype: must be float32 or float64, got {args.dtype!r}")
    for value, option, zero in ((args.network_gbps, "--network-gbps", False),
                                (args.latency_us, "--latency-us", True)):
        if not (math.isfinite(value) and (value >= 0 if zero else value > 0)):
            raise InputError(f"{option}: must be a {'non-negative' if zero else 'positive'} "
                             f"number, got {value}")
    cal_path = Path(args.json)
    exists = cal_path.exists() and not cal_path.is_dir()
    if args.spec_out is not None and Path(args.spec_out).suffix.lower() != ".toml":
        raise InputError(f"--spec-out: {args.spec_out}: give a .toml file name")
    check_paths(inputs={"--json": cal_path if exists else None},
                outputs={"--json": None if exists else cal_path, "--spec-out": args.spec_out})
    cal = read_calibration(cal_path, args.dtype, param="json") if exists else None
    if cal is None:
        if not cal_path.parent.is_dir():
            raise InputError(f"--json: folder {cal_path.parent} does not exist")
        print("timing this machine's kernels (one thread; the roofs on 1 and 2) ...")
        cal = calibrate(args.dtype)
        write_json_atomic(cal_path, cal)
        print(f"calibration: {cal_path} ({cal['calibration_s']:.1f} s)")
    else:
        print(f"calibration: {cal_path} (kept: version {cal['version']}, {cal['dtype']})")
    roof = cal["roofline"]
    print(f"this machine, one thread: stream {roof['stream_bytes_per_s'] / 1e9:.1f} GB/s, "
          f"GEMM {roof['flops_per_s'] / 1e9:.1f} GFLOP/s")
    if args.spec_out is not None:
        spec = spec_of_this_machine(cal, network_gbps=args.network_gbps,
                                    latency_us=args.latency_us)
        write_text_atomic(args.spec_out, specs_to_toml(
            [spec], "A worker spec of one core of the machine `shardtrain calibrate` ran on:\n"
                    "its measured stream bandwidth and GEMM flop rate, its calibrated kernel\n"
                    "efficiencies, its memory; the network is the one given, not measured."))
        print(f"worker spec: {args.spec_out} ({spec.name}: {spec.memory_bandwidth_gbs:g} GB/s, "
              f"{spec.peak_gflops:g} GFLOP/s, {spec.memory_gib:g} GiB)")
    return 0

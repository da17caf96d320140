"""Run the demo and the README's workflow and keep every JSON they write (issue 10's check).

    python scripts/outputs_snapshot.py OUT_DIR [--calibration CAL.json]

Runs ``python -m shardtrain`` (whatever ``shardtrain`` this interpreter imports: point
PYTHONPATH at another checkout to snapshot that one) in OUT_DIR. The forecast reads the
calibration file given (or times the machine once and keeps it in OUT_DIR), so two snapshots
that share one calibration forecast from the same figures. Compare two snapshots with
``scripts/outputs_diff.py``.
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
from pathlib import Path

# The README's workflow at a size that takes about a minute on 2 cores.
WORKFLOW = [
    ["synth", "depots.npz", "--vertices", "20000", "--avg-degree", "10", "--classes", "6",
     "--features", "32", "--seed", "0"],
    ["survey", "depots.npz", "--workers", "2,4,8", "--method",
     "metis,metis-volume,fennel,random,range", "--json", "survey.json"],
    ["split", "depots.npz", "--workers", "4", "--method", "metis", "--out", "shards"],
    ["train", "shards", "--epochs", "30", "--dtype", "float64", "--json", "run.json",
     "--weights", "w.npz", "--predictions", "pred.csv"],
    ["train", "depots.npz", "--reference", "--epochs", "30", "--dtype", "float64",
     "--json", "reference.json"],
    ["train", "depots.npz", "--workers", "2", "--method", "fennel", "--epochs", "20",
     "--early-stop", "3", "--json", "run_fennel.json"],
    ["forecast", "survey.json", "--link-gbps", "1,10,25,100", "--latency-us", "20",
     "--target-epoch-s", "0.5", "--calibration", "CAL", "--json", "forecast.json"],
    ["report", "survey.json", "run.json", "forecast.json", "--html", "report.html"],
    ["demo", "--quick", "--out", "demo"],
]


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("out", type=Path)
    parser.add_argument("--calibration", type=Path)
    args = parser.parse_args()
    args.out.mkdir(parents=True, exist_ok=False)
    cal = args.out / "calibration.json"
    if args.calibration is not None:
        shutil.copyfile(args.calibration, cal)
    env = dict(os.environ, PYTHONHASHSEED="0")
    for command in WORKFLOW:
        command = [str(cal) if part == "CAL" else part for part in command]
        print("shardtrain", " ".join(command), flush=True)
        done = subprocess.run([sys.executable, "-m", "shardtrain", *command], cwd=args.out,
                              env=env, stdout=subprocess.DEVNULL)
        if done.returncode != 0:
            print(f"exit {done.returncode}", file=sys.stderr)
            return 1
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

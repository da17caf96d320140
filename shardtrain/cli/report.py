"""Write one self-contained HTML page with the tables and pictures of survey, run and
forecast JSONs.

Give JSON files (from `survey --json`, `train --json`, `forecast --json`) and/or folders
holding them (e.g. survey.json, run.json, forecast.json); which kind each is, is read off its
keys. The page embeds its pictures and styling and links to nothing outside itself.
"""
from __future__ import annotations

from pathlib import Path

from shardtrain.errors import InputError


def add_arguments(parser) -> None:
    parser.add_argument("inputs", nargs="+", metavar="RUN_DIR_OR_JSON",
                        help="survey/run/forecast JSON files, or folders holding them")
    parser.add_argument("--html", required=True, metavar="OUT.html",
                        help="where to write the page")


def run(args) -> int:
    from shardtrain.report.html import write_report

    out = Path(args.html)
    if not out.parent.is_dir():
        raise InputError(f"--html: folder {out.parent} does not exist")
    if out.is_dir():
        raise InputError(f"--html: {out} is a folder")
    for p in args.inputs:
        if not Path(p).exists():
            raise InputError(f"{p}: no such file or folder")
    from shardtrain.files import check_paths
    read = [f for p in map(Path, args.inputs)
            for f in (sorted(p.glob("*.json")) if p.is_dir() else [p])]
    check_paths(inputs={"input": read}, outputs={"--html": out})
    included = write_report(args.inputs, out)
    kinds = ", ".join(f"{kind} ({name})" for name, kind in included)
    print(f"report: {out} ({kinds})")
    return 0

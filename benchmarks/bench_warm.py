"""A worker's first unit beside its warm-up: what the warm-up costs the units it runs beside.

A pool worker starts a thread that imports what the planned stages use
(:mod:`pipeline.runner._warm`) and takes its first unit at once.  In a fresh
interpreter per round and tree, this script does what such a worker does:
it imports the stage modules, starts the warm-up of a run from ingest to the
zero point, and at once reads the raw blocks of ``RAW_DIR`` as ingest does
(every header and pixel, :func:`pipeline.runner._rawio.read_raw_files`) as a
unit (within ``unit_running`` where the tree has it).  It prints the medians
of that read's wall time (``unit``), of the same read with no warm-up
(``alone``), and of the time until the warm-up has loaded everything
(``warm done``, from its start).  ``--against OTHER_TREE`` runs another
source tree (``PYTHONPATH``) alternately and prints the ratios (other /
this).  Run::

    python benchmarks/bench_warm.py /tmp/zdrift-nights/4096x2048x16/raw
        [--against OTHER_TREE] [--rounds 5]
"""

from __future__ import annotations

import argparse
import contextlib
import json
import os
import pathlib
import statistics
import subprocess
import sys
import tempfile
import time

# the script's folder is on sys.path when it is run as a script
from _machine import limit_threads, machine_state

ROOT = pathlib.Path(__file__).resolve().parents[1]
#: The stages of a run from raw blocks to zero points, in plan order.
RUN = ("ingest", "column_stats", "columns", "calibrate", "rectify", "detect")
RUN += ("catalog", "astrometry", "zeropoint")


def measure(raw: pathlib.Path, warm: bool) -> dict[str, float]:
    """In this (fresh) process: the read's wall time, with or without the warm-up beside it."""
    import pipeline.runner._warm as warming
    import pipeline.stages
    from pipeline.runner._rawio import read_raw_files

    names = sorted(path.name for path in raw.glob("*.fits*"))
    graph = [stage for stage in pipeline.stages.GRAPH if stage.name in RUN]
    running = getattr(warming, "unit_running", contextlib.nullcontext)  # an older tree
    start = time.perf_counter()
    thread = warming.start_warming(warming.warm_plan(graph)) if warm else None
    with running():
        mark = time.perf_counter()
        read_raw_files(raw, names)
        figures = {"unit": time.perf_counter() - mark}
    if thread is not None:
        thread.join()
        figures["warm done"] = time.perf_counter() - start
    return figures


def run_tree(tree: pathlib.Path, raw: pathlib.Path, pycache: str) -> dict[str, float]:
    """All figures for source tree ``tree``, each from a fresh process."""
    env = {**os.environ, "PYTHONPATH": str(tree), "PYTHONPYCACHEPREFIX": pycache}
    env.pop("PYTHONDONTWRITEBYTECODE", None)  # a byte-code cache, as an installed package has
    figures = {}
    for mode in ("warm", "alone"):
        child = subprocess.run(
            [sys.executable, __file__, str(raw), "--child", mode],
            env=env,
            cwd=tree,
            check=True,
            capture_output=True,
            text=True,
        )
        result = json.loads(child.stdout.splitlines()[-1])
        if mode == "alone":
            result = {"alone": result["unit"]}
        figures.update(result)
    return figures


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("raw", type=pathlib.Path, help="a night's folder of raw blocks")
    parser.add_argument("--against", type=pathlib.Path, help="another source tree to compare")
    parser.add_argument("--rounds", type=int, default=5, help="fresh processes per tree")
    parser.add_argument("--pycache", default=os.path.join(tempfile.gettempdir(), "zdrift-pycache"))
    parser.add_argument("--child", choices=("warm", "alone"), help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    raw = args.raw.resolve()
    if args.child:
        limit_threads(1)
        print(json.dumps(measure(raw, args.child == "warm")))
        return
    trees = [ROOT] if args.against is None else [ROOT, args.against.resolve()]
    print(machine_state())
    for tree in trees:  # once untimed: byte-code caches, numba's disk cache, the page cache
        run_tree(tree, raw, args.pycache)
    runs: dict[pathlib.Path, list[dict[str, float]]] = {tree: [] for tree in trees}
    for _ in range(args.rounds):
        for tree in trees:
            runs[tree].append(run_tree(tree, raw, args.pycache))
    print(f"medians of {args.rounds} fresh processes per tree; this tree: {ROOT}")
    header = f"{'wall s':12s} {'this':>8s}"
    if args.against is not None:
        print(f"other tree: {args.against}")
        header += f" {'other':>8s} {'ratio':>7s}"
    print(header)
    for name in ("unit", "alone", "warm done"):
        this = statistics.median(run[name] for run in runs[ROOT])
        line = f"{name:12s} {this:8.3f}"
        if args.against is not None:
            other = statistics.median(run[name] for run in runs[trees[1]])
            line += f" {other:8.3f} {other / this:7.2f}"
        print(line)
    print(machine_state())


if __name__ == "__main__":
    main()

"""Start-up cost: CPU time of importing the command line and each stage's warm-up.

A run's fixed cost is mostly imports: the ``zdrift`` command's modules, then,
stage by stage, what each planned stage loads on first use (``Stage.warm``,
loaded by a worker's warm-up thread, see :mod:`pipeline.runner._warm`).  In a
fresh interpreter this script measures the process CPU time of

* ``cli``: ``import pipeline.cli`` (what ``zdrift --help`` pays);
* ``config+runner``: then the config, the runner and the stage modules
  (``pipeline.stages.GRAPH``): what every command that reads a config pays;
* ``warm <stage>``: each stage's share of the warm-up of a run from ingest to
  zeropoint, in plan order (what an earlier stage loaded is not counted again);
* ``total``: all of the above,

and the wall time of a whole ``python -m pipeline --help`` process
(``help``; the interpreter's own start-up included).

``--against OTHER_TREE`` measures this source tree against another (e.g. a
``git archive`` of an older commit): each round runs one fresh process per
tree, alternately (a drifting load on a shared machine hits both alike), the
tree chosen by ``PYTHONPATH``; it prints each figure's median for both trees
and their ratio (other / this: above 1, this tree starts faster).  Python's
byte-code cache of both trees and of the libraries goes to ``--pycache``
(default: a folder in the system's temporary folder; with
``PYTHONPYCACHEPREFIX`` set, Python reads byte code from there only), and
is written whatever ``PYTHONDONTWRITEBYTECODE`` says: an untimed first
round fills it, so that no timed run compiles sources (with the variable
set, every import would compile its module, seconds in all).  Run::

    python benchmarks/bench_startup.py [--against OTHER_TREE] [--rounds 5]
"""

from __future__ import annotations

import argparse
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


def measure() -> dict[str, float]:
    """In this (fresh) process: CPU seconds of each import step, see the module docstring."""
    figures = {}
    start = time.process_time()
    import pipeline.cli

    figures["cli"] = time.process_time() - start
    mark = time.process_time()
    import pipeline.config
    import pipeline.runner
    import pipeline.stages
    from pipeline.runner._warm import _load, warm_plan

    graph = [stage for stage in pipeline.stages.GRAPH if stage.name in RUN]
    figures["config+runner"] = time.process_time() - mark
    for name, entries in warm_plan(graph):
        mark = time.process_time()
        for entry in entries:
            _load(entry)
        figures[f"warm {name}"] = time.process_time() - mark
    figures["total"] = time.process_time() - start
    return figures


def help_wall(tree: pathlib.Path, env: dict[str, str]) -> float:
    """Wall seconds of a ``python -m pipeline --help`` process run from ``tree``."""
    start = time.perf_counter()
    subprocess.run(
        [sys.executable, "-m", "pipeline", "--help"],
        env=env,
        cwd=tree,
        check=True,
        stdout=subprocess.DEVNULL,
    )
    return time.perf_counter() - start


def run_tree(tree: pathlib.Path, pycache: str) -> dict[str, float]:
    """All figures for source tree ``tree``, each from a fresh process."""
    env = {**os.environ, "PYTHONPATH": str(tree), "PYTHONPYCACHEPREFIX": pycache}
    env.pop("PYTHONDONTWRITEBYTECODE", None)  # fill the cache (see the module docstring)
    child = subprocess.run(
        [sys.executable, __file__, "--child"],
        env=env,
        cwd=tree,
        check=True,
        capture_output=True,
        text=True,
    )
    figures = json.loads(child.stdout)
    figures["help"] = help_wall(tree, env)
    return figures


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--against", type=pathlib.Path, help="another source tree to compare")
    parser.add_argument("--rounds", type=int, default=5, help="fresh processes per tree")
    parser.add_argument("--pycache", default=os.path.join(tempfile.gettempdir(), "zdrift-pycache"))
    parser.add_argument("--child", action="store_true", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child:
        limit_threads(1)
        print(json.dumps(measure()))
        return
    trees = [ROOT] if args.against is None else [ROOT, args.against.resolve()]
    print(machine_state())
    for tree in trees:  # once untimed: byte-code caches, numba's disk cache, the IERS cache
        run_tree(tree, args.pycache)
    runs: dict[pathlib.Path, list[dict[str, float]]] = {tree: [] for tree in trees}
    for _ in range(args.rounds):
        for tree in trees:
            runs[tree].append(run_tree(tree, args.pycache))
    names = list(runs[ROOT][0])
    header = f"{'CPU s (help: wall s)':24s} {'this':>8s}"
    if args.against is not None:
        header += f" {'other':>8s} {'ratio':>7s}"
    print(f"medians of {args.rounds} fresh processes per tree; this tree: {ROOT}")
    if args.against is not None:
        print(f"other tree: {args.against}")
    print(header)
    for name in names:
        this = statistics.median(run[name] for run in runs[ROOT])
        line = f"{name:24s} {this:8.3f}"
        if args.against is not None:
            other = statistics.median(run.get(name, float("nan")) for run in runs[trees[1]])
            line += f" {other:8.3f} {other / this if this else float('nan'):7.2f}"
        print(line)
    print(machine_state())


if __name__ == "__main__":
    main()

"""CPU time of the detect stage's search on one saved rectified stretch, one core.

Run::

    python benchmarks/bench_detect_search.py NIGHT_OUTPUT [--stretch 5] [--repeat 3]
        [--against OTHER_TREE] [--rounds 3]

As ``bench_detect_stretch.py`` (whose loading of a stretch it uses), but
it times, inside each run of :func:`pipeline.stages.detect.detect_stretch`,
the search's functions as the stage calls them: the background
(``estimate_background``), the matched filter's templates, inverse
variance, scale and significance maps (``band_templates``,
``inverse_variance``, ``filter_scale``, ``significance_map``) and the
segmentation with its deblending (``find_sources``), for both searches.
It prints each run's search CPU time with its parts (ms) and the unit's.
After the first, untimed run the process's objects are frozen for the
garbage collector, as a pool worker's are once it is warm.

``--against OTHER_TREE`` runs this script ``--rounds`` times in each tree,
alternately, each in a fresh process (an older tree without this script is
measured by this one on its package), and prints the ratio of the medians.
"""

from __future__ import annotations

import importlib
import json
import pathlib
import statistics
import subprocess
import sys
import time

from _machine import limit_threads, machine_state

limit_threads(1)

ROOT = pathlib.Path(__file__).resolve().parents[1]

#: The search's functions, as detect's module names them.
SEARCH = (
    "estimate_background",
    "band_templates",
    "inverse_variance",
    "filter_scale",
    "significance_map",
    "find_sources",
)


def measure(args) -> list[dict]:
    """Per timed run: the search's CPU time by function and the unit's, seconds."""
    # the package first: bench_detect_stretch puts its own tree first on the path
    detect = importlib.import_module("pipeline.stages.detect")
    from bench_detect_stretch import load_stretch, settle_as_a_worker

    spent: dict[str, float] = {}

    def timed(name):
        function = getattr(detect, name)

        def call(*a, **k):
            start = time.process_time()
            try:
                return function(*a, **k)
            finally:
                spent[name] = spent.get(name, 0.0) + time.process_time() - start

        return call

    for name in SEARCH:
        setattr(detect, name, timed(name))
    own, before, after = load_stretch(pathlib.Path(args.night), args.stretch)
    options = detect.DetectOptions()
    detect.detect_stretch(own, before, after, options, stretch_index=args.stretch)  # loads
    settle_as_a_worker()
    runs = []
    for _ in range(args.repeat):
        spent.clear()
        start = time.process_time()
        detect.detect_stretch(own, before, after, options, stretch_index=args.stretch)
        runs.append({"unit": time.process_time() - start, **spent})
    print(f"measured {detect.__file__}", file=sys.stderr)
    return runs


def against(args) -> None:
    """Alternate fresh-process runs in this tree and in ``args.against``; print the ratio."""
    trees = {"this": ROOT, "other": pathlib.Path(args.against).resolve()}
    search: dict[str, list[float]] = {name: [] for name in trees}
    unit: dict[str, list[float]] = {name: [] for name in trees}
    for _ in range(args.rounds):
        for name, tree in trees.items():
            command = [sys.executable, str(pathlib.Path(__file__).resolve()), args.night]
            command += ["--stretch", str(args.stretch), "--repeat", str(args.repeat), "--json"]
            command.append(f"--tree={tree}")
            out = subprocess.run(command, check=True, capture_output=True, text=True).stdout
            for run in json.loads(out.strip().splitlines()[-1]):
                search[name].append(sum(run[k] for k in SEARCH if k in run))
                unit[name].append(run["unit"])
            print(f"{name:5s} ({tree}): search CPU {search[name][-args.repeat :]}", flush=True)
    print(machine_state())
    this, other = (statistics.median(search[name]) for name in trees)
    print(
        f"median search CPU: this tree {this:.3f} s, other tree {other:.3f} s; other / this = "
        f"{other / this:.2f} (least: {min(search['other']) / min(search['this']):.2f}); "
        f"unit: {statistics.median(unit['this']):.2f} s here, "
        f"{statistics.median(unit['other']):.2f} s there"
    )


def main(argv: list[str] | None = None) -> int:
    from bench_detect_stretch import arguments

    parser = arguments(__doc__.splitlines()[0], 5)
    args = parser.parse_args(argv)
    sys.path.insert(0, str(ROOT / "benchmarks"))
    sys.path.insert(0, args.tree or str(ROOT))
    if args.against:
        against(args)
    else:
        report(args, measure(args))
    return 0


def report(args, runs: list[dict]) -> None:
    """Print the runs' figures (as JSON with ``--json``, for :func:`against`)."""
    if args.json:
        print(json.dumps(runs))
        return
    print(machine_state())
    for run in runs:
        parts = ", ".join(f"{k} {run[k] * 1e3:.0f}" for k in SEARCH if k in run)
        total = sum(run[k] for k in SEARCH if k in run)
        print(f"stretch {args.stretch}: search {total:.3f} s of {run['unit']:.2f} s ({parts} ms)")


if __name__ == "__main__":
    sys.exit(main())

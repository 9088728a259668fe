"""CPU time of a stage's units of a reduced night, in one process, and their outputs' hashes.

Run::

    python benchmarks/bench_units.py NIGHT.yaml --stage calibrate [--stretches 0,3,10,20,31]
        [--repeat 3] [--against OTHER_TREE] [--rounds 3]

``NIGHT.yaml`` is the config of a night reduced at least to ``--stage``
(e.g. a copy of ``benchmarks/bench_night.py``'s long night, whose products
it reads and never writes).  For each selected stretch the unit is run as a
worker runs it: its inputs loaded from the night's products (hashes
checked), the stage called, its products written -- into a scratch folder
(``--out``), not the night's.  After one untimed round (imports, compiled
loops), ``--repeat`` rounds are timed; it prints the process CPU time of the
load, the stage and the write summed over the stretches (best round) and
whether every unit's ``output_hash`` equals the one the night's provenance
records: a change that must leave the products as they were shows it here.

``--against OTHER_TREE`` measures this source tree against another (e.g. a
``git archive`` of an older commit): it runs this script ``--rounds`` times
with each tree's package, alternately (so a drifting load on a shared
machine hits both alike), each in a fresh process, and prints each tree's
best-round CPU times and the ratio of their medians.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import pathlib
import statistics
import subprocess
import sys
import tempfile
import time
import warnings

# the script's folder is on sys.path when it is run as a script
from _machine import limit_threads, machine_state

limit_threads(1)

ROOT = pathlib.Path(__file__).resolve().parents[1]
# --tree=DIR (given by --against): import the package from that source tree.
TREE = next((a.split("=", 1)[1] for a in sys.argv if a.startswith("--tree=")), str(ROOT))
sys.path.insert(0, TREE)

PHASES = ("load", "run", "write")


def unit_tasks(config_path: str, stage_name: str, stretches: list[int]):
    """The night's store and the tasks of ``stage_name`` for ``stretches``."""
    from pipeline.config import load_config
    from pipeline.runner._night import NightStore

    night = NightStore(load_config(config_path))
    stage = night.stages[stage_name]
    tasks = []
    for stretch in night.units(stage):
        if stretch is not None and stretch.index not in stretches:
            continue
        hashes, specs, problem = night.inputs(stage, stretch)
        if problem is not None:
            raise SystemExit(f"{stage_name}/{stretch.id}: {problem}; reduce the night first.")
        tasks.append(night.task(stage, stretch, specs, hashes, False, None))
    return night, stage, tasks


def time_unit(task, out: pathlib.Path) -> tuple[dict[str, float], str]:
    """CPU seconds of the unit's load, stage and write, and its output hash."""
    from pipeline.runner import _unit
    from pipeline.runner._store import output_hash, write_products

    read: dict[str, str] = {}
    times = {}
    start = time.process_time()
    with warnings.catch_warnings(), contextlib.ExitStack() as files:
        warnings.simplefilter("ignore")
        inputs = {spec.name: spec.load(read, files) for spec in task.inputs}
        times["load"] = time.process_time() - start
        start = time.process_time()
        products = task.stage.run(inputs=inputs, options=task.options, context=task.context)
        times["run"] = time.process_time() - start
    start = time.process_time()
    products, _ = _unit._check_products(task, products)
    entries = write_products(out / task.unit, products, _unit._fits_cards(task))
    times["write"] = time.process_time() - start
    return times, output_hash(entries)


def measure(args) -> dict:
    """Best-round CPU times of the selected units and whether their hashes match the night's."""
    from pipeline._offline import astropy_offline

    night, stage, tasks = unit_tasks(args.config, args.stage, args.stretches)
    recorded = {task.unit: night.sidecar(stage, task.unit)["output_hash"] for task in tasks}
    rounds, same = [], True
    with astropy_offline(), tempfile.TemporaryDirectory(dir=args.out) as out:
        for round_ in range(args.repeat + 1):
            total = dict.fromkeys(PHASES, 0.0)
            for task in tasks:
                times, digest = time_unit(task, pathlib.Path(out))
                same &= digest == recorded[task.unit]
                for phase in PHASES:
                    total[phase] += times[phase]
            if round_:  # the first round loads what a worker's warm-up would
                rounds.append(total)
    best = {phase: min(r[phase] for r in rounds) for phase in PHASES}
    return {"units": len(tasks), "identical": same, **best}


def against(args) -> None:
    """Alternate this tree and ``args.against``, fresh processes, and compare."""
    trees = {"this": str(ROOT), "other": str(pathlib.Path(args.against).resolve())}
    results: dict[str, list[dict]] = {name: [] for name in trees}
    common = [args.config, "--stage", args.stage, "--repeat", str(args.repeat), "--json"]
    common += ["--stretches", ",".join(map(str, args.stretches)), "--out", args.out]
    for _ in range(args.rounds):
        for name in ("other", "this"):
            command = [sys.executable, __file__, *common, f"--tree={trees[name]}"]
            text = subprocess.run(command, check=True, capture_output=True, text=True).stdout
            results[name].append(json.loads(text.strip().splitlines()[-1]))
    for name, runs in results.items():
        print(f"{name:6s}{trees[name]}")
        for phase in PHASES:
            print(f"    {phase:6s}" + " ".join(f"{r[phase]:7.3f}" for r in runs) + " s CPU")
        print(f"    output hashes as recorded: {all(r['identical'] for r in runs)}")
    for phase in PHASES:
        ratio = statistics.median(r[phase] for r in results["other"]) / statistics.median(
            r[phase] for r in results["this"]
        )
        print(f"other / this, {phase}: {ratio:.3f} (medians)")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("config", help="the reduced night's config file")
    parser.add_argument("--stage", default="calibrate")
    parser.add_argument(
        "--stretches",
        default="0,3,10,20,31",
        type=lambda text: [int(v) for v in text.split(",")],
        help="stretch indices, e.g. 0,3,10",
    )
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--out", default=tempfile.gettempdir(), help="scratch folder's parent")
    parser.add_argument("--against", help="another source tree to measure alternately")
    parser.add_argument("--rounds", type=int, default=3, help="alternations with --against")
    parser.add_argument("--json", action="store_true", help="print the CPU times as JSON only")
    parser.add_argument("--tree", help=argparse.SUPPRESS)  # the package's tree, for --against
    args = parser.parse_args()
    if args.against:
        print(machine_state())
        against(args)
        print(machine_state())
        return
    result = measure(args)
    if args.json:
        print(json.dumps(result))
        return
    print(f"{args.stage}: {result['units']} units of {args.config}, best of {args.repeat} rounds")
    for phase in PHASES:
        print(f"    {phase:6s}{result[phase]:7.3f} s CPU")
    print(f"    output hashes as recorded: {result['identical']}")


if __name__ == "__main__":
    main()

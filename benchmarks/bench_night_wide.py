"""Wall time of the night-wide stages of a reduced night, this tree against another.

The night-wide stages (``columns``, ``catalog``, ``astrometry``,
``zeropoint``) run one unit each, on one core, while the other cores idle;
their time is the product reading and writing (the store's timings
``load_s`` and ``write_s``) as much as their compute.  This script reruns
each of them alone (``zdrift run NIGHT.yaml --stage STAGE --force``) on a
reduced night, ``--repeat`` times, alternating this tree with ``--against
OTHER_TREE`` (the other tree's ``pipeline`` package first on
``PYTHONPATH``; make one with ``git archive REV | tar -x -C DIR``), so that
drifting load hits both alike, and prints per stage and tree the medians of
the unit's wall (its sidecar's ``started`` to ``finished``), its load,
compute and write times, and the command's wall (start-up included).

The night is changed in place (the stages' products are rewritten; both trees
must write the same bytes, which the script checks): run it on a copy of a
reduced night, never on a night others read.  Run::

    python benchmarks/bench_night_wide.py /tmp/me/4096x2048x16/night.yaml
        [--against /tmp/me-old] [--repeat 3] [--stages catalog,astrometry]
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import time
from datetime import datetime
from pathlib import Path

import yaml

STAGES = ("columns", "catalog", "astrometry", "zeropoint")


def _unit_dir(config: Path, stage: str) -> Path:
    night = yaml.safe_load(config.read_text(encoding="utf-8"))["night"]
    return config.parent / night["output_dir"] / night["name"] / stage / "night"


def _run_stage(config: Path, stage: str, tree: Path | None) -> dict:
    env = dict(os.environ)
    if tree is not None:
        env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(tree), env.get("PYTHONPATH")]))
    command = [sys.executable, "-m", "pipeline", "run", str(config), "--stage", stage, "--force"]
    start = time.perf_counter()
    # Run from the night's folder: ``python -m`` puts the working directory first
    # on sys.path, and a tree's checkout there would win over PYTHONPATH.
    result = subprocess.run(
        command, env=env, cwd=config.parent, capture_output=True, text=True, check=False
    )
    wall = time.perf_counter() - start
    if result.returncode not in (0, 1):  # 1: the stage reported a problem with its input
        raise RuntimeError(f"{command} failed:\n{result.stderr}")
    sidecar = json.loads((_unit_dir(config, stage) / "_provenance.json").read_text("utf-8"))
    span = datetime.fromisoformat(sidecar["finished"]) - datetime.fromisoformat(sidecar["started"])
    digests = {name: entry["sha256"] for name, entry in sidecar["products"].items()}
    return {"unit": span.total_seconds(), "command": wall, **sidecar["timings"], "sha": digests}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("config", type=Path, help="the reduced night's config (a copy)")
    parser.add_argument("--against", type=Path, help="another tree to alternate with")
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--stages", default=",".join(STAGES))
    args = parser.parse_args(argv)
    args.config = args.config.resolve()
    stages = args.stages.split(",")
    trees = {"this": None} | ({"other": args.against} if args.against else {})
    print(f"load average before: {os.getloadavg()}")
    runs: dict[tuple[str, str], list[dict]] = {}
    for _ in range(args.repeat):
        for name, tree in trees.items():
            for stage in stages:
                runs.setdefault((stage, name), []).append(_run_stage(args.config, stage, tree))
    print(f"load average after: {os.getloadavg()}")
    keys = ("unit", "load_s", "compute_s", "write_s", "command")
    print(f"{'stage':<11} {'tree':<6} " + " ".join(f"{k:>9}" for k in keys) + "  (medians, s)")
    for stage in stages:
        for name in trees:
            records = runs[(stage, name)]
            row = [statistics.median(r.get(k, 0.0) for r in records) for k in keys]
            print(f"{stage:<11} {name:<6} " + " ".join(f"{v:9.2f}" for v in row))
        records = [r for n in trees for r in runs[(stage, n)]]
        differ = sorted(
            {k for r in records for k, v in r["sha"].items() if v != records[0]["sha"][k]}
        )
        if differ:
            print(f"  {stage}: products that differ between runs: {', '.join(differ)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())

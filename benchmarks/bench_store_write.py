"""Time the product store writing one stretch's products, this tree against another.

A worker that writes a unit's products (:func:`pipeline.runner._store.write_products`)
encodes them, flushes each file to disk, hashes it (SHA-256) and renames it;
while it flushes or hashes, its core does no stage work.  This script reads the
products of one stretch of a reduced night (``calibrate`` and ``rectify``, the
image planes that flow between the per-stretch stages; in this machine's byte
order, as a stage returns them), then writes them again
into a scratch folder ``--repeat`` times per tree, alternating this tree with
``--against OTHER_TREE`` (that tree's ``pipeline`` package first on
``PYTHONPATH``; make one with ``git archive REV | tar -x -C DIR``) so that
drifting load hits both alike.  It prints per stage and tree the median wall
time and process CPU time of a write, and checks that both trees wrote the same
digests.  The reduced night is only read.  Run::

    python benchmarks/bench_store_write.py /tmp/me/4096x2048x16/out/bench
        [--stretch 5] [--against /tmp/me-old] [--repeat 5] [--scratch /tmp/me-store]
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

STAGES = ("calibrate", "rectify")

_CHILD = """
import json, shutil, sys, time
from pathlib import Path
from astropy.io import fits
from pipeline.runner._store import read_products, read_sidecar, write_products
night, stretch, scratch = Path(sys.argv[1]), sys.argv[2], Path(sys.argv[3])
out = {}
for stage in sys.argv[4:]:
    unit = night / stage / stretch
    products = read_products(unit, read_sidecar(unit))
    for value in products.values():  # planes in this machine's byte order, as a stage's are
        for hdu in value if isinstance(value, fits.HDUList) else ():
            if hdu.data is not None and hdu.data.dtype.names is None:
                hdu.data = hdu.data.astype(hdu.data.dtype.newbyteorder("="))
    target = scratch / stage
    shutil.rmtree(target, ignore_errors=True)
    wall0, cpu0 = time.perf_counter(), time.process_time()
    entries = write_products(target, products, {"ZDSTAGE": (stage, "")})
    wall, cpu = time.perf_counter() - wall0, time.process_time() - cpu0
    out[stage] = [wall, cpu, {k: e["sha256"] for k, e in entries.items()}]
print(json.dumps(out))
"""


def _write_once(tree: Path | None, night: Path, stretch: str, scratch: Path) -> dict:
    env = dict(os.environ)
    if tree is not None:
        env["PYTHONPATH"] = str(tree)
    command = [sys.executable, "-c", _CHILD, str(night), stretch, str(scratch), *STAGES]
    result = subprocess.run(command, env=env, capture_output=True, text=True, check=True)
    return json.loads(result.stdout.splitlines()[-1])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("night", type=Path, help="a reduced night's folder (<output>/<night>)")
    parser.add_argument("--stretch", type=int, default=5)
    parser.add_argument("--against", type=Path, help="another tree to alternate with")
    parser.add_argument("--repeat", type=int, default=5)
    parser.add_argument("--scratch", type=Path, help="folder to write into (default: a temp one)")
    args = parser.parse_args()
    stretch = f"s{args.stretch:04d}"
    scratch = args.scratch or Path(tempfile.mkdtemp(prefix="zdrift-store-"))
    trees = {"this": None} if args.against is None else {"this": None, "other": args.against}
    runs: dict[str, list[dict]] = {name: [] for name in trees}
    print(f"load average before: {os.getloadavg()[0]:.2f}")
    started = time.perf_counter()
    for _ in range(args.repeat):
        for name, tree in trees.items():
            runs[name].append(_write_once(tree, args.night, stretch, scratch / name))
    print(f"load average after: {os.getloadavg()[0]:.2f} ({time.perf_counter() - started:.0f} s)")
    for stage in STAGES:
        for name in trees:
            wall = statistics.median(run[stage][0] for run in runs[name])
            cpu = statistics.median(run[stage][1] for run in runs[name])
            print(f"{stage:10s} {name:6s} write wall {wall:6.3f} s  cpu {cpu:6.3f} s  (median)")
        digests = {json.dumps(run[stage][2], sort_keys=True) for r in runs.values() for run in r}
        print(f"{stage:10s} same digests in every write: {len(digests) == 1}")
    if args.scratch is None:
        shutil.rmtree(scratch, ignore_errors=True)


if __name__ == "__main__":
    main()

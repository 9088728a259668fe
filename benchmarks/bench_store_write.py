"""Time the product store writing one stretch's products, this tree against another.

A worker that writes a unit's products (:func:`pipeline.runner._store.write_products`)
encodes them, flushes each file to disk, hashes it (SHA-256) and renames it;
while it flushes or hashes, its core does no stage work.  This script reads the
products of one stretch of a reduced night (``calibrate`` and ``rectify``, the
image planes that flow between the per-stretch stages; in this machine's byte
order, as a stage returns them), then writes them again
into a scratch folder ``--writes`` times in each of ``--repeat`` processes per
tree (the first write of a process pays first-use costs; the later ones are a
warm worker's, which writes many units), alternating this tree with
``--against OTHER_TREE`` (that tree's ``pipeline`` package first on
``PYTHONPATH``; make one with ``git archive REV | tar -x -C DIR``) so that
drifting load hits both alike.  It prints per stage and tree the median wall
time and process CPU time of a first and of a warm write, the ratios of this
tree's to the other's, and checks that both trees wrote the same digests.
The reduced night is only read.  Run::

    python benchmarks/bench_store_write.py /tmp/me/4096x2048x16/out/bench
        [--stretch 5] [--against /tmp/me-old] [--repeat 5] [--writes 4]
        [--scratch /tmp/me-store]
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
writes = int(sys.argv[4])
out = {}
for stage in sys.argv[5:]:
    unit = night / stage / stretch
    products = read_products(unit, read_sidecar(unit))
    for value in products.values():  # planes in this machine's byte order, as a stage's are
        for hdu in value if isinstance(value, fits.HDUList) else ():
            if hdu.data is not None and hdu.data.dtype.names is None:
                hdu.data = hdu.data.astype(hdu.data.dtype.newbyteorder("="))
    target = scratch / stage
    out[stage] = []
    for _ in range(writes):
        shutil.rmtree(target, ignore_errors=True)
        wall0, cpu0 = time.perf_counter(), time.process_time()
        entries = write_products(target, products, {"ZDSTAGE": (stage, "")})
        wall, cpu = time.perf_counter() - wall0, time.process_time() - cpu0
        out[stage].append([wall, cpu, {k: e["sha256"] for k, e in entries.items()}])
print(json.dumps(out))
"""


#: The tree this script belongs to.
THIS_TREE = Path(__file__).resolve().parents[1]


def _write_once(tree: Path, night: Path, stretch: str, scratch: Path, writes: int) -> dict:
    env = dict(os.environ)
    env["PYTHONPATH"] = str(tree)
    # -P: the current folder is not put ahead of PYTHONPATH (run from a tree's
    # root, both runs would import that tree's package).
    command = [sys.executable, "-P", "-c", _CHILD, str(night), stretch, str(scratch), str(writes)]
    command += STAGES
    result = subprocess.run(command, env=env, capture_output=True, text=True, check=True)
    return json.loads(result.stdout.splitlines()[-1])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("night", type=Path, help="a reduced night's folder (<output>/<night>)")
    parser.add_argument("--stretch", type=int, default=5)
    parser.add_argument("--against", type=Path, help="another tree to alternate with")
    parser.add_argument("--repeat", type=int, default=5, help="processes per tree")
    parser.add_argument("--writes", type=int, default=4, help="writes per process (>= 2)")
    parser.add_argument("--scratch", type=Path, help="folder to write into (default: a temp one)")
    args = parser.parse_args()
    stretch = f"s{args.stretch:04d}"
    scratch = args.scratch or Path(tempfile.mkdtemp(prefix="zdrift-store-"))
    trees = {"this": THIS_TREE}
    if args.against is not None:
        trees["other"] = args.against
    runs: dict[str, list[dict]] = {name: [] for name in trees}
    print(f"load average before: {os.getloadavg()[0]:.2f}")
    started = time.perf_counter()
    for _ in range(args.repeat):
        for name, tree in trees.items():
            runs[name].append(_write_once(tree, args.night, stretch, scratch / name, args.writes))
    print(f"load average after: {os.getloadavg()[0]:.2f} ({time.perf_counter() - started:.0f} s)")
    for stage in STAGES:
        medians = {}
        for name in trees:
            for when, pick in (("first", slice(0, 1)), ("warm", slice(1, None))):
                writes = [w for run in runs[name] for w in run[stage][pick]]
                wall = statistics.median(w[0] for w in writes)
                cpu = statistics.median(w[1] for w in writes)
                medians[name, when] = wall, cpu
                print(
                    f"{stage:10s} {name:6s} {when:5s} write wall {wall:6.3f} s  cpu {cpu:6.3f} s"
                    "  (median)"
                )
        for when in ("first", "warm") if len(trees) > 1 else ():
            (wall, cpu), (other_wall, other_cpu) = medians["this", when], medians["other", when]
            print(
                f"{stage:10s} this/other {when:5s} wall {wall / other_wall:5.2f}"
                f"  cpu {cpu / other_cpu:5.2f}"
            )
        digests = {
            json.dumps(w[2], sort_keys=True) for r in runs.values() for run in r for w in run[stage]
        }
        print(f"{stage:10s} same digests in every write: {len(digests) == 1}")
    if args.scratch is None:
        shutil.rmtree(scratch, ignore_errors=True)


if __name__ == "__main__":
    main()

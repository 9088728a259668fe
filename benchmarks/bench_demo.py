"""The README's first command on a fresh clone: install, then the whole demo.

Clones the repository's committed state (``git clone`` of ``--repo``, default
this checkout) into a temporary folder, so that nothing is cached (no
bytecode, no numba cache, no products), then times

* the install: ``python3 -m venv .venv`` and ``pip install --no-compile -e .``
  (``--pip-options`` to compare, e.g. ``--pip-options=''`` for bytecode);
* the demo: ``zdrift run configs/demo.yaml`` (three nights at once, the tiles,
  the pages), and then a rerun, which must find everything up to date.

The machine's load is printed before and after: with other work on the cores
the wall times are upper bounds, and the CPU seconds (of the command and
every process it started) divided by the cores are a lower bound of the wall
time on idle cores.  Run::

    python benchmarks/bench_demo.py [--repo .] [--keep]
"""

from __future__ import annotations

import argparse
import resource
import shlex
import shutil
import subprocess
import tempfile
import time
from pathlib import Path

# the script's folder is on sys.path when it is run as a script
from _machine import machine_state


def _timed(command: str, cwd: Path) -> float:
    """Wall seconds of ``command``; also prints the CPU seconds of it and its children."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    start = time.perf_counter()
    subprocess.run(["bash", "-c", command], cwd=cwd, check=True, capture_output=True)
    wall = time.perf_counter() - start
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    print(
        f"  CPU {cpu:.1f} s (its processes' user + system; unlike the wall time, "
        "not stretched by other work on the cores)"
    )
    return wall


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repo", default=str(Path(__file__).resolve().parents[1]))
    parser.add_argument("--pip-options", default="--no-compile")
    parser.add_argument("--keep", action="store_true", help="keep the clone (prints where)")
    args = parser.parse_args()
    print(machine_state())
    folder = Path(tempfile.mkdtemp(prefix="bench_demo_"))
    try:
        clone = folder / "zdrift"
        subprocess.run(["git", "clone", "-q", args.repo, str(clone)], check=True)
        activate = ". .venv/bin/activate"
        install = _timed(
            f"python3 -m venv .venv && {activate} && "
            f"pip install -q {args.pip_options} -e . >/dev/null 2>&1",
            clone,
        )
        print(f"install (pip install {shlex.quote(args.pip_options)} -e .): {install:.1f} s")
        demo = _timed(f"{activate} && zdrift run configs/demo.yaml", clone)
        print(f"zdrift run configs/demo.yaml, fresh: {demo:.1f} s")
        rerun = _timed(f"{activate} && zdrift run configs/demo.yaml", clone)
        print(f"rerun, everything up to date: {rerun:.1f} s")
        print(f"install + demo: {install + demo:.1f} s ({(install + demo) / 60:.1f} min)")
    finally:
        print(machine_state())
        if args.keep:
            print(f"kept: {folder}")
        else:
            shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()

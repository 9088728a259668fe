"""Kill ``zdrift run`` with SIGKILL at random moments; check workers end and resumes are exact.

For each trial, on a small simulated night (invented data) reduced by the
real stages on the local process pool:

1. start ``python -m pipeline run`` in a fresh output folder;
2. after a random delay, uniform over the length of a clean run, send it
   SIGKILL (the run only, not its process group: its workers must notice);
3. watch every process of the killed run (found by a marker in their
   environment) for up to 5 s, and every file under the output folder for
   writes after the kill;
4. resume with ``python -m pipeline run`` and compare every product file,
   byte for byte (SHA-256), with a clean run of the same night.

Prints one line per trial and a summary; exits 1 if any trial left a
process alive after 5 s, wrote after the kill, failed to resume, or resumed
to products that differ.  Linux only (reads /proc).

Run::

    python benchmarks/kill_trials.py [--trials 20] [--seed 1] [--workers 2]
"""

from __future__ import annotations

import argparse
import hashlib
import os
import random
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import yaml

GRACE_S = 5.0  # the bound on how long a killed run's processes may live
MARKER = "ZDRIFT_KILL_TRIAL"

NIGHT = {
    "night": {"name": "n", "raw_dir": "raw", "pattern": "block_*.fits", "output_dir": "out"},
    "site": {"latitude": 20.0, "longitude": -100.0, "height": 2000.0},
    "camera": {"n_columns": 48, "tdi_rows": 128, "pixel_size": 15.0, "focal_length": 6.2},
    "run": {"stretch_rows": 256, "overlap_rows": 32, "executor": "local"},
    "stages": {"column_stats": {"block_rows": 64}, "columns": {"min_blocks": 4}},
    "simulate": {
        "start": "2026-03-20T04:00:00",
        "n_blocks": 6,
        "block_rows": 256,
        "overscan_columns": 8,
        "compress": False,
        "sky": {"sky_ramp": 4.0},
        "stars": {"density": 20000.0},
    },
}


def zdrift(*args: str, env: dict[str, str] | None = None, **kwargs) -> subprocess.Popen:
    return subprocess.Popen(
        [sys.executable, "-m", "pipeline", *args],
        env={**os.environ, **(env or {})},
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
        **kwargs,
    )


def product_digests(folder: Path) -> dict[str, str]:
    """SHA-256 of every product file (not logs, locks or provenance, which hold times)."""
    digests = {}
    for path in sorted(folder.rglob("*")):
        if path.is_file() and not path.name.startswith(("_", ".")) and path.suffix != ".log":
            digests[path.relative_to(folder).as_posix()] = hashlib.sha256(
                path.read_bytes()
            ).hexdigest()
    return digests


def marked_processes(tag: str) -> list[int]:
    """Live (not zombie) processes whose environment holds ``MARKER=tag``."""
    needle = f"{MARKER}={tag}".encode()
    found = []
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            if needle not in (entry / "environ").read_bytes().split(b"\0"):
                continue
            state = (entry / "stat").read_text().rsplit(")", 1)[1].split()[0]
        except OSError:  # gone, or not ours to read
            continue
        if state not in ("Z", "X"):
            found.append(int(entry.name))
    return found


def command_line(pid: int) -> str:
    try:
        return Path(f"/proc/{pid}/cmdline").read_bytes().replace(b"\0", b" ").decode()[:120]
    except OSError:
        return "?"


def late_writes(folder: Path, since_ns: int) -> list[str]:
    """Files under ``folder`` modified after ``since_ns`` (time.time_ns clock)."""
    late = []
    for path in folder.rglob("*"):
        try:
            if path.is_file() and path.stat().st_mtime_ns > since_ns:
                late.append(path.relative_to(folder).as_posix())
        except FileNotFoundError:
            continue
    return sorted(late)


def trial(config: Path, out: Path, tag: str, delay: float) -> dict:
    shutil.rmtree(out, ignore_errors=True)
    run = zdrift("run", str(config), env={MARKER: tag})
    time.sleep(delay)
    before = marked_processes(tag)
    killed_ns = time.time_ns()
    os.kill(run.pid, signal.SIGKILL)
    run.wait()
    t0 = time.perf_counter()
    left = marked_processes(tag)
    while left and time.perf_counter() - t0 < GRACE_S:
        time.sleep(0.05)
        left = marked_processes(tag)
    ended_s = time.perf_counter() - t0
    left = [f"{pid} {command_line(pid)}" for pid in left]
    # Let a surviving writer show itself, then look for files written after the kill
    # (a 20 ms allowance: the kernel may finish a write already under way).
    late = late_writes(out, killed_ns + 20_000_000) if out.exists() else []
    resume = zdrift("run", str(config))
    code = resume.wait()
    return {
        "processes": len(before),
        "ended_s": ended_s,
        "left": left,
        "late": late,
        "resume_code": code,
        "digests": product_digests(out / "n"),
    }


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--trials", type=int, default=20)
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--workers", type=int, default=2)
    args = parser.parse_args()
    if not Path("/proc/self/environ").exists():
        print("kill_trials needs Linux (/proc)", file=sys.stderr)
        return 2
    random.seed(args.seed)
    with tempfile.TemporaryDirectory(prefix="zdrift-kill-") as tmp:
        tmp = Path(tmp)
        data = {**NIGHT, "run": {**NIGHT["run"], "workers": args.workers}}
        config = tmp / "night.yaml"
        config.write_text(yaml.safe_dump(data))
        if zdrift("simulate", str(config)).wait() != 0:
            print("simulating the night failed", file=sys.stderr)
            return 2
        t0 = time.perf_counter()
        clean = zdrift("run", str(config)).wait()
        clean_s = time.perf_counter() - t0
        if clean != 0:
            print(f"the clean run exited {clean}", file=sys.stderr)
            return 2
        reference = product_digests(tmp / "out/n")
        print(
            f"clean run: {clean_s:.1f} s, {len(reference)} product files, "
            f"{args.workers} workers; load {os.getloadavg()[0]:.2f}"
        )
        bad = 0
        worst = 0.0
        for index in range(args.trials):
            delay = random.uniform(0.0, clean_s)
            result = trial(config, tmp / "out", f"t{index}", delay)
            identical = result["digests"] == reference
            ok = not result["left"] and not result["late"] and result["resume_code"] == 0
            ok = ok and identical
            bad += not ok
            worst = max(worst, result["ended_s"])
            print(
                f"trial {index + 1:2d}: kill at {delay:5.2f} s, {result['processes']} processes "
                f"of the run, all ended after {result['ended_s']:.2f} s, "
                f"{len(result['left'])} left, {len(result['late'])} late writes, resume exit "
                f"{result['resume_code']}, products {'identical' if identical else 'DIFFER'}"
                + ("" if ok else f"  <-- {result['left']} {result['late'][:3]}")
            )
        print(
            f"{args.trials - bad}/{args.trials} trials clean; slowest end of a killed run's "
            f"processes {worst:.2f} s (bound {GRACE_S:.0f} s); load {os.getloadavg()[0]:.2f}"
        )
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main())

"""Where a run's process tree peaks in memory, and which units were running then.

Run::

    python benchmarks/memory_timeline.py NIGHT.yaml [--to zeropoint] [--set KEY=VALUE ...]
        [--peaks 6] [--interval 0.05]

It runs ``zdrift run NIGHT.yaml --to STAGE --force`` (as
``python -m pipeline`` with this interpreter; ``--set`` passes config
overrides, e.g.
``--set run.executor=dask``), samples the resident size (RSS) and
proportional set size (PSS) of the run's process and all its descendants
every ``--interval`` seconds, and, once the run has ended, matches the
samples with the units' start and end times and processes from their
provenance sidecars.  It prints the peak of the summed RSS and of the summed
PSS (see ``benchmarks/bench_night.py`` for what each counts), each
process's share at that moment and the units then running, and the next
``--peaks`` highest moments at least a second apart: whether the tree
peaks while both workers run per-stretch units or in a hand-over between
night-wide stages, and in which worker.  The run overwrites the night's
products (``--force``): use a copy of a night you keep.

(It found that the benchmark night's peak was the hand-over from
astrometry to the zero point, not detect, and where the large blocks a
worker keeps in its heap cost memory: ``pipeline.runner._heap``.)
"""

from __future__ import annotations

import argparse
import contextlib
import datetime
import json
import pathlib
import subprocess
import sys
import time

import psutil


def sample_tree(process: subprocess.Popen, interval: float) -> list[tuple[float, dict]]:
    """``[(time, {pid: (rss, pss)}), ...]`` of ``process`` and its descendants until it ends."""
    root = psutil.Process(process.pid)
    samples = []
    while process.poll() is None:
        moment, row = time.time(), {}
        try:
            members = [root, *root.children(recursive=True)]
        except psutil.Error:
            break
        for member in members:
            with contextlib.suppress(psutil.Error):  # it just ended
                info = member.memory_full_info()
                row[member.pid] = (info.rss, getattr(info, "pss", info.rss))
        samples.append((moment, row))
        time.sleep(interval)
    return samples


def unit_spans(night_output: pathlib.Path) -> list[tuple[float, float, int, str]]:
    """``[(start, end, pid, 'stage/unit'), ...]`` from the sidecars of a night's products."""
    spans = []
    for sidecar in night_output.glob("*/*/_provenance.json"):
        record = json.loads(sidecar.read_text())
        start = datetime.datetime.fromisoformat(record["started"]).timestamp()
        end = datetime.datetime.fromisoformat(record["finished"]).timestamp()
        spans.append((start, end, record["pid"], f"{record['stage']}/{record['unit']}"))
    return spans


def describe(moment: float, row: dict, spans: list, which: int, origin: float) -> str:
    """One sample: the tree's sum, each process's share (GB) and the units then running."""
    total = sum(values[which] for values in row.values())
    shares = ", ".join(
        f"{pid}: {values[which] / 1e9:.3f}" for pid, values in row.items() if values[which] > 5e7
    )
    running = ", ".join(
        f"{name} ({pid})" for start, end, pid, name in spans if start <= moment <= end
    )
    return (
        f"t = {moment - origin:7.2f} s  {total / 1e9:.3f} GB  [{shares}]  running: "
        f"{running or 'no unit'}"
    )


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("config", type=pathlib.Path, help="the night's config file")
    parser.add_argument("--to", default="zeropoint", help="last stage to run (default zeropoint)")
    parser.add_argument("--set", action="append", default=[], help="config override KEY=VALUE")
    parser.add_argument("--peaks", type=int, default=6, help="highest moments to print")
    parser.add_argument("--interval", type=float, default=0.05, help="seconds between samples")
    args = parser.parse_args(argv)

    from pipeline.config import load_config

    config = load_config(args.config, args.set)
    night_output = pathlib.Path(config.night.output_dir) / config.night.name
    command = [sys.executable, "-m", "pipeline", "run", str(args.config.resolve())]
    command += ["--to", args.to, "--force"]
    command += [arg for setting in args.set for arg in ("--set", setting)]
    process = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    samples = sample_tree(process, args.interval)
    print(f"zdrift run ended with status {process.returncode}; {len(samples)} samples")
    spans = unit_spans(night_output)
    if not samples or not spans:
        print("no samples or no units recorded: nothing to show")
        return 1
    origin = min(start for start, *_ in spans)
    for which, name in ((0, "RSS"), (1, "PSS")):
        moment, row = max(samples, key=lambda s: sum(v[which] for v in s[1].values()))
        print(f"peak {name}: " + describe(moment, row, spans, which, origin))
    print("the highest RSS moments, at least 1 s apart (t = 0: the first unit's start):")
    shown: list[float] = []
    for moment, row in sorted(samples, key=lambda s: -sum(v[0] for v in s[1].values())):
        if all(abs(moment - other) >= 1.0 for other in shown):
            shown.append(moment)
            print("  " + describe(moment, row, spans, 0, origin))
            if len(shown) == args.peaks:
                break
    return 0


if __name__ == "__main__":
    sys.exit(main())

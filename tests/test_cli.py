"""Tests of the zdrift command line: exit codes, output, log file (toy graph)."""

from __future__ import annotations

import errno
import json
import math
import os
import re
import socket
import subprocess
import sys
from pathlib import Path

import _toy_graph
import pytest
import yaml

import pipeline
import pipeline.cli
import pipeline.stages
from pipeline.cli import main
from pipeline.config import load_config


@pytest.fixture
def toy_file(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """A toy night on disk and its config file; the CLI sees the toy graph."""
    monkeypatch.setattr(pipeline.stages, "GRAPH", _toy_graph.GRAPH, raising=False)
    _toy_graph.write_raw_night(tmp_path / "raw")
    data = _toy_graph.toy_config_data(tmp_path)
    data["night"].update(raw_dir="raw", output_dir="out")  # relative to the file
    path = tmp_path / "night.yaml"
    path.write_text(yaml.safe_dump(data))
    return path


def test_version(capsys: pytest.CaptureFixture) -> None:
    assert main(["--version"]) == 0
    assert capsys.readouterr().out.strip() == f"zdrift {pipeline.__version__}"


def test_python_m_pipeline_runs_the_cli() -> None:
    result = subprocess.run(
        [sys.executable, "-m", "pipeline", "--version"], capture_output=True, text=True
    )
    assert result.returncode == 0 and result.stdout.strip() == f"zdrift {pipeline.__version__}"


def test_a_reader_that_leaves_early_gets_no_traceback() -> None:
    """`zdrift config night.yaml | head -1`: the pipe closes before the command
    writes; it ends quietly with the shell's status for a broken pipe."""
    config = Path(__file__).parent.parent / "configs" / "demo_2026-10-15.yaml"
    process = subprocess.Popen(
        [sys.executable, "-m", "pipeline", "config", str(config)],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
    )
    process.stdout.close()  # the reader is gone before the command starts writing
    stderr = process.stderr.read().decode()
    process.stderr.close()
    assert process.wait(timeout=60) == pipeline.cli.EXIT_PIPE == 141
    assert stderr == ""


def test_a_command_is_required(capsys: pytest.CaptureFixture) -> None:
    assert main([]) == 2
    assert "required: COMMAND" in capsys.readouterr().err


def test_config_prints_the_resolved_config(toy_file: Path, capsys) -> None:
    assert main(["config", str(toy_file), "--set", "stages.smooth.width=5"]) == 0
    printed = yaml.safe_load(capsys.readouterr().out)
    assert printed["night"]["raw_dir"] == str(toy_file.parent / "raw")
    assert printed["stages"]["smooth"] == {"width": 5}
    assert printed["run"]["overlap_rows"] == 4 and printed["site"]["height"] == 0.0


def test_config_error_exits_2_with_the_key_and_a_hint(toy_file: Path, capsys) -> None:
    assert main(["config", str(toy_file), "--set", "run.workrs=2"]) == 2
    err = capsys.readouterr().err
    assert "--set run.workrs=2: run.workrs: unknown key; did you mean 'workers'?" in err


def test_run_status_and_reruns(toy_file: Path, capsys) -> None:
    assert main(["run", str(toy_file)]) == 0
    captured = capsys.readouterr()
    assert "night toy: 10 units ran, 0 up to date, 0 failed, 0 blocked" in captured.out
    assert "scale: 4/4 units" in captured.err  # progress on stderr
    log_text = (toy_file.parent / "out/toy/zdrift.log").read_text()
    assert "scale/s0003 done in" in log_text

    assert main(["status", str(toy_file)]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[1].split() == ["stage", "scope", "done", "stale", "missing", "failed", "damaged"]
    assert lines[3].split() == ["scale", "stretch", "4", "0", "0", "0", "0"]

    assert main(["run", str(toy_file), "--stage", "smooth", "--force", "--stretches", "1-2"]) == 0
    assert "2 units ran, 0 up to date" in capsys.readouterr().out

    assert main(["run", str(toy_file), "--stage", "smooth", "--set", "stages.smooth.width=5"]) == 0
    out = capsys.readouterr().out
    assert "4 units ran" in out and "rerun with --from total" in out
    assert main(["status", str(toy_file), "--set", "stages.smooth.width=5"]) == 5  # stale
    assert "total stale: night: inputs changed: smooth" in capsys.readouterr().out


def test_failed_stretch_exits_1_and_logs_the_traceback(toy_file: Path, capsys) -> None:
    assert main(["run", str(toy_file), "--set", "stages.scale.fail_on=[1]"]) == 1
    captured = capsys.readouterr()
    assert "failed: scale/s0001: ValueError: toy failure on stretch 1" in captured.out
    assert "ERROR: scale/s0001 failed: ValueError: toy failure on stretch 1" in captured.err
    log_text = (toy_file.parent / "out/toy/zdrift.log").read_text()
    assert "Traceback (most recent call last)" in log_text
    assert 'raise ValueError(f"toy failure on stretch' in log_text


USAGE_ERRORS = [
    (["--stage", "smooth", "--to", "total"], "--to cannot be combined with --stage"),
    (["--stage", "smoth"], "no stage 'smoth'. Did you mean 'smooth'? Stages are index, scale"),
    (["--stretches", "1,x"], "cannot read 'x'"),
    (["--stage", "scale", "--from", "index"], "not allowed with argument"),
]


@pytest.mark.parametrize(("extra", "message"), USAGE_ERRORS)
def test_usage_errors_exit_2(toy_file: Path, capsys, extra: list[str], message: str) -> None:
    assert main(["run", str(toy_file), *extra]) == 2
    assert message in capsys.readouterr().err


def test_a_night_without_raw_files_says_why(toy_file, capsys) -> None:
    """A wrong pattern blocks ingest with a reason, not a puzzle downstream."""
    path = toy_file.parent / "empty"
    path.mkdir()
    assert main(["run", str(toy_file), "--set", f"night.raw_dir={path}"]) == 1
    message = f"blocked: index/night: no file in {path} matches night.pattern"
    assert message in capsys.readouterr().out


def _product_files(root: Path) -> dict[str, int]:
    return {str(p.relative_to(root)): p.stat().st_mtime_ns for p in root.rglob("*") if p.is_file()}


def test_a_mistyped_raw_folder_stops_the_run_before_anything_runs(toy_file, capsys) -> None:
    """No raw folder: a usage error naming it, and the night's products left as they were.

    Before, the stages reading raw blocks were blocked or failed (marking
    their products failed) while the later ones ran again on the old
    products, and a report was rebuilt without any stretch.
    """
    assert main(["run", str(toy_file)]) == 0
    night = toy_file.parent / "out" / "toy"
    before = _product_files(night)
    capsys.readouterr()
    path = toy_file.parent / "missing"
    assert main(["run", str(toy_file), "--set", f"night.raw_dir={path}"]) == 2
    err = capsys.readouterr().err
    assert f"night toy: night.raw_dir {path} is not a folder, and stages index, scale read" in err
    assert "run from a later stage (--from smooth)" in err
    after = _product_files(night)
    assert {k: v for k, v in after.items() if k != "zdrift.log"} == {
        k: v for k, v in before.items() if k != "zdrift.log"
    }
    # ... and from a later stage the products are worked on without the raw files
    assert main(["run", str(toy_file), "--set", f"night.raw_dir={path}", "--from", "smooth"]) == 0


def test_a_raw_file_gone_blocks_its_stretches_without_failing_them(toy_file, capsys) -> None:
    """A raw block moved away: the units reading it are blocked, naming it; none is failed.

    (A whole run indexes the night again without it; a run of the later
    stages goes by the block index of the last.)
    """
    assert main(["run", str(toy_file)]) == 0
    capsys.readouterr()
    raw = toy_file.parent / "raw"
    gone = sorted(raw.iterdir())[-1]
    gone.rename(toy_file.parent / gone.name)
    assert main(["run", str(toy_file), "--stage", "scale", "--force"]) == 1
    out = capsys.readouterr().out
    assert f"raw file(s) {gone.name} of rows" in out and "not found in night.raw_dir" in out
    assert "failed: scale" not in out
    assert not list((toy_file.parent / "out" / "toy").rglob("_failed.json"))


def test_locked_night_exits_3(toy_file: Path, capsys) -> None:
    lock = toy_file.parent / "out/toy/_lock.json"
    lock.parent.mkdir(parents=True)
    lock.write_text(json.dumps({"pid": 1, "host": socket.gethostname(), "started": "t"}))
    assert main(["run", str(toy_file)]) == 3  # pid 1 (init) is always alive
    assert "Another run holds the lock" in capsys.readouterr().err


def test_plan_prints_the_site_and_camera_numbers(toy_file: Path, capsys) -> None:
    realistic = ["--set", "camera.n_columns=2048", "--set", "camera.tdi_rows=2048"]
    assert main(["plan", str(toy_file), *realistic]) == 0
    out = capsys.readouterr().out
    assert "focal length" in out and "line time" in out


def test_plan_of_the_toy_camera(toy_file: Path, capsys) -> None:
    """Regression: a 6 x 16 px camera failed with 'no forward drift along the rows'."""
    assert main(["plan", str(toy_file)]) == 0
    out = capsys.readouterr().out
    assert "crossing time (exposure)" in out and "nan" not in out


DEMO = Path(__file__).parent.parent / "configs" / "simulate_demo.yaml"


def _value(text, label):
    line = next(line for line in text.splitlines() if line.strip().startswith(label))
    return float(line[len(line) - len(line.lstrip()) + len(label) :].split()[0])


def test_plan_reports_spin_error_consequences(capsys):
    spin, error = 6.953115, 0.001  # s: the demo mirror (configs/simulate_demo.yaml)
    assert main(["plan", str(DEMO), "--spin-error", str(error)]) == 0
    out = capsys.readouterr().out
    # A liquid spinning at w = 2 pi / T takes the shape of a paraboloid of focal
    # length f = g / (2 w^2) (Borra et al. 1990, SPIE 1236, eq. 1),
    # with the plan's own normal gravity; printed to 1e-5 m.
    g = _value(out, "normal gravity")
    focal = g / (2 * (2 * math.pi / spin) ** 2)
    slower_focal = g / (2 * (2 * math.pi / (spin + error)) ** 2)
    assert _value(out, "focal length") == pytest.approx(focal, abs=1e-5)
    # The errors are first order in dT/T; compare them with the exact
    # differences to the plan of the same mirror spun 1 ms slower (second
    # order: dT/T = 1.4e-4 of the error; the printed digits: 1e-4 of it).
    assert main(["plan", str(DEMO), "--set", f"camera.spin_period={spin + error}"]) == 0
    slower = capsys.readouterr().out
    assert _value(slower, "focal length") == pytest.approx(slower_focal, abs=1e-5)
    assert _value(out, "focal length error") == pytest.approx(
        1e3 * (slower_focal - focal), rel=5e-4
    )
    # A longer focal length makes the drift faster in pixels, so the matched
    # line time shrinks; over 4096 rows the mismatch of the old line time is
    # the smear (DEVELOPERS.md, "Track geometry").
    line_time = _value(out, "matched line time")
    slower_line_time = _value(slower, "matched line time")
    assert _value(out, "line time error") == pytest.approx(
        1e3 * (slower_line_time - line_time), rel=1e-3
    )
    assert _value(out, "smear over 4096 rows") == pytest.approx(
        4096 * (1 - slower_line_time / line_time), rel=1e-3
    )


def test_plan_rejects_bad_epoch(capsys):
    assert main(["plan", str(DEMO), "--epoch", "not-a-time"]) == 2
    assert "--epoch" in capsys.readouterr().err


def test_simulate_needs_a_simulate_section(toy_file: Path, capsys) -> None:
    assert main(["simulate", str(toy_file)]) == 2
    assert "the config has no 'simulate' section" in capsys.readouterr().err


DEMO_NIGHT = """\
night: {name: 2026-10-15, raw_dir: raw, output_dir: out}
site: {name: Fictional Ridge, latitude: 31.0, longitude: -105.0, height: 2200}
camera: {n_columns: 256, tdi_rows: 256, pixel_size: 15, focal_length: 3.5}
run: {stretch_rows: 512, overlap_rows: 32, workers: 2}
simulate: {start: "2026-10-15T05:00:00", n_blocks: 4, block_rows: 256, overscan_columns: 16}
stages:
  column_stats: {block_rows: 64}
  astrometry:               # the simulator's own reference catalogue of the strip
    reference: {source: file, path: raw/reference.ecsv, columns: {pm_ra: pmra, pm_dec: pmdec}}
"""


@pytest.mark.slow
def test_simulate_then_run_the_registered_stages(tmp_path: Path, capsys) -> None:
    """The real stage graph plugs into the runner: a simulated night runs to the end."""
    config = tmp_path / "night.yaml"
    config.write_text(DEMO_NIGHT)
    assert main(["simulate", str(config)]) == 0
    assert "wrote" in capsys.readouterr().out
    # Every unit runs.  The exit status is 1 when stages report problems with
    # their input, and this tiny night (256 columns, a sky too flat for the
    # column solve to separate response from level) has real ones: the star
    # flat sees the flat field's residual trend.  Those are what the run must
    # report, not failures.
    code = main(["run", str(config)])
    out = capsys.readouterr().out
    assert " 0 failed, 0 blocked" in out, out
    problems = [line for line in out.splitlines() if line.strip().startswith("problem:")]
    assert code == (1 if problems else 0), out
    assert all("star flat" in line for line in problems), problems
    assert main(["run", str(config)]) == code
    assert "night 2026-10-15: 0 units ran" in capsys.readouterr().out
    assert main(["status", str(config)]) in (0, 1)
    table = [line for line in capsys.readouterr().out.splitlines()[2:] if "problem:" not in line]
    for line in table:
        done, stale, missing, failed = line.split()[2:6]
        assert (stale, missing, failed) == ("0", "0", "0") and int(done) >= 1, line


def test_help_lists_the_exit_codes(capsys: pytest.CaptureFixture) -> None:
    for args in (["--help"], ["run", "--help"]):
        assert main(args) == 0
        out = capsys.readouterr().out
        assert "exit status:" in out
        for code in (
            "0  success",
            "1  run: a unit failed",
            "2  bad command line",
            "3  another run",
            "4  run: cannot start",
            "5  status: nothing failed",
            "141  the output's reader left",
        ):
            assert code in out


def test_the_help_example_of_set_uses_a_key_that_exists(capsys) -> None:
    assert main(["run", "--help"]) == 0
    example = re.search(r"e\.g\.\s+(stages\.\S+=\S+)", capsys.readouterr().out).group(1)
    template = Path(__file__).parent.parent / "configs" / "template.yaml"
    load_config(template, [example])  # the registered stages, not the toy graph


@pytest.mark.parametrize(
    "args", [["-v", "config", "{}"], ["config", "{}", "-v"], ["-v", "config", "{}", "-v"]]
)
def test_verbose_goes_before_or_after_the_command(toy_file, monkeypatch, args) -> None:
    seen = {}

    def fake(options, config):
        seen["verbose"] = options.verbose
        return 0

    monkeypatch.setitem(pipeline.cli._COMMANDS, "config", fake)
    assert main([a.format(toy_file) for a in args]) == 0
    assert seen["verbose"] == args.count("-v")


def test_stretches_beyond_the_night_exit_2(toy_file: Path, capsys) -> None:
    # the toy night has 100 rows in stretches of 30: stretches 0 to 3
    assert main(["run", str(toy_file), "--stretches", "2,7-8"]) == 2
    last = capsys.readouterr().err.splitlines()[-1]  # after the progress lines
    assert (
        last == "zdrift run: --stretches 7,8: the night has stretches 0 to 3; see `zdrift status`."
    )


def test_stretches_with_only_night_scoped_stages_say_they_change_nothing(
    toy_file: Path, capsys
) -> None:
    """``--stretches`` picks units of per-stretch stages; a night-scoped one runs whole."""
    assert main(["run", str(toy_file), "--to", "smooth"]) == 0
    capsys.readouterr()
    assert main(["run", str(toy_file), "--stage", "total", "--stretches", "1"]) == 0
    err = capsys.readouterr().err
    assert (
        "--stretches has no effect on total: a night-scoped stage runs over the whole night" in err
    )
    # with a per-stretch stage selected too, nothing is said at the default verbosity
    assert main(["run", str(toy_file), "--from", "smooth", "--stretches", "1"]) == 0
    assert "--stretches" not in capsys.readouterr().err


def _one_line_exit_2(args: list[str], capsys) -> str:
    assert main(args) == 2
    captured = capsys.readouterr()
    assert captured.out == ""
    lines = captured.err.splitlines()
    assert len(lines) == 1, lines
    return lines[0]


def test_an_output_dir_that_is_a_file_exits_2_in_one_line(toy_file: Path, capsys) -> None:
    (toy_file.parent / "out").write_text("a file")
    line = _one_line_exit_2(["run", str(toy_file)], capsys)
    assert "night.output_dir" in line and "is a file, not a folder" in line


def test_a_config_that_is_not_utf8_exits_2_in_one_line(toy_file: Path, capsys) -> None:
    toy_file.write_bytes(toy_file.read_bytes().replace(b"Fictional", b"Fict\xeenal"))
    line = _one_line_exit_2(["run", str(toy_file)], capsys)
    assert f"{toy_file}, line " in line and "not UTF-8 text" in line


def test_an_absolute_pattern_exits_2_in_one_line(toy_file: Path, capsys) -> None:
    line = _one_line_exit_2(["run", str(toy_file), "--set", "night.pattern=/tmp/*.fits"], capsys)
    assert "night.pattern: pattern must be relative to raw_dir" in line


def test_a_yaml_syntax_error_exits_2_naming_the_file(toy_file: Path, capsys) -> None:
    toy_file.write_text(toy_file.read_text() + "stages: {unclosed\n")
    line = _one_line_exit_2(["run", str(toy_file)], capsys)
    assert f"{toy_file}, line " in line and "<unicode string>" not in line


# --------------------------------------------------- status: exit codes, lock, content


def test_status_exit_codes_say_what_is_left(toy_file: Path, capsys) -> None:
    assert main(["status", str(toy_file)]) == 5  # nothing run yet: all missing
    assert main(["run", str(toy_file), "--set", "stages.scale.fail_on=[1]"]) == 1
    assert main(["status", str(toy_file)]) == 1  # a failed unit
    assert main(["run", str(toy_file)]) == 0
    capsys.readouterr()
    assert main(["status", str(toy_file)]) == 0
    assert "lock:" not in capsys.readouterr().out


def test_status_verify_finds_a_flipped_byte_and_run_verify_repairs_it(
    toy_file: Path, capsys
) -> None:
    assert main(["run", str(toy_file)]) == 0
    product = toy_file.parent / "out/toy/smooth/s0002/image.fits"
    data = bytearray(product.read_bytes())
    data[2880 + 8] ^= 0x01  # one bit of the first data value; same size
    product.write_bytes(bytes(data))
    capsys.readouterr()
    assert main(["status", str(toy_file)]) == 0  # sizes only: not seen
    assert main(["status", str(toy_file), "--verify"]) == 1
    out = capsys.readouterr().out
    assert "smooth damaged: s0002: image.fits content changed since it was written" in out
    assert main(["run", str(toy_file), "--verify"]) == 1  # found and recomputed: reported
    captured = capsys.readouterr()
    assert "1 damaged product" in captured.out
    assert "damaged: smooth/s0002: image.fits content changed" in captured.out
    assert "ERROR: damaged product in smooth/s0002" in captured.err
    assert main(["status", str(toy_file), "--verify"]) == 0


def test_status_shows_a_running_a_stale_and_a_broken_lock(toy_file: Path, capsys) -> None:
    lock = toy_file.parent / "out/toy/_lock.json"
    lock.parent.mkdir(parents=True)
    sleeper = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    try:
        record = {"pid": sleeper.pid, "host": socket.gethostname(), "started": "t0"}
        lock.write_text(json.dumps(record))
        main(["status", str(toy_file)])
        assert f"lock: a run is going on: process {sleeper.pid}" in capsys.readouterr().out
    finally:
        sleeper.kill()
        sleeper.wait()
    main(["status", str(toy_file)])
    assert f"lock: stale: process {sleeper.pid}" in capsys.readouterr().out
    lock.write_text("")
    main(["status", str(toy_file)])
    assert "is broken (empty or not a JSON object)" in capsys.readouterr().out


@pytest.mark.skipif(not Path("/proc/self/fd").is_dir(), reason="needs Linux /proc")
def test_a_full_disk_at_start_is_one_line_and_exit_4(toy_file: Path, capsys, monkeypatch):
    real = os.write

    def full_disk(fd, data):  # the disk fills up as the run writes its lock
        if "_lock.json" in os.readlink(f"/proc/self/fd/{fd}"):
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return real(fd, data)

    monkeypatch.setattr(os, "write", full_disk)
    assert main(["run", str(toy_file)]) == 4
    monkeypatch.undo()
    err = capsys.readouterr().err.splitlines()
    assert len(err) == 1, err
    assert err[0].startswith("zdrift run: cannot write the run lock ")
    assert "No space left on device (ENOSPC); free space on that disk" in err[0]
    assert not list((toy_file.parent / "out/toy").glob("*lock*"))


EXIT_SCRIPT = """
import atexit, pathlib, sys, threading, time
from pipeline.cli import exit_now

folder = pathlib.Path(sys.argv[1])
atexit.register((folder / "handler").write_text, "ran")
if sys.argv[2] == "thread":  # the interpreter would wait for it
    late = lambda: (time.sleep(0.5), (folder / "thread").write_text("ran"))
    threading.Thread(target=late).start()
print("a line in the buffer of a pipe")
exit_now(3)
"""


@pytest.mark.parametrize("thread", ["thread", "no-thread"])
def test_the_command_ends_with_its_status_output_and_exit_handlers(tmp_path, thread):
    """``exit_now`` (how ``zdrift`` ends) skips only the interpreter's teardown."""
    env = {k: v for k, v in os.environ.items() if k != "PYTHONUNBUFFERED"}  # a buffered pipe
    result = subprocess.run(
        [sys.executable, "-c", EXIT_SCRIPT, str(tmp_path), thread],
        capture_output=True,
        text=True,
        timeout=60,
        env=env,
    )
    assert result.returncode == 3, result.stderr
    assert result.stdout == "a line in the buffer of a pipe\n"
    assert (tmp_path / "handler").read_text() == "ran"
    assert (tmp_path / "thread").exists() == (thread == "thread")

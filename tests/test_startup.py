"""What the command line imports before it has work to do.

Reading a config builds the stage graph, which imports every stage module;
a run in which everything is up to date needs only the config, the product
store and the provenance checks.  The heavy libraries (scipy, photutils,
matplotlib, numba, dask) must be imported by the stages that use them, when
they run, or every command pays seconds of start-up (measured in
``benchmarks/bench_night.py``).  Each check runs in a fresh interpreter, since
this test process has long imported everything.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest
from test_night_run import _night

from pipeline.cli import main

#: Libraries a command must not import before a stage runs (top-level names).
#: astropy.nddata imports scipy.sparse; distributed and reproject are heavy too.
HEAVY = (
    "astropy.nddata",
    "dask",
    "distributed",
    "matplotlib",
    "numba",
    "photutils",
    "reproject",
    "scipy",
)


#: What ``zdrift --help`` (the command line's own modules) must not import either:
#: astropy's coordinates, WCS and IERS code (~0.1 s of CPU; the stages that
#: compute with them import them).
NOT_AT_START = ("astropy.coordinates", "astropy.utils.iers", "astropy.wcs")


def _heavy_imported(code: str, heavy: tuple[str, ...] = HEAVY) -> list[str]:
    """The ``heavy`` modules in ``sys.modules`` after ``code`` runs in a fresh interpreter."""
    report = f"import json, sys\nprint(json.dumps([m for m in {heavy!r} if m in sys.modules]))"
    done = subprocess.run(
        [sys.executable, "-c", f"{code}\n{report}"],
        capture_output=True,
        text=True,
        check=False,
    )
    assert done.returncode == 0, done.stderr
    return json.loads(done.stdout.splitlines()[-1])


#: What reading a config, ``zdrift status`` and a run with everything up to
#: date do without: astropy's packages the stages compute with (~0.25 s of
#: CPU on a fast day, half a run with nothing to do; the block index is read
#: by the runner's own reader, :mod:`pipeline.runner._blockrows`).
ASTROPY_AT_WORK = (
    "astropy.coordinates",
    "astropy.io.fits",
    "astropy.stats",
    "astropy.table",
    "astropy.time",
    "astropy.units",
    "astropy.wcs",
)


def test_importing_the_command_line_loads_no_heavy_library():
    assert _heavy_imported("import pipeline.cli", HEAVY + NOT_AT_START) == []


def test_help_and_usage_errors_import_nothing_but_the_command_line():
    # zdrift --help, --version and a bad command line parse the arguments
    # only: not even numpy, astropy, pydantic or YAML (~0.4 s of CPU).
    light = ("astropy", "numpy", "pydantic", "yaml", "pipeline.config", "pipeline.runner")
    for args, status in ((["--help"], 0), (["--version"], 0), (["no-such-command"], 2)):
        code = f"from pipeline.cli import main\nassert main({args!r}) == {status}"
        assert _heavy_imported(code, light) == [], args


def test_the_command_lines_constants_are_the_runners():
    # the command line names them without importing the runner
    from pipeline import cli, runner

    assert runner.REPORT_PAGE[0] == cli.REPORT_STAGE
    assert runner.NIGHT_CONFIG_NAME == cli.NIGHT_CONFIG_NAME


def test_reading_a_config_loads_no_heavy_library():
    """Every stage's options, through the graph, from the template config."""
    template = Path(__file__).parents[1] / "configs" / "template.yaml"
    code = (
        "from pipeline.config import load_config\n"
        f"config = load_config({str(template)!r})\n"
        "names = [s.name for s in config.graph]\n"
        "assert len(names) > 5 and all(config.stage_options(n) is not None for n in names)"
    )
    assert _heavy_imported(code, HEAVY + ASTROPY_AT_WORK) == []


@pytest.fixture(scope="module")
def done_night(tmp_path_factory) -> Path:
    """A small simulated night run through the catalogue stage; returns its config."""
    path = _night(tmp_path_factory.mktemp("night"))
    # a 48-column chip holds too few reference stars for astrometry: stop before it
    assert main(["run", str(path), "--to", "catalog"]) == 0
    return path


def test_a_run_with_everything_up_to_date_loads_no_heavy_library(done_night):
    code = (
        "from pipeline.cli import main\n"
        f"assert main(['run', {str(done_night)!r}, '--to', 'catalog']) == 0"
    )
    assert _heavy_imported(code, HEAVY + ASTROPY_AT_WORK) == []
    # it was up to date (nothing ran, so nothing needed the libraries)
    assert main(["run", str(done_night), "--to", "catalog"]) == 0


def test_status_loads_no_heavy_library(done_night):
    # exit status EXIT_INCOMPLETE: the stages after the catalogue have not run
    code = (
        "from pipeline.cli import EXIT_INCOMPLETE, main\n"
        f"assert main(['status', {str(done_night)!r}]) == EXIT_INCOMPLETE"
    )
    assert _heavy_imported(code, HEAVY + ASTROPY_AT_WORK) == []


#: What the stages of a run from raw blocks to zero points do without: scipy.signal
#: and scipy.stats (0.2 s of CPU: pipeline.stages._signal and scipy.special do
#: their share), photutils.segmentation (with astropy.modeling and
#: astropy.convolution; the stage has its own Segmentation).
NOT_IN_A_RUN = ("astropy.modeling", "photutils.segmentation", "scipy.signal", "scipy.stats")


def test_a_run_and_the_stages_warm_up_leave_unused_libraries_alone(done_night):
    # The run does the work (serial executor, in this fresh interpreter): the
    # libraries its functions import on first use count; then every stage's
    # warm-up through zeropoint (astrometry and zeropoint do not run on this
    # small chip).
    code = (
        "from pipeline.cli import main\n"
        f"assert main(['run', {str(done_night)!r}, '--to', 'catalog', '--force']) == 0\n"
        "from pipeline.runner._warm import _load, warm_plan\n"
        "from pipeline.stages import GRAPH, STAGE_MODULES\n"
        "names = STAGE_MODULES[: STAGE_MODULES.index('zeropoint') + 1]\n"
        "stages = [stage for stage in GRAPH if stage.name in names]\n"
        "for _, entries in warm_plan(stages):\n"
        "    for entry in entries:\n"
        "        _load(entry)\n"
        "import sys\n"
        "assert 'photutils.aperture' in sys.modules and 'numba' in sys.modules  # they ran"
    )
    assert _heavy_imported(code, NOT_IN_A_RUN) == []

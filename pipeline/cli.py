"""The ``zdrift`` command line.

Thin by design: it parses arguments, loads the config, sets up logging and
progress display, and calls the library.  Every subcommand takes a config
file and ``--set dotted.key=value`` overrides.

Exit status (also in ``zdrift --help``): see :data:`EPILOG`.
``-v`` (more messages) goes before or after the subcommand.

Examples
--------
::

    zdrift config night.yaml                     # print the resolved config
    zdrift plan night.yaml                       # focal length, scale, line time, smear
    zdrift simulate night.yaml                   # write a synthetic night of raw blocks
    zdrift run night.yaml                        # the whole night
    zdrift run strip.yaml                        # a mosaic's nights, its tiles, its page
    zdrift run night.yaml --stage calibrate --stretches 0,3-5 --force
    zdrift run night.yaml --from calibrate --set stages.calibrate.cosmic_significance=5
    zdrift status night.yaml
    zdrift status night.yaml --verify            # also check every product's SHA-256
    zdrift report night.yaml                     # rebuild the night's HTML report page
    zdrift nightly site.yaml /data/raw           # every new or incomplete night, with reports
    zdrift mosaic strip.yaml                     # co-add the nights' science products
    zdrift mosaic strip.yaml --status            # which tiles are done, stale or failed
    zdrift mosaic strip.yaml --tiles 0-2 --force
"""

from __future__ import annotations

import argparse
import atexit
import contextlib
import os
import shutil
import sys
import threading
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any, NoReturn

import pipeline
from pipeline.exceptions import ConfigError, RunLockedError, RunStartError

if TYPE_CHECKING:
    from pipeline.config import Config

# The config, the runner and astropy (~0.4 s of CPU) are imported by the
# commands that use them, once the arguments are parsed: ``zdrift --help``,
# ``--version`` and a usage error need none of them.

__all__ = ["exit_now", "main", "run"]

EXIT_OK, EXIT_FAILED, EXIT_USAGE, EXIT_LOCKED, EXIT_CANNOT_START, EXIT_INCOMPLETE = range(6)
#: The reader of the output went away (a pipe into ``head``): 128 + SIGPIPE (13).
EXIT_PIPE = 141

#: The stage that makes the night's report page (``pipeline.runner.REPORT_PAGE[0]``).
REPORT_STAGE = "report"
#: A night folder's own config (``pipeline.runner.NIGHT_CONFIG_NAME``), for the help.
NIGHT_CONFIG_NAME = "night.yaml"

#: The example of ``--set`` in the help; a key that exists (a test loads it).
SET_EXAMPLE = "stages.calibrate.cosmic_significance=5"

#: The exit status of every command, as ``zdrift --help`` prints it.
EPILOG = f"""\
exit status:
  {EXIT_OK}  success (status: every product is done)
  {EXIT_FAILED}  run: a unit failed or was blocked, a stage reported a problem with its
     input, or a damaged product was found (and recomputed);
     nightly: a night reduced now failed or had such problems;
     status: a unit failed or is damaged, or a stage reported a problem
  {EXIT_USAGE}  bad command line or config
  {EXIT_LOCKED}  another run holds the night's lock
  {EXIT_CANNOT_START}  run: cannot start, the night's output folder cannot be written (a full
     disk, no permission); nothing was changed
  {EXIT_INCOMPLETE}  status: nothing failed, but some products are stale or missing
     (`zdrift run` brings them up to date)
  {EXIT_PIPE}  the output's reader left before the end (a pipe into `head`), as the
     shell says of a process a broken pipe ends; nothing more was printed
"""


def _stretch_list(text: str) -> frozenset[int]:
    from pipeline.runner import parse_stretches

    try:
        return parse_stretches(text)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="zdrift",
        description="Reduce drift-scan (TDI) nights from zenith-fixed telescopes.",
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--version", action="version", version=f"zdrift {pipeline.__version__}")
    verbose_help = "more messages (-vv: debug); before or after the command"
    parser.add_argument("-v", "--verbose", action="count", default=0, help=verbose_help)
    commands = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    def command(name: str, help_text: str, what: str = "night") -> argparse.ArgumentParser:
        sub = commands.add_parser(
            name,
            help=help_text,
            description=help_text,
            epilog=EPILOG,
            formatter_class=argparse.RawDescriptionHelpFormatter,
        )
        sub.add_argument("config", help=f"YAML config file of the {what}")
        sub.add_argument(
            "--set",
            dest="overrides",
            action="append",
            default=[],
            metavar="KEY=VALUE",
            help=f"override a config value, e.g. {SET_EXAMPLE} (repeatable)",
        )
        # Its own dest: a subparser's default would overwrite the count given
        # before the command; main() adds the two.
        sub.add_argument(
            "-v", "--verbose", dest="verbose_after", action="count", default=0, help=verbose_help
        )
        return sub

    run = command(
        "run",
        "run the night's stages, skipping up-to-date products; given a mosaic config "
        "(a 'mosaic' section), reduce each night it lists, then build its tiles and the "
        "page across the nights",
        what="night (or of a mosaic)",
    )
    which = run.add_mutually_exclusive_group()
    which.add_argument("--stage", help="run this stage only")
    which.add_argument("--from", dest="from_stage", metavar="STAGE", help="first stage to run")
    run.add_argument("--to", dest="to_stage", metavar="STAGE", help="last stage to run")
    run.add_argument(
        "--stretches",
        type=_stretch_list,
        metavar="LIST",
        help="stretch indices for per-stretch stages, e.g. 0,3-5 (default all)",
    )
    run.add_argument("--force", action="store_true", help="recompute even up-to-date products")
    run.add_argument(
        "--verify",
        action="store_true",
        help="first check every product against the SHA-256 its provenance records and "
        "recompute the damaged ones (reads every product)",
    )
    status = command("status", "show which products exist, which are stale and which failed")
    status.add_argument(
        "--verify",
        action="store_true",
        help="also check every product file against the SHA-256 its provenance records "
        "(reads every product); `zdrift run --verify` recomputes the damaged ones",
    )
    command("config", "print the fully resolved config as YAML")
    plan = command("plan", "print what the site and camera imply (scale, line time, smear)")
    plan.add_argument(
        "--spin-error",
        type=float,
        metavar="SECONDS",
        help="also report the focal-length and line-time errors (and the smear over the "
        "TDI rows) that this error in the mirror's spin period causes",
    )
    plan.add_argument(
        "--epoch",
        metavar="UTC",
        help="epoch for the exact model, ISO 8601 UTC (default: the simulate section's "
        "start if any, else 2026-01-01)",
    )
    report = command(
        "report",
        "rebuild the night's HTML report page from the products that exist (the run's "
        f"last stage, {REPORT_STAGE}, alone)",
    )
    report.add_argument(
        "--output", metavar="FILE", help="also copy the page there (it stays in the night folder)"
    )
    nightly = commands.add_parser(
        "nightly",
        help="reduce every new or incomplete night below a raw folder, each with its report",
        description="Reduce every night folder below RAW_ROOT that is new or incomplete, "
        "each to its report, and print one line per night.  A night's config is "
        f"RAW_ROOT/<night>/{NIGHT_CONFIG_NAME} if there is one, else SITE_FILE with the "
        "folder's name as night.name and the folder as night.raw_dir (SITE_FILE sets "
        "night.output_dir).  Exit status 1 if any night reduced now failed or had problems.",
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    nightly.add_argument("site_file", help="YAML file of the site, camera and stage options")
    nightly.add_argument("raw_root", help="folder holding one folder of raw files per night")
    nightly.add_argument(
        "--set",
        dest="overrides",
        action="append",
        default=[],
        metavar="KEY=VALUE",
        help="override a config value of every night (repeatable)",
    )
    nightly.add_argument(
        "-v", "--verbose", dest="verbose_after", action="count", default=0, help=verbose_help
    )
    simulate = command("simulate", "write a synthetic night of raw blocks (section 'simulate')")
    simulate.add_argument("--output", help="folder to write to (default: night.raw_dir)")
    mosaic = command(
        "mosaic",
        "co-add nights' calibrated products on tiles, skipping up-to-date tiles",
        what="mosaic",
    )
    mosaic.add_argument(
        "--status",
        action="store_true",
        help="only show which tiles are done, stale, missing or failed (exit status as "
        "for `zdrift status`)",
    )
    mosaic.add_argument(
        "--tiles",
        type=_stretch_list,
        metavar="LIST",
        help="tile indices to build, e.g. 0,3-5 (default all)",
    )
    mosaic.add_argument("--force", action="store_true", help="rebuild even up-to-date tiles")
    return parser


def _cmd_run(args: argparse.Namespace, config: Config) -> int:
    from pipeline.runner import LOG_NAME, night_dir, report_page, run_night
    from pipeline.runner._logging import TextProgress, cli_logging

    if args.stage is not None and args.to_stage is not None:
        print("zdrift run: --to cannot be combined with --stage", file=sys.stderr)
        return EXIT_USAGE
    stack = contextlib.ExitStack()
    try:  # the night's folder may be on a full or read-only disk
        stack.enter_context(cli_logging(args.verbose, night_dir(config) / LOG_NAME))
    except OSError as exc:
        print(f"zdrift run: cannot write the night's log: {exc}", file=sys.stderr)
        return EXIT_CANNOT_START
    with stack:
        try:
            report = run_night(
                config,
                stage=args.stage,
                from_stage=args.from_stage,
                to_stage=args.to_stage,
                stretches=args.stretches,
                force=args.force,
                progress=TextProgress(),
                verify=args.verify,
            )
        except RunLockedError as exc:
            print(f"zdrift run: {exc}", file=sys.stderr)
            return EXIT_LOCKED
        except RunStartError as exc:
            print(f"zdrift run: {exc}", file=sys.stderr)
            return EXIT_CANNOT_START
        except ValueError as exc:  # e.g. unknown stage name
            print(f"zdrift run: {exc}", file=sys.stderr)
            return EXIT_USAGE
    print(report.format())
    page = report_page(config)
    made = any(r.stage == REPORT_STAGE and r.status in ("ran", "skipped") for r in report.results)
    if made and page is not None:  # not an old page when the report was not part of this run
        print(f"report: {page}")
    if not report.ok:
        print(f"details: {night_dir(config) / LOG_NAME}", file=sys.stderr)
    return EXIT_OK if report.ok else EXIT_FAILED


def _is_mosaic_config(path: str) -> bool:
    """Whether the file has a top-level ``mosaic`` section (else it is a night's)."""
    import yaml

    try:
        data = yaml.safe_load(Path(path).read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, yaml.YAMLError):
        return False  # the night's loader reports what is wrong
    return isinstance(data, dict) and "mosaic" in data


def _cmd_run_nights(args: argparse.Namespace, config) -> int:
    """``zdrift run MOSAIC.yaml``: each listed night, the tiles, the page across the nights."""
    from pipeline.runner import (
        LOG_NAME,
        mosaic_dir,
        night_dir,
        report_page,
        run_nights_and_mosaic,
    )
    from pipeline.runner._logging import TextProgress, thread_log

    night_only = {
        "--stage": args.stage,
        "--from": args.from_stage,
        "--to": args.to_stage,
        "--stretches": args.stretches,
        "--verify": args.verify or None,
    }
    given = [name for name, value in night_only.items() if value is not None]
    if given:
        print(
            f"zdrift run: {', '.join(given)} apply to one night; run the night's own config "
            f"(one of {config.mosaic.nights[0]}, ...)",
            file=sys.stderr,
        )
        return EXIT_USAGE
    folder = mosaic_dir(config)

    def night_done(night: Config, report) -> None:
        page = report_page(night)
        where = f"report: {page}" if page is not None else "no report page"
        print(f"night {night.night.name}: {_night_line(report)}; {where}", flush=True)

    code, outcome = _in_mosaic_folder(
        "run",
        folder,
        args.verbose,
        lambda: run_nights_and_mosaic(
            config,
            force=args.force,
            progress=TextProgress(),
            on_night=night_done,
            night_log=lambda night: thread_log(night_dir(night) / LOG_NAME),
        ),
    )
    if code is not None:
        return code
    print(f"mosaic {config.mosaic.name}: {_night_line(outcome.mosaic)}; tiles: {folder / 'tiles'}")
    if outcome.page is not None:
        print(f"across the nights: {outcome.page}")
    if not outcome.ok:
        print(f"details: {folder / LOG_NAME} and each night's {LOG_NAME}", file=sys.stderr)
    return EXIT_OK if outcome.ok else EXIT_FAILED


def _night_line(report) -> str:
    """Units ran, skipped, failed and blocked, and problems, of one run report."""
    n_problems = sum(len(r.problems) for r in report.results)
    return (
        f"{report.count('ran')} ran, {report.count('skipped')} up to date, "
        f"{report.count('failed')} failed, {report.count('blocked')} blocked, "
        f"{n_problems} problem(s)"
    )


def _cmd_status(args: argparse.Namespace, config: Config) -> int:
    from pipeline.runner import night_status
    from pipeline.runner._logging import cli_logging

    with cli_logging(args.verbose):
        status = night_status(config, verify=args.verify)
    print(status.format())
    if status.has_problems:
        return EXIT_FAILED
    return EXIT_OK if status.complete else EXIT_INCOMPLETE


def _cmd_config(args: argparse.Namespace, config: Config) -> int:
    print(config.to_yaml(), end="")
    return EXIT_OK


def _cmd_plan(args: argparse.Namespace, config: Config) -> int:
    from astropy.time import Time

    from pipeline.geometry.plan import format_plan, summarize_plan
    from pipeline.runner._logging import cli_logging

    epoch = args.epoch
    simulate = config.section("simulate")
    if epoch is None and simulate is not None:
        epoch = simulate.start
    try:
        start = None if epoch is None else Time(epoch, scale="utc")
    except ValueError as exc:
        print(f"zdrift plan: --epoch {epoch!r} is not an ISO 8601 time: {exc}", file=sys.stderr)
        return EXIT_USAGE
    with cli_logging(args.verbose):
        summary = summarize_plan(
            config.site(), config.camera(), spin_period_error_s=args.spin_error, start=start
        )
        print(format_plan(summary))
    return EXIT_OK


def _cmd_report(args: argparse.Namespace, config: Config) -> int:
    from pipeline.runner import LOG_NAME, night_dir, report_page, run_night
    from pipeline.runner._logging import cli_logging

    if REPORT_STAGE not in {stage.name for stage in config.graph}:
        print(f"zdrift report: the pipeline has no {REPORT_STAGE} stage", file=sys.stderr)
        return EXIT_USAGE
    try:
        with cli_logging(args.verbose, night_dir(config) / LOG_NAME):
            run = run_night(config, stage=REPORT_STAGE)
    except RunLockedError as exc:
        print(f"zdrift report: {exc}", file=sys.stderr)
        return EXIT_LOCKED
    except (OSError, RunStartError) as exc:
        print(f"zdrift report: {exc}", file=sys.stderr)
        return EXIT_CANNOT_START
    page = report_page(config)
    if page is None:
        print(run.format())
        print(f"zdrift report: no page made; see {night_dir(config) / LOG_NAME}", file=sys.stderr)
        return EXIT_FAILED
    if args.output:
        out = Path(args.output)
        try:
            out.parent.mkdir(parents=True, exist_ok=True)
            shutil.copyfile(page, out)
        except OSError as exc:
            print(f"zdrift report: cannot write {out}: {exc}", file=sys.stderr)
            return EXIT_FAILED
        page = out
    print(f"report: {page}")
    return EXIT_OK


def _cmd_nightly(args: argparse.Namespace) -> int:
    from pipeline.config import Config
    from pipeline.runner import LOG_NAME, NightOutcome, find_nights, night_dir, reduce_night
    from pipeline.runner._logging import cli_logging

    try:
        nights = list(find_nights(args.site_file, args.raw_root, args.overrides))
    except ValueError as exc:
        print(f"zdrift nightly: {exc}", file=sys.stderr)
        return EXIT_USAGE
    if not nights:
        print(f"zdrift nightly: no night folder in {args.raw_root}", file=sys.stderr)
    failed = 0
    for _, night in nights:
        if isinstance(night, Config):
            try:
                with cli_logging(args.verbose, night_dir(night) / LOG_NAME):
                    outcome = reduce_night(night)
            except OSError as exc:  # the night's log cannot be written
                outcome = NightOutcome(night.night.name, "failed", f"cannot write its log: {exc}")
        else:
            outcome = night
        failed += outcome.failed
        print(outcome.line(), flush=True)
    return EXIT_FAILED if failed else EXIT_OK


def _cmd_simulate(args: argparse.Namespace, config: Config) -> int:
    from pipeline.runner._logging import cli_logging
    from pipeline.simulate import simulate_to_folders

    options = config.section("simulate")
    if options is None:
        print("zdrift simulate: the config has no 'simulate' section", file=sys.stderr)
        return EXIT_USAGE
    out = Path(args.output) if args.output else Path(config.night.raw_dir)
    with cli_logging(args.verbose):
        try:
            written = simulate_to_folders(config.site(), config.camera(), options, out)
        except ConfigError as exc:  # options that only the night's geometry shows wrong
            print(f"zdrift simulate: {exc}", file=sys.stderr)
            return EXIT_USAGE
    for _, folder, paths in written:
        print(f"wrote {len(paths)} files to {folder}")
    return EXIT_OK


def _in_mosaic_folder(command: str, folder: Path, verbose: int, call: Callable[[], Any]):
    """``call()`` with its log in the mosaic's folder: ``(exit status or None, result)``.

    The status is None when ``call`` returned; else it says why it could not
    run (the message is printed).
    """
    from pipeline.runner import LOG_NAME
    from pipeline.runner._logging import cli_logging

    stack = contextlib.ExitStack()
    try:
        folder.mkdir(parents=True, exist_ok=True)
        stack.enter_context(cli_logging(verbose, folder / LOG_NAME))
    except OSError as exc:
        print(f"zdrift {command}: cannot write the mosaic's log: {exc}", file=sys.stderr)
        return EXIT_CANNOT_START, None
    with stack:
        try:
            return None, call()
        except RunLockedError as exc:
            print(f"zdrift {command}: {exc}", file=sys.stderr)
            return EXIT_LOCKED, None
        except RunStartError as exc:
            print(f"zdrift {command}: {exc}", file=sys.stderr)
            return EXIT_CANNOT_START, None
        except (ConfigError, ValueError) as exc:  # a night's config, a night twice
            print(f"zdrift {command}: {exc}", file=sys.stderr)
            return EXIT_USAGE, None


def _cmd_mosaic(args: argparse.Namespace, config) -> int:
    from pipeline.runner import LOG_NAME, mosaic_dir, mosaic_status, run_mosaic
    from pipeline.runner._logging import TextProgress, cli_logging

    if args.status:
        if args.tiles is not None or args.force:
            print(
                "zdrift mosaic: --status cannot be combined with --tiles or --force",
                file=sys.stderr,
            )
            return EXIT_USAGE
        with cli_logging(args.verbose):
            try:
                status = mosaic_status(config)
            except (ConfigError, ValueError) as exc:  # a night's config, a night twice
                print(f"zdrift mosaic: {exc}", file=sys.stderr)
                return EXIT_USAGE
        print(status.format())
        if status.has_problems:
            return EXIT_FAILED
        return EXIT_OK if status.complete else EXIT_INCOMPLETE
    folder = mosaic_dir(config)
    code, report = _in_mosaic_folder(
        "mosaic",
        folder,
        args.verbose,
        lambda: run_mosaic(config, tiles=args.tiles, force=args.force, progress=TextProgress()),
    )
    if code is not None:
        return code
    print(report.format())
    if any(r.status in ("ran", "skipped") for r in report.results):
        print(f"tiles: {folder / 'tiles'}")
    if not report.ok:
        print(f"details: {folder / LOG_NAME}", file=sys.stderr)
    return EXIT_OK if report.ok else EXIT_FAILED


_COMMANDS: dict[str, Callable[[argparse.Namespace, Config], int]] = {
    "run": _cmd_run,
    "status": _cmd_status,
    "config": _cmd_config,
    "plan": _cmd_plan,
    "simulate": _cmd_simulate,
    "report": _cmd_report,
    "mosaic": _cmd_mosaic,
}


def main(args: Sequence[str] | None = None) -> int:
    """Run the ``zdrift`` command line; return the exit status.

    Parameters
    ----------
    args : sequence of str, optional
        Arguments without the program name; default ``sys.argv[1:]``.
    """
    parser = _parser()
    try:
        options = parser.parse_args(args)
    except SystemExit as exc:  # --help, --version, usage errors
        return int(exc.code or 0)
    from pipeline._offline import astropy_offline

    with astropy_offline():  # for this command only: astropy never downloads
        return _main(options)


def run() -> NoReturn:
    """The ``zdrift`` command: :func:`main` on ``sys.argv``, then :func:`exit_now`."""
    try:
        code = main()
    except BrokenPipeError:
        code = _reader_gone()
    exit_now(code)


def _reader_gone() -> int:
    """End quietly when the output's reader left (``zdrift status night.yaml | head``).

    Standard output is pointed at the null device so that the final flush
    does not fail again (the advice of Python's ``signal`` documentation,
    "Note on SIGPIPE"); the status is the shell's for a process a broken
    pipe ended, 128 + SIGPIPE.
    """
    with contextlib.suppress(OSError):
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
    return EXIT_PIPE


def exit_now(code: int) -> NoReturn:
    """End the process with ``code``, skipping the interpreter's teardown of its modules.

    A finished command has nothing left for the teardown to do, which takes
    about 0.2 s of CPU with the libraries a run loads (astropy, numpy,
    scipy).  What an exit does otherwise still happens: the exit handlers run
    (logging's flush and close, multiprocessing's clean-up) and the standard
    streams are flushed.  While a thread other than a daemon is alive (the
    interpreter would wait for it), this is an ordinary ``sys.exit``.
    """
    if any(
        t.is_alive() and not t.daemon
        for t in threading.enumerate()
        if t is not threading.main_thread()
    ):
        sys.exit(code)
    atexit._run_exitfuncs()
    for stream in (sys.stdout, sys.stderr):
        with contextlib.suppress(Exception):  # closed, or a broken pipe
            stream.flush()
    os._exit(code)


def _main(options: argparse.Namespace) -> int:
    from pipeline.config import load_config

    options.verbose += options.verbose_after
    if options.command == "nightly":
        return _cmd_nightly(options)
    load = load_config
    command = _COMMANDS[options.command]
    if options.command == "mosaic" or (
        options.command == "run" and _is_mosaic_config(options.config)
    ):
        from pipeline.mosaic import load_mosaic_config as load

        command = _cmd_mosaic if options.command == "mosaic" else _cmd_run_nights
    try:
        config = load(options.config, options.overrides)
    except ConfigError as exc:
        print(f"zdrift {options.command}: {exc}", file=sys.stderr)
        return EXIT_USAGE
    return command(options, config)

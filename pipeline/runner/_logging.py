"""Log handlers and progress display for the command line.

Library code only calls ``logging.getLogger(__name__)``; the command line
attaches handlers here, for the duration of one command: a console handler on
stderr (WARNING, or INFO/DEBUG with ``-v``/``-vv``) and, for a run, the
night's log file (DEBUG, so failed units' tracebacks land in it).  Warnings
are routed into the log while a command runs.
"""

from __future__ import annotations

import contextlib
import logging
import sys
import threading
from collections.abc import Iterator
from pathlib import Path
from typing import TextIO

__all__ = ["TextProgress", "cli_logging", "thread_log"]

_LOGGERS = ("pipeline", "py.warnings")
_FILE_FORMAT = "%(asctime)s %(levelname)-7s %(name)s: %(message)s"


@contextlib.contextmanager
def cli_logging(verbosity: int = 0, log_file: Path | None = None) -> Iterator[None]:
    """Attach console (and file) handlers to the pipeline's loggers, then remove them.

    Parameters
    ----------
    verbosity : int
        0: warnings and errors on stderr; 1: also INFO; 2 or more: DEBUG.
    log_file : pathlib.Path, optional
        File to append every record (DEBUG and up) to; its folder is created.
    """
    console = logging.StreamHandler(sys.stderr)
    console.setLevel({0: logging.WARNING, 1: logging.INFO}.get(verbosity, logging.DEBUG))
    console.setFormatter(logging.Formatter("%(levelname)s: %(message)s"))
    handlers: list[logging.Handler] = [console]
    if log_file is not None:
        log_file.parent.mkdir(parents=True, exist_ok=True)
        file_handler = logging.FileHandler(log_file, encoding="utf-8")
        file_handler.setLevel(logging.DEBUG)
        file_handler.setFormatter(logging.Formatter(_FILE_FORMAT))
        handlers.append(file_handler)
    loggers = [logging.getLogger(name) for name in _LOGGERS]
    old_levels = [logger.level for logger in loggers]
    for logger in loggers:
        logger.setLevel(logging.DEBUG)
        for handler in handlers:
            logger.addHandler(handler)
    logging.captureWarnings(True)
    try:
        yield
    finally:
        logging.captureWarnings(False)
        for logger, level in zip(loggers, old_levels, strict=True):
            logger.setLevel(level)
            for handler in handlers:
                logger.removeHandler(handler)
        for handler in handlers:
            handler.close()


class TextProgress:
    """A progress callback that prints ``label: done/total`` on a stream.

    On a terminal the line is rewritten in place; otherwise one line is
    printed when a label's work is complete.
    """

    def __init__(self, stream: TextIO | None = None):
        self.stream = stream if stream is not None else sys.stderr

    def __call__(self, label: str, done: int, total: int) -> None:
        if total == 0:
            return
        text = f"{label}: {done}/{total} units"
        if self.stream.isatty():
            end = "\n" if done == total else ""
            self.stream.write(f"\r{text}{end}")
        elif done == total:
            self.stream.write(text + "\n")
        self.stream.flush()


@contextlib.contextmanager
def thread_log(log_file: Path) -> Iterator[None]:
    """Also append the records this thread logs (DEBUG and up) to ``log_file``.

    For runs of several nights at once, one per thread: each night's records
    go to its own log as well as to the handlers of :func:`cli_logging`.
    """
    log_file.parent.mkdir(parents=True, exist_ok=True)
    handler = logging.FileHandler(log_file, encoding="utf-8")
    handler.setLevel(logging.DEBUG)
    handler.setFormatter(logging.Formatter(_FILE_FORMAT))
    thread = threading.get_ident()
    handler.addFilter(lambda record: record.thread == thread)
    loggers = [logging.getLogger(name) for name in _LOGGERS]
    for logger in loggers:
        logger.addHandler(handler)
    try:
        yield
    finally:
        for logger in loggers:
            logger.removeHandler(handler)
        handler.close()

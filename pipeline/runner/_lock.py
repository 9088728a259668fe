"""A lock file that keeps two runs from writing the same night at once.

The lock is a small JSON file (pid, host, start time, command) created with
``O_CREAT | O_EXCL``, which is atomic on local file systems and on NFSv3+.
A lock left by a process that no longer exists on this host is stale: it is
taken over with a :class:`~pipeline.exceptions.StaleLockWarning`.  A lock
held from another host cannot be checked and is respected; the error message
says how to remove it by hand.
"""

from __future__ import annotations

import contextlib
import datetime
import json
import os
import socket
import sys
import warnings
from pathlib import Path
from typing import Any

from pipeline.exceptions import RunLockedError, StaleLockWarning

__all__ = ["RunLock"]


def _pid_alive(pid: int) -> bool:
    if os.name == "nt":  # os.kill would terminate the process there; assume alive
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # exists, owned by someone else
        return True
    return True


class RunLock:
    """Context manager holding ``path`` as a run lock.

    Parameters
    ----------
    path : pathlib.Path
        The lock file; its folder is created if needed.

    Raises
    ------
    RunLockedError
        On entry, if a live run holds the lock.
    """

    def __init__(self, path: Path):
        self.path = Path(path)
        self.record = {
            "pid": os.getpid(),
            "host": socket.gethostname(),
            "started": datetime.datetime.now(datetime.UTC).isoformat(timespec="seconds"),
            "command": " ".join(sys.argv),
        }

    def __enter__(self) -> RunLock:
        self.path.parent.mkdir(parents=True, exist_ok=True)
        for _ in range(3):  # a concurrent take-over can make one attempt lose a race
            if self._try_create():
                return self
            holder = self._read()
            if holder is None:
                continue  # vanished or half-written; look again
            if not self._is_stale(holder):
                raise RunLockedError(self._locked_message(holder))
            self._take_over(holder)
        raise RunLockedError(f"Could not acquire the run lock {self.path}; try again.")

    def __exit__(self, *exc_info: object) -> None:
        if self._read() == self.record:
            with contextlib.suppress(FileNotFoundError):
                self.path.unlink()

    def _try_create(self) -> bool:
        try:
            fd = os.open(self.path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
        except FileExistsError:
            return False
        with os.fdopen(fd, "w", encoding="utf-8") as stream:
            json.dump(self.record, stream)
        return True

    def _read(self) -> dict[str, Any] | None:
        try:
            return json.loads(self.path.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            return None

    def _is_stale(self, holder: dict[str, Any]) -> bool:
        if holder.get("host") != self.record["host"]:
            return False
        pid = holder.get("pid")
        return not isinstance(pid, int) or not _pid_alive(pid)

    def _take_over(self, holder: dict[str, Any]) -> None:
        # Move the stale lock aside under a unique name; only one contender's
        # rename succeeds.  If what we moved is no longer the stale lock we
        # judged (someone took it over first), put it back.
        aside = self.path.with_name(f"{self.path.name}.stale-{os.getpid()}")
        try:
            os.rename(self.path, aside)
        except FileNotFoundError:
            return
        try:
            moved = json.loads(aside.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            moved = None
        if moved != holder:
            os.rename(aside, self.path)
            return
        aside.unlink()
        message = (
            f"Taking over the stale run lock {self.path}: process {holder.get('pid')} on "
            f"{holder.get('host')} (started {holder.get('started')}) no longer exists."
        )
        warnings.warn(message, StaleLockWarning, stacklevel=3)

    def _locked_message(self, holder: dict[str, Any]) -> str:
        return (
            f"Another run holds the lock {self.path}: process {holder.get('pid')} on "
            f"{holder.get('host')}, started {holder.get('started')} "
            f"({holder.get('command', '?')}). Wait for it to finish; if you are sure it is "
            "dead (e.g. its host crashed), delete the lock file and run again."
        )

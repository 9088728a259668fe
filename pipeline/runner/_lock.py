"""A lock file that keeps two runs from writing the same night at once.

The lock is a small JSON object (pid, host, start time, command and a random
token) written to a temporary file and linked to its final name with
``os.link``, which fails if the name exists: atomic on local file systems
and on NFSv3+, and the lock never exists without its content (where hard
links are not supported, ``O_CREAT | O_EXCL`` is used instead).

* A lock left by a process that no longer exists on this host is stale: it
  is taken over with a :class:`~pipeline.exceptions.StaleLockWarning`.
* A lock that is empty, not JSON or not an object (left by a crash or a full
  disk) is broken: it is taken over with the same warning once it is older
  than :data:`BROKEN_LOCK_AGE` seconds (younger, it may still be being
  written by another version of the tool).
* A lock held from another host cannot be checked and is respected; the
  error message says how to remove it by hand.
* When the lock cannot be written at all (a full disk, no permission), the
  run stops with :class:`~pipeline.exceptions.RunStartError` and leaves no
  lock behind.

Workers check :func:`check_lock_held` before they commit a product, so
nothing is written once the run that started them has lost its lock.
"""

from __future__ import annotations

import contextlib
import datetime
import errno
import json
import os
import socket
import sys
import time
import uuid
import warnings
from pathlib import Path
from typing import Any

from pipeline.exceptions import RunLockedError, RunStartError, StaleLockWarning

__all__ = ["BROKEN_LOCK_AGE", "RunLock", "check_lock_held", "pid_alive", "read_lock"]

#: Age in seconds after which an unreadable lock file is taken over.
BROKEN_LOCK_AGE = 5.0
_BROKEN = "broken"  # marker: the lock file exists but holds no lock record


def pid_alive(pid: int) -> bool:
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
            "token": uuid.uuid4().hex,
        }

    @property
    def token(self) -> str:
        """The random token that identifies this run's lock (see :func:`check_lock_held`)."""
        return self.record["token"]

    def __enter__(self) -> RunLock:
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            for _ in range(100):  # a concurrent take-over can make one attempt lose a race
                if self._try_create():
                    return self
                holder = read_lock(self.path)
                if holder is None:
                    continue  # vanished; look again
                if holder == _BROKEN:
                    if self._age() < BROKEN_LOCK_AGE:
                        time.sleep(0.25)
                        continue
                elif not self._is_stale(holder):
                    raise RunLockedError(self._locked_message(holder))
                self._take_over(holder)
        except OSError as exc:
            raise RunStartError(_start_message(self.path, exc)) from None
        raise RunLockedError(
            f"Could not acquire the run lock {self.path}: other runs keep replacing it. "
            "Check that no other zdrift run works on this night, then run again."
        )

    def __exit__(self, *exc_info: object) -> None:
        if read_lock(self.path) == self.record:
            with contextlib.suppress(FileNotFoundError):
                self.path.unlink()

    def _try_create(self) -> bool:
        text = json.dumps(self.record).encode()
        temp = self.path.with_name(f".{self.path.name}.{self.token}")
        try:
            fd = os.open(temp, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
            try:
                _write_all(fd, text)
            finally:
                os.close(fd)
            try:
                os.link(temp, self.path)
            except FileExistsError:
                return False
            except OSError as exc:  # no hard links here (some network or FAT file systems)
                if exc.errno not in (errno.EPERM, errno.ENOTSUP, errno.EOPNOTSUPP, errno.EXDEV):
                    raise
                return self._try_create_exclusive(text)
            return True
        finally:
            with contextlib.suppress(FileNotFoundError):
                temp.unlink()

    def _try_create_exclusive(self, text: bytes) -> bool:
        try:
            fd = os.open(self.path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
        except FileExistsError:
            return False
        try:
            _write_all(fd, text)
        except OSError:
            os.close(fd)
            self.path.unlink()  # never leave an empty lock behind
            raise
        os.close(fd)
        return True

    def _age(self) -> float:
        try:
            return time.time() - self.path.stat().st_mtime
        except OSError:
            return 0.0

    def _is_stale(self, holder: dict[str, Any]) -> bool:
        if holder.get("host") != self.record["host"]:
            return False
        pid = holder.get("pid")
        return not isinstance(pid, int) or not pid_alive(pid)

    def _take_over(self, holder: dict[str, Any] | str) -> None:
        # Move the stale lock aside under a unique name; only one contender's
        # rename succeeds.  If what we moved is no longer the stale lock we
        # judged (someone took it over first), put it back.
        aside = self.path.with_name(f"{self.path.name}.stale-{os.getpid()}-{self.token[:8]}")
        try:
            os.rename(self.path, aside)
        except FileNotFoundError:
            return
        if read_lock(aside) != holder:
            os.rename(aside, self.path)
            return
        aside.unlink()
        if holder == _BROKEN:
            message = (
                f"Taking over the broken run lock {self.path}: it held no lock record "
                "(empty or not a JSON object, e.g. left by a crash or a full disk)."
            )
        else:
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


def _write_all(fd: int, data: bytes) -> None:
    view = memoryview(data)
    while view:
        view = view[os.write(fd, view) :]
    os.fsync(fd)


def _start_message(path: Path, exc: OSError) -> str:
    what = exc.strerror or str(exc)
    code = errno.errorcode.get(exc.errno, "") if exc.errno else ""
    hint = {
        errno.ENOSPC: "free space on that disk (or point night.output_dir elsewhere)",
        errno.EDQUOT: "free space within your quota (or point night.output_dir elsewhere)",
        errno.EACCES: "make the folder writable (or point night.output_dir elsewhere)",
        errno.EROFS: "point night.output_dir at a writable disk",
    }.get(exc.errno, "check the folder (or point night.output_dir elsewhere)")
    return (
        f"cannot write the run lock {path}: {what}{f' ({code})' if code else ''}; "
        f"{hint}, then run again."
    )


def read_lock(path: Path) -> dict[str, Any] | str | None:
    """The lock record at ``path``; ``'broken'`` if the file holds none; None if absent."""
    try:
        text = Path(path).read_text(encoding="utf-8")
    except FileNotFoundError:
        return None
    except (OSError, ValueError):
        return _BROKEN
    try:
        record = json.loads(text)
    except ValueError:
        return _BROKEN
    return record if isinstance(record, dict) else _BROKEN


def check_lock_held(path: Path, token: str) -> None:
    """Raise :class:`RunLockedError` unless the lock at ``path`` still holds ``token``.

    A worker calls this before it removes or commits a unit's products: once
    the run that started it is gone (its lock removed or taken over), it
    writes nothing more.  A run killed outright leaves its lock behind, so on
    the run's own host the run's process must also still be alive.
    """
    holder = read_lock(path)
    if not (isinstance(holder, dict) and holder.get("token") == token):
        raise RunLockedError(
            f"the run that started this worker no longer holds the lock {path}; "
            "nothing written (the next run redoes this unit)"
        )
    pid = holder.get("pid")
    if holder.get("host") == socket.gethostname() and isinstance(pid, int) and not pid_alive(pid):
        raise RunLockedError(
            f"the run that started this worker (pid {pid}) has ended; "
            "nothing written (the next run redoes this unit)"
        )

"""One charflow run per output folder: a lock file held for the whole of a command.

The lock is ``flock(2)`` on ``.charflow-lock`` in the folder, taken without waiting. The
kernel drops it when its holder's file is closed, so a killed run leaves no lock behind,
only a file whose stale content the next holder overwrites. The file is never deleted:
unlinking a lock file while another process waits on it would let two holders in (each
holding a lock on a different file of the same name).

The file records its holder (process, host, command line, start time) so that a refused
run can say who holds the folder. Use ``FolderLock`` as a context manager.

Worker and simulator processes do not hold it: Python opens the file non-inheritable
(PEP 446), so a program started through exec has no copy; a worker forked from the driver
(``pool``) closes its copy as it starts (``forget_inherited``), and the release unlocks before
it closes, so a copy no one has closed yet cannot hold the folder either.
"""

from __future__ import annotations

import contextlib
import dataclasses
import datetime
import fcntl
import json
import os
import shlex
import socket
import sys
from dataclasses import dataclass
from pathlib import Path

from charflow.records.errors import OutputError

LOCK_NAME = ".charflow-lock"
_HELD: set[int] = set()  # descriptors of the locks this process holds


@dataclass(frozen=True, slots=True)
class Holder:
    """The process that holds an output folder, as its lock file records it."""

    pid: int
    host: str
    command: str
    started: str  # local time, ISO 8601

    @classmethod
    def me(cls) -> Holder:
        now = datetime.datetime.now().astimezone().isoformat(timespec="seconds")
        return cls(os.getpid(), socket.gethostname(), shlex.join(sys.argv), now)

    def describe(self) -> str:
        return f"process {self.pid} on {self.host}, started {self.started}: {self.command}"


def read_holder(folder: str | Path) -> Holder | None:
    """The holder a folder's lock file names; None when it names none (free, or being
    written this instant)."""
    try:
        data = json.loads((Path(folder) / LOCK_NAME).read_text(encoding="utf-8"))
        return Holder(int(data["pid"]), str(data["host"]), str(data["command"]), data["started"])
    except (OSError, ValueError, KeyError, TypeError):
        return None


def forget_inherited() -> None:
    """In a process forked from a holder: close the copies of its lock descriptors, without
    unlocking (the lock is the holder's)."""
    for fd in _HELD:
        with contextlib.suppress(OSError):
            os.close(fd)
    _HELD.clear()


class FolderLock:
    """Hold ``folder`` for this process, or raise OutputError naming who holds it."""

    def __init__(self, folder: str | Path) -> None:
        self.folder = Path(folder)
        self.path = self.folder / LOCK_NAME
        self._fd: int | None = None

    def acquire(self) -> None:
        try:
            # Opened, not truncated: the holder's record stays readable until the lock is ours.
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
        except OSError as exc:
            raise OutputError(
                f"cannot make the lock file {LOCK_NAME} in the output folder: {exc.strerror}",
                file=self.folder,
            ) from exc
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            os.close(fd)
            holder = read_holder(self.folder)
            who = holder.describe() if holder else "another charflow run, starting or ending"
            raise OutputError(
                f"the output folder is in use by {who}; wait for it to end or use another "
                "output folder (nothing was written)",
                file=self.folder,
            ) from None
        except OSError as exc:
            os.close(fd)
            raise OutputError(
                f"cannot lock the output folder: {exc.strerror}", file=self.folder
            ) from exc
        try:
            record = json.dumps(dataclasses.asdict(Holder.me()))
            os.ftruncate(fd, 0)
            os.pwrite(fd, (record + "\n").encode(), 0)
        except OSError as exc:
            os.close(fd)
            raise OutputError(
                f"cannot write the lock file {LOCK_NAME}: {exc.strerror}", file=self.folder
            ) from exc
        self._fd = fd
        _HELD.add(fd)

    def release(self) -> None:
        if self._fd is None:
            return
        fd, self._fd = self._fd, None
        _HELD.discard(fd)
        # An empty lock file names no holder. Unlocked before the close: a forked process's
        # copy of the descriptor would keep the lock after the close alone.
        with contextlib.suppress(OSError):
            os.ftruncate(fd, 0)
        with contextlib.suppress(OSError):
            fcntl.flock(fd, fcntl.LOCK_UN)
        os.close(fd)

    def __enter__(self) -> FolderLock:
        self.acquire()
        return self

    def __exit__(self, *exc: object) -> None:
        self.release()

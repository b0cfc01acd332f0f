"""A non-blocking run lock on a separate lock file.

Uses ``fcntl.flock``: the operating system releases the lock when the holding
process ends, even on SIGKILL, so a crashed run never leaves a stale lock. The
holder writes its process id and start time into the file so a second run can
say who holds it.
"""

from __future__ import annotations

import datetime as dt
import fcntl
import json
import os
from pathlib import Path

from wearcast.exceptions import LockHeldError, OutputError


class RunLock:
    """Context manager: ``with RunLock(path): ...``; raises :class:`LockHeldError`."""

    def __init__(self, path: str | os.PathLike):
        self.path = Path(path)
        self._fd: int | None = None

    def acquire(self) -> "RunLock":
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
        except OSError as exc:
            raise OutputError(f"cannot create lock file {self.path}: {exc.strerror}.") from exc
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            holder = _read_holder(fd)
            os.close(fd)
            raise LockHeldError(
                f"another wearcast run holds {self.path} (process {holder.get('pid', '?')}, "
                f"started {holder.get('started', '?')}). Wait for it to finish; the lock is "
                "released automatically when that process ends."
            ) from None
        info = {"pid": os.getpid(), "started": dt.datetime.now().astimezone().isoformat(timespec="seconds")}
        os.ftruncate(fd, 0)
        os.pwrite(fd, (json.dumps(info) + "\n").encode(), 0)
        os.fsync(fd)
        self._fd = fd
        return self

    def release(self) -> None:
        if self._fd is not None:
            try:
                os.ftruncate(self._fd, 0)
                fcntl.flock(self._fd, fcntl.LOCK_UN)
            finally:
                os.close(self._fd)
                self._fd = None

    def __enter__(self) -> "RunLock":
        return self.acquire()

    def __exit__(self, *exc) -> None:
        self.release()


def _read_holder(fd: int) -> dict:
    try:
        raw = os.pread(fd, 4096, 0).decode("utf-8", "replace").strip()
        return json.loads(raw) if raw else {}
    except (OSError, ValueError):
        return {}

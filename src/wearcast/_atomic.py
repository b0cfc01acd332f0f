"""Atomic file writes: temp file in the same folder, fsync, then replace.

A reader never sees a half-written output, and a crash leaves the previous
file intact. Files get the permissions a plain ``open(path, "w")`` would give
(``0o666`` less the process umask), so a shared run folder stays readable:
the private temporary file is widened before it replaces the output. Temporary files carry the suffix ``.wearcast-tmp`` so a later run
can find and remove stale ones (:func:`remove_stale_temporaries`).
"""

from __future__ import annotations

import json
import os
import tempfile
import threading
from pathlib import Path
from typing import Any

from wearcast.exceptions import OutputError

TMP_SUFFIX = ".wearcast-tmp"
_umask_lock = threading.Lock()


def _file_mode() -> int:
    """``0o666`` less the process umask (read by setting and restoring it)."""
    with _umask_lock:
        mask = os.umask(0o022)
        os.umask(mask)
    return 0o666 & ~mask


def _fsync_dir(folder: Path) -> None:
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:  # pragma: no cover - platforms without directory fds
        return
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def write_bytes(path: str | os.PathLike, data: bytes) -> Path:
    """Write ``data`` to ``path`` atomically; returns the final path."""
    path = Path(path)
    folder = path.parent
    if not folder.exists():
        try:
            folder.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise OutputError(
                f"cannot create output folder {folder}: {exc.strerror}. "
                "Choose a folder you can write to."
            ) from exc
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=TMP_SUFFIX, dir=folder)
    except OSError as exc:
        raise OutputError(
            f"cannot write in {folder}: {exc.strerror}. Check the folder's permissions "
            "or choose another output folder."
        ) from exc
    try:
        with os.fdopen(fd, "wb") as handle:
            os.fchmod(handle.fileno(), _file_mode())  # mkstemp makes the file 0o600
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(tmp, path)
    except OSError as exc:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise OutputError(f"cannot write {path}: {exc.strerror}.") from exc
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise
    _fsync_dir(folder)
    return path


def write_text(path: str | os.PathLike, text: str) -> Path:
    """Write UTF-8 text atomically (Unix newlines)."""
    return write_bytes(path, text.encode("utf-8"))


def write_json(path: str | os.PathLike, obj: Any) -> Path:
    """Write JSON atomically with sorted keys so reruns are byte-identical."""
    return write_text(path, json.dumps(obj, indent=2, sort_keys=True, default=_json_default) + "\n")


def write_csv(path: str | os.PathLike, frame) -> Path:
    """Write a pandas DataFrame as CSV atomically (no index, ``%.6g`` floats)."""
    return write_text(path, frame.to_csv(index=False, float_format="%.6g", lineterminator="\n"))


def remove_output(path: str | os.PathLike) -> bool:
    """Delete an optional output a rerun did not write (so a run folder never mixes runs).

    Returns True when a file was removed.
    """
    path = Path(path)
    if not path.is_file():
        return False
    path.unlink()
    _fsync_dir(path.parent)
    return True


def remove_stale_temporaries(folder: str | os.PathLike) -> list[Path]:
    """Delete temp files a killed run left in ``folder`` (recursively)."""
    removed = []
    folder = Path(folder)
    if not folder.exists():
        return removed
    for tmp in folder.rglob(f"*{TMP_SUFFIX}"):
        try:
            tmp.unlink()
            removed.append(tmp)
        except OSError:
            pass
    return removed


def _json_default(obj: Any):
    import numpy as np

    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.floating):
        return None if not np.isfinite(obj) else float(obj)
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, Path):
        return str(obj)
    if hasattr(obj, "isoformat"):
        return obj.isoformat()
    raise TypeError(f"cannot write {type(obj).__name__} as JSON")

"""Atomic file writes: a file is either absent, the old version, or the complete new version."""

from __future__ import annotations

import json
import os
import tempfile
from pathlib import Path
from typing import Any


def _file_mode() -> int:
    umask = os.umask(0)
    os.umask(umask)
    return 0o666 & ~umask


_FILE_MODE = _file_mode()


def write_bytes_atomic(path: str | os.PathLike[str], data: bytes) -> None:
    """Write ``data`` to ``path`` through a temporary file in the same folder, fsync, then rename.

    A crash at any moment leaves either no file, the previous file, or the whole new file; never a
    truncated one. The temporary file is removed when the write fails.
    """
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    try:
        os.fchmod(fd, _FILE_MODE)  # mkstemp makes owner-only files; outputs get the usual mode
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(tmp, target)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    _fsync_dir(target.parent)


def write_json_atomic(path: str | os.PathLike[str], obj: Any, *, indent: int | None = None) -> None:
    """Serialise ``obj`` as UTF-8 JSON (keys in insertion order) and write it atomically."""
    text = json.dumps(obj, indent=indent, ensure_ascii=False, allow_nan=False)
    write_bytes_atomic(path, (text + "\n").encode("utf-8"))


def _fsync_dir(folder: Path) -> None:
    # The rename is only durable once the directory entry is on disk.
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)

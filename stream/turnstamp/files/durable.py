"""Crash-safe file-system steps: atomic small files, publishing without replacing, locks.

A reader of a file written here sees the old content or the new one, whole: text
goes to a temporary file in the same directory, is flushed and fsynced, and is
moved over the destination with ``os.replace``; the directory is then fsynced so
that the new name survives a power cut too (best effort where the file system
cannot).
"""

from __future__ import annotations

import contextlib
import json
import os
import uuid
from pathlib import Path
from typing import Any

try:  # POSIX only; without it recovery cannot see live writers (documented caveat)
    import fcntl
except ImportError:  # pragma: no cover - not on our platforms
    fcntl = None  # type: ignore[assignment]

__all__ = ["atomic_write_bytes", "atomic_write_text", "atomic_write_json", "publish",
           "try_lock", "fsync_directory"]


def atomic_write_text(path: str | Path, text: str, *, encoding: str = "utf-8") -> None:
    """Replace ``path`` with ``text`` so that readers see the old or the new file, whole.

    The text goes to a temporary file in the same directory, which is flushed,
    fsynced and moved over ``path`` with ``os.replace``; the directory is then
    fsynced (best effort). An existing file's permissions are kept. On any error
    the temporary file is removed and ``path`` is untouched.

    Parameters
    ----------
    path : str or Path
        Destination (checkpoint, status file).
    text : str
        New content.
    encoding : str, optional
        Text encoding (UTF-8).
    """
    atomic_write_bytes(path, text.encode(encoding))


def atomic_write_bytes(path: str | Path, data: bytes) -> None:
    """Replace ``path`` with ``data`` atomically (see ``atomic_write_text``); the
    temporary is ``.{name}.{32 hex digits}.tmp``, which start-up removes if left."""
    path = Path(path)
    temp = path.parent / f".{path.name}.{uuid.uuid4().hex}.tmp"
    fd = os.open(temp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
    try:
        with contextlib.suppress(FileNotFoundError):
            os.fchmod(fd, path.stat().st_mode & 0o7777)
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(temp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(temp)
        raise
    fsync_directory(path.parent)


def atomic_write_json(path: str | Path, obj: Any, *, indent: int | None = 2) -> None:
    """``atomic_write_text`` of ``obj`` as JSON (sorted keys, trailing newline).

    Parameters
    ----------
    path : str or Path
        Destination.
    obj : any
        JSON-serialisable object; it is serialised before anything touches the disk.
    indent : int or None, optional
        Indentation (2); None for one line.
    """
    text = json.dumps(obj, indent=indent, sort_keys=True, ensure_ascii=False) + "\n"
    atomic_write_text(path, text)


def publish(temp: Path, final: Path) -> None:
    """Give ``temp`` the name ``final`` without ever replacing an existing file."""
    try:
        os.link(temp, final)
    except FileExistsError:
        raise
    except OSError:  # no hard links on this file system
        if final.exists():
            raise FileExistsError(final) from None
        os.rename(temp, final)
        return
    os.unlink(temp)


def try_lock(fd: int, *, blocking: bool = False) -> bool:
    """Exclusive ``flock`` (best effort: True where locking is unsupported)."""
    if fcntl is None:
        return True
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | (0 if blocking else fcntl.LOCK_NB))
    except BlockingIOError:
        return False
    except OSError:
        return True
    return True


def fsync_directory(directory: Path) -> None:
    """Make renames and new names in ``directory`` durable (best effort)."""
    flags = os.O_RDONLY | getattr(os, "O_DIRECTORY", 0)
    try:
        fd = os.open(directory, flags)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)

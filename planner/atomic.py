"""Write output files whole or not at all (temporary file in the same folder, then rename).

A file written here gets the mode a file created the ordinary way would get, 0666 & ~umask
(POSIX creat(2)), not the temporary file's 0600: plans and reports are shared.
"""
from __future__ import annotations

import contextlib
import os
import tempfile
from pathlib import Path
from typing import Callable, Iterator

from planner.errors import InputError


def current_umask() -> int:
    """The process umask (read from /proc on Linux; elsewhere set and restored at once)."""
    try:
        with open("/proc/self/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError, IndexError):
        pass
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def ordinary_mode(path: str | os.PathLike) -> None:
    """Give `path` the mode of a newly created ordinary file: 0666 & ~umask."""
    os.chmod(path, 0o666 & ~current_umask())


def check_writable(folder: str | os.PathLike, what: str) -> Path:
    """Make `folder` if needed and check a file can be created in it; InputError naming the
    folder and `what` would be written there otherwise (a read-only scenario folder)."""

    folder = Path(folder)
    try:
        folder.mkdir(parents=True, exist_ok=True)
        fd, name = tempfile.mkstemp(prefix=".pledge-write-check.", dir=folder)
        os.close(fd)
        os.unlink(name)
    except OSError as exc:
        raise InputError(f"{folder}: cannot write {what} here ({exc.strerror or exc}); "
                         f"make the folder writable or work on a copy of the scenario") from exc
    return folder


@contextlib.contextmanager
def atomic_path(target: str | os.PathLike) -> Iterator[Path]:
    """Yield a temporary path beside `target`; on success it replaces `target` atomically.

    On an exception the temporary file is removed and `target` is left as it was.
    """
    target = Path(target)
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    os.close(fd)
    tmp_path = Path(tmp)
    try:
        yield tmp_path
        with open(tmp_path, "rb+") as fh:
            os.fsync(fh.fileno())
        ordinary_mode(tmp_path)
        os.replace(tmp_path, target)
    except BaseException:
        tmp_path.unlink(missing_ok=True)
        raise


def write_text_atomic(target: str | os.PathLike, text: str) -> Path:
    """Write `text` (UTF-8) to `target` atomically; return the target path."""
    with atomic_path(target) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return Path(target)


def write_with_atomic(target: str | os.PathLike, writer: Callable[[Path], None]) -> Path:
    """Call `writer(tmp_path)` and move the result onto `target` atomically."""
    with atomic_path(target) as tmp:
        writer(tmp)
    return Path(target)

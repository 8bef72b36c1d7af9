"""Write output files whole or not at all (temporary file in the same folder, then rename)."""
from __future__ import annotations

import contextlib
import os
import tempfile
from pathlib import Path
from typing import Callable, Iterator


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

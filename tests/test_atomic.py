"""Output files: whole or not at all, with the permissions the user's umask asks for."""
from __future__ import annotations

import os
import stat
import sys
from pathlib import Path

import pandas as pd
import pytest

from planner.atomic import write_text_atomic, write_with_atomic

sys.path.insert(0, str(Path(__file__).resolve().parent))


@pytest.fixture()
def umask():
    """Set the process umask for a test and restore it after."""
    old = os.umask(0o022)
    os.umask(old)

    def _set(mask):
        os.umask(mask)

    yield _set
    os.umask(old)


@pytest.mark.parametrize("mask,mode", [(0o022, 0o644), (0o027, 0o640), (0o002, 0o664)])
def test_written_files_honour_the_umask(tmp_path, umask, mask, mode):
    """QA finding: plan CSVs, the forecast and the history were created 0600 whatever the umask
    (the temporary file's mode), so a colleague on a shared folder could not open the buy plan.
    A new file gets 0666 & ~umask, as `open()` would give it (POSIX creat(2))."""
    umask(mask)
    a = write_text_atomic(tmp_path / "a.txt", "x")
    b = write_with_atomic(tmp_path / "b.csv", lambda p: pd.DataFrame({"x": [1]}).to_csv(p, index=False))
    for p in (a, b):
        assert stat.S_IMODE(p.stat().st_mode) == mode, oct(p.stat().st_mode)
    plain = tmp_path / "plain.txt"
    plain.write_text("x")  # what the system gives a file created the ordinary way
    assert stat.S_IMODE(plain.stat().st_mode) == mode


def test_a_new_book_honours_the_umask(tmp_path, umask):
    from planner import book as bk

    umask(0o027)
    bk.open_book(tmp_path / "book.sqlite").close()
    assert stat.S_IMODE((tmp_path / "book.sqlite").stat().st_mode) == 0o640

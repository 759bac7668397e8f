"""`tui.files.write_atomic`: old or new content, never half; modes as `open` gives them.

POSIX semantics of rename(2), open(2)'s mode less the umask, and fsync: common practice,
no source beyond the POSIX specification.
"""

from __future__ import annotations

import os
from pathlib import Path

import pytest

from tui.files import write_atomic


def test_text_bytes_and_lines_are_written(tmp_path: Path):
    assert write_atomic(tmp_path / "a.txt", "héllo\n").read_bytes() == "héllo\n".encode()
    assert write_atomic(tmp_path / "b.bin", b"\x00\xff").read_bytes() == b"\x00\xff"
    assert write_atomic(tmp_path / "c.jsonl", iter(["1", "2"])).read_text() == "1\n2\n"


def test_a_failure_before_the_rename_leaves_the_old_file_and_no_temp(tmp_path: Path):
    target = tmp_path / "t.jsonl"
    target.write_text("old\n")

    def failing():
        yield "new"
        raise RuntimeError("disk full")

    with pytest.raises(RuntimeError):
        write_atomic(target, failing())
    assert target.read_text() == "old\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["t.jsonl"]


def test_a_new_file_gets_0o666_less_the_umask_and_the_umask_is_untouched(tmp_path: Path):
    mask = os.umask(0o027)
    try:
        path = write_atomic(tmp_path / "n.txt", "x")
        assert os.umask(0o027) == 0o027  # still what we set: the writer never changed it
    finally:
        os.umask(mask)
    assert path.stat().st_mode & 0o777 == 0o640


def test_an_existing_file_keeps_its_mode(tmp_path: Path):
    target = tmp_path / "m.txt"
    target.write_text("old")
    target.chmod(0o600)
    write_atomic(target, "new")
    assert target.stat().st_mode & 0o777 == 0o600 and target.read_text() == "new"

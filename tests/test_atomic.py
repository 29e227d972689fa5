"""Atomic output: the target appears whole or not at all, with the mode a
plain ``open()`` would give it (POSIX: 0666 less the umask for a new file,
the old file's mode when one is replaced; common practice, no source)."""

import os
import stat

import pytest

from fingerprint._atomic import atomic_write, write_text_atomic


@pytest.mark.skipif(os.name != "posix", reason="POSIX file modes")
def test_new_file_gets_the_umask_mode_and_a_replaced_file_keeps_its_own(tmp_path):
    old = os.umask(0o027)
    try:
        p = tmp_path / "a.txt"
        write_text_atomic(p, "one\n")
        assert stat.S_IMODE(p.stat().st_mode) == 0o640
        # what open() gives under the same umask
        q = tmp_path / "plain.txt"
        q.write_text("x")
        assert stat.S_IMODE(q.stat().st_mode) == stat.S_IMODE(p.stat().st_mode)
        os.chmod(p, 0o604)
        write_text_atomic(p, "two\n")
        assert stat.S_IMODE(p.stat().st_mode) == 0o604 and p.read_text() == "two\n"
    finally:
        os.umask(old)


def test_failure_keeps_the_old_file_and_leaves_no_temporary(tmp_path):
    p = tmp_path / "b.txt"
    write_text_atomic(p, "good\n")
    with pytest.raises(RuntimeError):
        with atomic_write(p) as fh:
            fh.write("half")
            raise RuntimeError("crash while writing")
    assert p.read_text() == "good\n"
    assert sorted(x.name for x in tmp_path.iterdir()) == ["b.txt"]

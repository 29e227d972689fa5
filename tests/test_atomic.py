"""Atomic output: the target appears whole or not at all, with the mode a
plain ``open()`` would give it (POSIX: 0666 less the umask for a new file,
the old file's mode when one is replaced; common practice, no source)."""

import os
import stat

import pytest

from fingerprint._atomic import atomic_write, check_writable, write_text_atomic


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


def test_output_through_a_link_keeps_the_link(tmp_path):
    """Common practice, no source (as a shell's ``>`` does): writing to a
    symbolic link writes its target and leaves the link in place."""
    target = tmp_path / "target.csv"
    link = tmp_path / "link.csv"
    link.symlink_to(target.name)
    check_writable(link)
    write_text_atomic(link, "a\n")
    assert link.is_symlink() and target.read_text() == "a\n"


def test_pipe_and_input_are_refused(tmp_path):
    """A pipe would be replaced by a renamed regular file, and an output
    that is the command's own input would destroy it: both are refused
    before any work, naming the path asked for."""
    from fingerprint.errors import OutputError

    fifo = tmp_path / "pipe"
    os.mkfifo(fifo)
    with pytest.raises(OutputError, match="pipe: cannot write: not a regular file"):
        check_writable(fifo)
    with pytest.raises(OutputError, match="not a regular file"):
        write_text_atomic(fifo, "x")
    assert stat.S_ISFIFO(os.stat(fifo).st_mode)
    log = tmp_path / "w.log.csv"
    log.write_text("t\n")
    with pytest.raises(OutputError, match=r"w\.log\.csv: cannot write: it is this command's input"):
        check_writable(log, inputs=[None, tmp_path, log])
    (tmp_path / "other.csv").write_text("")
    check_writable(tmp_path / "other.csv", inputs=[log])  # another file is fine
    assert log.read_text() == "t\n"


def test_sigterm_during_a_write_leaves_no_temporary(tmp_path):
    """`kill` (SIGTERM) while a command writes: the command line turns it
    into an exception, so the half-written temporary is removed and the
    earlier file stays (POSIX: SIGTERM's default action ends the process
    at once, running no clean-up)."""
    import signal

    from mapping.cli import _Terminated, _terminate_as_interrupt

    target = tmp_path / "out.csv"
    target.write_text("earlier\n")
    previous = _terminate_as_interrupt()
    try:
        with pytest.raises(_Terminated):
            with atomic_write(target) as fh:
                fh.write("half")
                os.kill(os.getpid(), signal.SIGTERM)
                for _ in range(10_000):  # the handler runs between bytecodes of the main thread
                    pass
    finally:
        signal.signal(signal.SIGTERM, previous)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out.csv"]
    assert target.read_text() == "earlier\n"

"""Atomic file output: write to a temporary file beside the target, then
rename it over the target, so that a crash never leaves a half-written file
and never destroys the previous one."""

from __future__ import annotations

import contextlib
import json
import os
import tempfile
from pathlib import Path

__all__ = ["atomic_write", "write_text_atomic", "write_json_atomic"]


def _umask():
    """The process umask (read by setting and restoring it)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


@contextlib.contextmanager
def atomic_write(path, mode="w", **open_kwargs):
    """Open a temporary file for writing; on success replace ``path`` by it.

    Parameters
    ----------
    path : str or Path
        Final file name. Its folder is created if needed.
    mode : {"w", "wb"}
        Text or binary.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    # mkstemp makes the file private (0600); give it the mode a plain open()
    # would: that of the file it replaces, else 0666 less the umask
    try:
        os.chmod(tmp, path.stat().st_mode & 0o7777 if path.exists() else 0o666 & ~_umask())
    except BaseException:
        os.close(fd)
        os.unlink(tmp)
        raise
    if "b" not in mode:
        open_kwargs.setdefault("encoding", "utf-8")
        open_kwargs.setdefault("newline", "")
    try:
        with os.fdopen(fd, mode, **open_kwargs) as fh:
            yield fh
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise


def write_text_atomic(path, text):
    """Write ``text`` (str) to ``path`` atomically."""
    with atomic_write(path, "w") as fh:
        fh.write(text)


def write_json_atomic(path, obj, *, indent=2):
    """Write ``obj`` as JSON to ``path`` atomically (NaN is refused)."""
    text = json.dumps(obj, indent=indent, allow_nan=False, sort_keys=False)
    write_text_atomic(path, text + "\n")

"""Atomic file output: write to a temporary file beside the target, then
rename it over the target, so that a crash never leaves a half-written file
and never destroys the previous one."""

from __future__ import annotations

import contextlib
import json
import os
import tempfile
from pathlib import Path

from .errors import OutputError

__all__ = ["atomic_write", "write_text_atomic", "write_json_atomic", "check_writable", "remove_empty_made"]

#: folders check_writable made (innermost first): a command that fails
#: afterwards removes those still empty (remove_empty_made)
_MADE = []


def _umask():
    """The process umask (read by setting and restoring it)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def _target(path):
    """The file an output ``path`` names: a symbolic link's target (the
    link stays a link); an existing pipe, device or socket is refused, since
    replacing it by a renamed regular file would remove it."""
    path = Path(path)
    real = Path(os.path.realpath(path)) if path.is_symlink() else path
    if real.exists() and not (real.is_file() or real.is_dir()):
        raise OSError(22, "not a regular file (a pipe, device or socket); expected a file name", str(path))
    return real


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
    asked = path
    try:
        path = _target(path)
        if path.is_dir():
            raise IsADirectoryError(21, "Is a directory", str(path))
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    except OSError as err:
        raise OutputError(asked, err) from None
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
    writing = True  # inside our own writing (not the caller's code)
    try:
        with os.fdopen(fd, mode, **open_kwargs) as fh:
            writing = False
            yield fh
            writing = True
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException as err:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        # our own writing, or the caller's fh.write refused (a full disk, a
        # size limit: no file name of its own) name the target
        if isinstance(err, OSError) and (writing or err.filename is None):
            raise OutputError(asked, err) from None
        raise


def check_writable(path, *, folder=False, inputs=()):
    """Fail early, before long work, if ``path`` cannot be written: create
    its folder (or, with ``folder``, the folder ``path`` itself) and a
    temporary file in it, then remove the file. ``inputs``: the files the
    command reads (None entries and folders are skipped); an output that is
    one of them would replace it, and is refused.

    Raises
    ------
    OutputError, naming ``path`` and the system's reason
    """
    asked = path = Path(path)
    try:
        if not folder:
            path = _target(path)
        where = path if folder else path.parent
        if not folder and path.is_dir():
            raise IsADirectoryError(21, "Is a directory", str(path))
        if not folder and path.exists():
            for i in inputs:
                if i is not None and Path(i).is_file() and os.path.samefile(path, i):
                    raise OSError(22, f"it is this command's input {i}; expected another file name", str(path))
        missing = [d for d in (where, *where.parents) if not d.exists()]
        where.mkdir(parents=True, exist_ok=True)
        _MADE.extend(missing)
        # the temporary name atomic_write will use (a long name may fit the
        # file system only without it)
        prefix = ".lodemap-check." if folder else f".{path.name}."
        fd, tmp = tempfile.mkstemp(prefix=prefix, suffix=".tmp", dir=where)
        os.close(fd)
        os.unlink(tmp)
    except OSError as err:
        raise OutputError(asked, err, expect="folder" if folder else "file") from None


def remove_empty_made():
    """Remove the folders :func:`check_writable` made that are still empty
    (a command that failed leaves none behind); forget the others."""
    for d in _MADE:
        with contextlib.suppress(OSError):
            d.rmdir()  # only an empty folder goes
    _MADE.clear()


def write_text_atomic(path, text):
    """Write ``text`` (str) to ``path`` atomically."""
    with atomic_write(path, "w") as fh:
        fh.write(text)


def write_json_atomic(path, obj, *, indent=2):
    """Write ``obj`` as JSON to ``path`` atomically (NaN is refused)."""
    text = json.dumps(obj, indent=indent, allow_nan=False, sort_keys=False)
    write_text_atomic(path, text + "\n")

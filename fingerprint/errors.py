"""One exception family for the whole project.

Every error the tool raises on purpose derives from :class:`LodemapError`.
The command line catches that base class, prints ``str(err)`` as one line on
stderr and exits with status 2; anything else is a bug and keeps its
traceback.
"""

from __future__ import annotations

from pathlib import Path

__all__ = [
    "LodemapError",
    "DataError",
    "FormatError",
    "ConfigError",
    "ConvergenceError",
    "MapFileError",
    "OutputError",
    "LodemapWarning",
]


class LodemapError(Exception):
    """Base of every error raised on purpose by lodemap."""


class DataError(LodemapError):
    """Input data that is readable but wrong (units, ranges, ordering).

    Parameters
    ----------
    message : str
        What was wrong, what was expected and what was received.
    path : str, optional
        File the data came from.
    line, column : int, optional
        1-based line number in the file and 1-based column number (the
        position of the field in the CSV row) where the problem is.
    """

    def __init__(self, message, *, path=None, line=None, column=None):
        self.message = message
        self.path = None if path is None else str(path)
        self.line = line
        self.column = column
        super().__init__(self._format())

    def _format(self):
        where = []
        if self.path is not None:
            where.append(self.path)
        if self.line is not None:
            where.append(f"line {self.line}")
        if self.column is not None:
            where.append(f"column {self.column}")
        prefix = ", ".join(where)
        return f"{prefix}: {self.message}" if prefix else self.message


class FormatError(DataError):
    """A file that does not follow its format (missing column, bad cell)."""


class ConfigError(LodemapError):
    """A setting or argument outside what is allowed."""


class ConvergenceError(LodemapError):
    """A numerical procedure that did not reach a usable answer."""


class MapFileError(DataError):
    """A map file that is corrupted, truncated, of another version or
    another plan."""


class OutputError(LodemapError):
    """An output that cannot be written (a read-only or full disk, a folder
    where a file should go, a file where a folder should go).

    Parameters
    ----------
    path : str or Path, the output the user asked for
    err : OSError, the system's reason
    expect : "file" or "folder", what ``path`` should be
    """

    def __init__(self, path, err, *, expect="file"):
        self.path = str(path)
        reason = err.strerror or str(err)
        if expect == "file" and Path(self.path).is_dir():
            reason = "it is a folder; expected a file name"
        elif isinstance(err, (NotADirectoryError, FileExistsError)) and err.filename:
            reason = f"{err.filename} is a file where a folder is needed"
        super().__init__(f"{self.path}: cannot write: {reason}")


class LodemapWarning(UserWarning):
    """Something in the input worth a look that does not stop the work
    (issued with :func:`warnings.warn`; the command line prints it as one
    line, ``lodemap COMMAND: warning: ...``)."""

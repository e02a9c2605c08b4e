"""The exceptions sagfit raises.

::

    SagfitError
    ├── InputError(SagfitError, ValueError)     bad data or settings from the user
    │   ├── ReadingsFileError                   a readings CSV (carries path, line, column)
    │   ├── SpecFileError                       an acceptance spec or bench profile (carries path, key)
    │   └── OptionError                         a command-line option value
    ├── FitError(SagfitError, ArithmeticError)  data that cannot be fitted (too few distinct currents)
    └── HistoryError(SagfitError)               the history database (newer schema, corrupt file)

Every message says what was wrong, where, and what to do. An outcome that is
doubtful but usable (a curved source, an excess of scatter) is never an
exception: it is a flag on the result.
"""

from __future__ import annotations

__all__ = [
    "SagfitError",
    "InputError",
    "ReadingsFileError",
    "SpecFileError",
    "OptionError",
    "FitError",
    "HistoryError",
]


class SagfitError(Exception):
    """Base class of every error sagfit raises on purpose."""


class InputError(SagfitError, ValueError):
    """Input data or settings that cannot be used as given."""


class ReadingsFileError(InputError):
    """A problem in a readings file, located by file, line and column.

    Parameters
    ----------
    path : str
        The file's name as the user gave it.
    message : str
        What is wrong and what to do.
    line : int, optional
        1-based line number in the file (comment lines counted).
    column : str, optional
        The column header as written in the file.
    sheet : str, optional
        The sheet of a workbook (Excel, OpenDocument).
    place : str
        What ``line`` counts: ``"line"`` in a text file, ``"row"`` in a sheet or a
        Parquet table.
    """

    def __init__(self, path: str, message: str, line: int | None = None,
                 column: str | None = None, *, sheet: str | None = None, place: str = "line"):
        self.path = str(path)
        self.line = line
        self.column = column
        self.detail = message
        self.sheet = sheet
        self.place = place
        where = self.path
        if sheet is not None:
            where += f", sheet {sheet}"
        if line is not None:
            where += f", {place} {line}"
        if column is not None:
            where += f", column {column}"
        super().__init__(f"{where}: {message}")


class SpecFileError(InputError):
    """A problem in a TOML file (acceptance spec or bench profile), located by key."""

    def __init__(self, path: str, message: str, key: str | None = None):
        self.path = str(path)
        self.key = key
        where = self.path if key is None else f"{self.path}, key {key}"
        super().__init__(f"{where}: {message}")


class OptionError(InputError):
    """A command-line option whose value cannot be used."""

    def __init__(self, option: str, message: str):
        self.option = option
        super().__init__(f"option {option}: {message}")


class FitError(SagfitError, ArithmeticError):
    """Readings that cannot give an equivalent (for example a single load)."""


class HistoryError(SagfitError):
    """The history database cannot be used (newer schema, corrupt or locked file)."""

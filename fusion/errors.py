"""One exception family for every user error.

Every message names where the problem is (file, group/dataset/field, row or TOML
line) and what was expected, so the command line can print it on one line.
"""
from __future__ import annotations

__all__ = ["RangefuseError", "ConfigError", "LogFormatError", "InputError", "CalibrationError"]


class RangefuseError(Exception):
    """Base class of every error caused by the user's input.

    Parameters
    ----------
    message : str
        What is wrong and what was expected.
    file : str, optional
        The file the problem is in.
    field : str, optional
        The group, dataset, table key or column.
    row : int, optional
        Row (CSV, 1-based, header is row 1), TOML line, or dataset index (0-based).
    """

    _row_word = "row"  # what the message calls `row`

    def __init__(self, message: str, *, file: str | None = None, field: str | None = None,
                 row: int | None = None):
        self.message = message
        self.file = file
        self.field = field
        self.row = row
        super().__init__(self.one_line())

    def one_line(self) -> str:
        where = []
        if self.file:
            where.append(str(self.file))
        if self.field:
            where.append(str(self.field))
        if self.row is not None:
            where.append(f"{self._row_word} {self.row}")
        prefix = ": ".join([", ".join(where)]) + ": " if where else ""
        return (prefix + self.message).replace("\n", " ")


class ConfigError(RangefuseError):
    """A rig, scenario or curve description (TOML) is malformed or inconsistent; its
    `row` is the TOML line."""

    _row_word = "line"


class LogFormatError(RangefuseError):
    """A log or track file is not a valid rangefuse file."""


class InputError(RangefuseError):
    """A reading, CSV row or argument has a value that cannot be used."""


class CalibrationError(RangefuseError):
    """Calibration pairs are too few or cannot be fitted."""

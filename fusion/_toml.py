"""Reading and writing the project's TOML files.

Reading wraps the standard library's ``tomllib`` (``tomli`` on Python 3.10) so that a
syntax error becomes a `ConfigError` naming the file and line. Writing covers only
what the project writes: tables and arrays of tables holding strings, booleans,
integers, floats (including ``nan`` and ``inf``) and arrays of those.

Floats are written with ``repr``, the shortest text that reads back to the same double,
so by default a written file loads back bit for bit. Arithmetic leaves noise in the
last bits, though (``0.1 + 0.2`` is ``0.30000000000000004``, a mean of three ``0.05``
is ``0.05000000000000001``), which is confusing in a file people read and edit. With
``dumps(..., trim_float_noise=True)`` (used for the files `rangefuse calibrate` and
`rangefuse tune` write) a float is rounded to 12 significant digits; when that shows it
to be a short decimal plus noise (the rounded value has at most 10 significant digits)
and moves it by at most 1e-12 relative, the shortest text of the rounded value is
written (``0.3``, ``0.05``). Every other float (a fitted value such as
``0.06208333333333333`` or ``1.2023333333333335``, whose digits all carry information)
keeps its exact ``repr``. Such a file loads back exactly, or within 1e-12 relative where
noise was trimmed, far below the uncertainty of anything measured.
"""
from __future__ import annotations

import math
import re
import sys

import numpy as np

from .errors import ConfigError

if sys.version_info >= (3, 11):
    import tomllib as _tomllib
else:  # pragma: no cover - exercised on 3.10 only
    import tomli as _tomllib

__all__ = ["dumps", "loads", "load"]

_BARE_KEY = re.compile(r"[A-Za-z0-9_-]+")
_LINE = re.compile(r"line (\d+)")
_ESCAPES = {'"': '\\"', "\\": "\\\\", "\b": "\\b", "\t": "\\t", "\n": "\\n", "\f": "\\f",
            "\r": "\\r"}
# Arrays longer than this many characters go one block of items per line.
_WIDTH = 88
# A float rounded to _FLOAT_DIGITS significant digits that then has at most
# _SHORT_DIGITS and moved by at most _FLOAT_RTOL relative is written rounded (module
# docstring). The two-digit margin keeps genuine values: one in a hundred has a 12-digit
# form ending in "00" by chance, and then moves by at most 1e-12 relative.
_FLOAT_DIGITS = 12
_SHORT_DIGITS = 10
_FLOAT_RTOL = 1e-12


def loads(text, where=""):
    """Parse TOML text.

    Parameters
    ----------
    text : str
        The document.
    where : str, optional
        File name used in error messages.

    Returns
    -------
    dict

    Raises
    ------
    ConfigError
        On a syntax error, with ``file=where`` and ``row`` the line of the error.
    """
    try:
        return _tomllib.loads(text)
    except _tomllib.TOMLDecodeError as exc:
        line = getattr(exc, "lineno", None)
        msg = getattr(exc, "msg", None) or str(exc)
        if line is None:
            m = _LINE.search(str(exc))
            line = int(m.group(1)) if m else None
        if line is None and "end of document" in str(exc):
            # The document ended inside something still open: point at its last line.
            line = max(1, len(text.rstrip().splitlines()))
            msg += " before the end of the file"
        msg = re.sub(r"\s*\(at (line \d+, column \d+|end of document)\)", "", msg)
        raise ConfigError(f"not valid TOML: {msg}", file=where or None, row=line) from None


def load(path):
    """Read and parse a TOML file; unreadable files raise `ConfigError` naming the file."""
    try:
        with open(path, "rb") as f:
            data = f.read()
    except OSError as exc:
        raise ConfigError(f"cannot read the file ({exc.strerror})", file=str(path)) from None
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError:
        raise ConfigError("not valid TOML: the file is not UTF-8 text", file=str(path)) from None
    return loads(text, str(path))


def dumps(data, *, trim_float_noise=False):
    """Write a dict as TOML text.

    Parameters
    ----------
    data : dict
        Keys are strings. Values are str, bool, int, float (numpy scalars too), lists or
        tuples of those (nested lists allowed), dicts (written as tables) and lists of
        dicts (written as arrays of tables).
    trim_float_noise : bool, optional
        Write floats that are a short decimal plus rounding noise as that decimal
        (``0.05000000000000001`` as ``0.05``; at most 1e-12 relative change, see the
        module docstring). Default False: every float reads back bit for bit.

    Returns
    -------
    str

    Raises
    ------
    TypeError
        For a value of another type (a programming error, not a user error).

    Examples
    --------
    >>> print(dumps({"name": "left", "curve": {"p": 1.5, "r": [0.1, 0.2]}}), end="")
    name = "left"
    <BLANKLINE>
    [curve]
    p = 1.5
    r = [0.1, 0.2]
    >>> print(dumps({"x": 0.1 + 0.2}, trim_float_noise=True), end="")
    x = 0.3
    """
    if not isinstance(data, dict):
        raise TypeError("dumps() takes a dict")
    lines: list[str] = []
    _table(lines, (), data, bool(trim_float_noise))
    while lines and not lines[0]:
        lines.pop(0)
    return "\n".join(lines) + "\n"


def _is_table_array(value):
    return isinstance(value, (list, tuple)) and len(value) > 0 and all(isinstance(v, dict) for v in value)


def _table(lines, path, table, trim=False):
    plain = [(k, v) for k, v in table.items() if not isinstance(v, dict) and not _is_table_array(v)]
    nested = [(k, v) for k, v in table.items() if isinstance(v, dict) or _is_table_array(v)]
    for key, value in plain:
        if not isinstance(key, str):
            raise TypeError(f"TOML keys are strings (got {key!r})")
        lines.append(f"{_key(key)} = {_value(value, trim=trim)}")
    for key, value in nested:
        sub = path + (key,)
        name = ".".join(_key(k) for k in sub)
        if isinstance(value, dict):
            # A table with only sub-tables needs no header of its own.
            if any(not isinstance(v, dict) and not _is_table_array(v) for v in value.values()) or not value:
                lines.extend(["", f"[{name}]"])
            _table(lines, sub, value, trim)
        else:
            for item in value:
                lines.extend(["", f"[[{name}]]"])
                _table(lines, sub, item, trim)


def _key(key):
    return key if _BARE_KEY.fullmatch(key) else _string(key)


def _string(s):
    out = []
    for ch in s:
        if ch in _ESCAPES:
            out.append(_ESCAPES[ch])
        elif ord(ch) < 0x20 or ord(ch) == 0x7F:
            out.append(f"\\u{ord(ch):04X}")
        else:
            out.append(ch)
    return '"' + "".join(out) + '"'


def _significant_digits(text):
    """Significant digits of a float's decimal text ("0.050" -> 1, "2.5e+16" -> 2)."""
    mantissa = text.lower().split("e")[0].lstrip("+-").replace(".", "")
    return max(len(mantissa.strip("0")), 1)


def _float(x, trim=False):
    """TOML text of a float: its exact ``repr``; with `trim`, `x` rounded to 12
    significant digits when that leaves a short decimal (at most 10 digits) within
    1e-12 relative."""
    if math.isnan(x):
        return "nan"
    if math.isinf(x):
        return "inf" if x > 0 else "-inf"
    exact = repr(x)
    if not trim:
        return exact
    rounded = float(f"{x:.{_FLOAT_DIGITS}g}")
    if rounded != x and math.isfinite(rounded) and abs(rounded - x) <= _FLOAT_RTOL * abs(x):
        short = repr(rounded)
        if _significant_digits(short) <= _SHORT_DIGITS:
            return short
    return exact


def _value(value, indent=0, trim=False):
    """TOML text of one value; ``indent`` is the column a wrapped array's lines start at;
    ``trim`` trims float noise (`_float`)."""
    if isinstance(value, (bool, np.bool_)):
        return "true" if value else "false"
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        return _float(float(value), trim)
    if isinstance(value, str):
        return _string(value)
    if isinstance(value, np.ndarray):
        value = value.tolist()
    if isinstance(value, (list, tuple)):
        items = [_value(v, trim=trim) for v in value]
        inline = "[" + ", ".join(items) + "]"
        if len(inline) + indent <= _WIDTH:
            return inline
        pad = " " * (indent + 4)
        if any(isinstance(v, (list, tuple, np.ndarray)) for v in value):
            # Nested arrays (a matrix): one row per line.
            rows = [_value(v, indent + 4, trim) for v in value]
            return "[\n" + "".join(f"{pad}{r},\n" for r in rows) + " " * indent + "]"
        rows, row = [], ""
        for item in items:
            if row and len(pad) + len(row) + len(item) + 2 > _WIDTH:
                rows.append(row)
                row = ""
            row = f"{row}{item}, " if row else f"{item}, "
        rows.append(row)
        return "[\n" + "".join(f"{pad}{r.rstrip()}\n" for r in rows) + " " * indent + "]"
    raise TypeError(f"cannot write a {type(value).__name__} to TOML")

"""Reading and writing the project's TOML files.

Reading wraps the standard library's ``tomllib`` (``tomli`` on Python 3.10) so that a
syntax error becomes a `ConfigError` naming the file and line. Writing covers only
what the project writes: tables and arrays of tables holding strings, booleans,
integers, floats (including ``nan`` and ``inf``) and arrays of those. Floats are
written with ``repr``, the shortest text that reads back to the same double, so a
written file loads back bit for bit.
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


def dumps(data):
    """Write a dict as TOML text.

    Parameters
    ----------
    data : dict
        Keys are strings. Values are str, bool, int, float (numpy scalars too), lists or
        tuples of those (nested lists allowed), dicts (written as tables) and lists of
        dicts (written as arrays of tables).

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
    """
    if not isinstance(data, dict):
        raise TypeError("dumps() takes a dict")
    lines: list[str] = []
    _table(lines, (), data)
    while lines and not lines[0]:
        lines.pop(0)
    return "\n".join(lines) + "\n"


def _is_table_array(value):
    return isinstance(value, (list, tuple)) and len(value) > 0 and all(isinstance(v, dict) for v in value)


def _table(lines, path, table):
    plain = [(k, v) for k, v in table.items() if not isinstance(v, dict) and not _is_table_array(v)]
    nested = [(k, v) for k, v in table.items() if isinstance(v, dict) or _is_table_array(v)]
    for key, value in plain:
        if not isinstance(key, str):
            raise TypeError(f"TOML keys are strings (got {key!r})")
        lines.append(f"{_key(key)} = {_value(value)}")
    for key, value in nested:
        sub = path + (key,)
        name = ".".join(_key(k) for k in sub)
        if isinstance(value, dict):
            # A table with only sub-tables needs no header of its own.
            if any(not isinstance(v, dict) and not _is_table_array(v) for v in value.values()) or not value:
                lines.extend(["", f"[{name}]"])
            _table(lines, sub, value)
        else:
            for item in value:
                lines.extend(["", f"[[{name}]]"])
                _table(lines, sub, item)


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


def _float(x):
    if math.isnan(x):
        return "nan"
    if math.isinf(x):
        return "inf" if x > 0 else "-inf"
    return repr(x)


def _value(value, indent=0):
    """TOML text of one value; ``indent`` is the column a wrapped array's lines start at."""
    if isinstance(value, (bool, np.bool_)):
        return "true" if value else "false"
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        return _float(float(value))
    if isinstance(value, str):
        return _string(value)
    if isinstance(value, np.ndarray):
        value = value.tolist()
    if isinstance(value, (list, tuple)):
        items = [_value(v) for v in value]
        inline = "[" + ", ".join(items) + "]"
        if len(inline) + indent <= _WIDTH:
            return inline
        pad = " " * (indent + 4)
        if any(isinstance(v, (list, tuple, np.ndarray)) for v in value):
            # Nested arrays (a matrix): one row per line.
            rows = [_value(v, indent + 4) for v in value]
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

"""Reading and writing TOML for site files.

Reading uses the standard library (:mod:`tomllib`, or the ``tomli`` back-port before Python
3.11).  Writing is a small emitter for the value types a site file uses (TOML 1.0.0,
https://toml.io/en/v1.0.0): tables, arrays of tables, inline arrays and inline tables, strings,
integers, floats, booleans and date-times.  Comments of the original file are not kept.
"""

from __future__ import annotations

import datetime as _dt
import math
import os
import re
import stat
from pathlib import Path, PurePath

import numpy as np

from locate.errors import SiteFileError

try:  # Python >= 3.11
    import tomllib as _toml
except ModuleNotFoundError:  # pragma: no cover - Python 3.10
    import tomli as _toml

__all__ = ["read_toml", "dump_toml"]

_BARE_KEY = re.compile(r"[A-Za-z0-9_-]+")
_AT_LINE = re.compile(r"\(at line (\d+), column (\d+)\)")
MAX_BYTES = 16_000_000  # a site file or manifest is a few kB; more is not one
_COMMA_NUMBER = re.compile(r"=\s*([+-]?\d+),(\d+)\s*(#.*)?$")  # "x = 6,5": a decimal comma


def read_toml(path) -> dict:
    """Parse a TOML file into a dict.

    Raises
    ------
    SiteFileError
        The file is missing, not a regular file (a pipe or device is refused before it is
        opened), larger than :data:`MAX_BYTES`, not UTF-8, or not valid TOML; the message
        gives the line.  A UTF-8 byte-order mark at the start is accepted.
    """
    p = Path(path)
    try:
        info = os.stat(p)
        if stat.S_ISDIR(info.st_mode):
            raise IsADirectoryError
        if not stat.S_ISREG(info.st_mode):
            raise SiteFileError("is not a regular file (a pipe, device or socket): give the "
                                ".toml file", file=path)
        if info.st_size > MAX_BYTES:
            raise SiteFileError(f"is {info.st_size / 1e6:.0f} MB: a site file is a few kB of "
                                "TOML text; name the right file", file=path)
        with open(p, "rb") as fh:
            raw = fh.read(MAX_BYTES + 1)
        if len(raw) > MAX_BYTES:
            raise SiteFileError("is larger than a site file can be: name the right file",
                                file=path)
    except FileNotFoundError:
        raise SiteFileError("file not found: check the path", file=path) from None
    except IsADirectoryError:
        raise SiteFileError("is a folder, not a site file: give the .toml file",
                            file=path) from None
    except OSError as exc:
        raise SiteFileError(f"cannot read the file ({exc.strerror})", file=path) from None
    if raw.startswith(b"\xef\xbb\xbf"):  # a byte-order mark (some editors write one)
        raw = raw[3:]
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise SiteFileError(f"line {line} is not UTF-8 text: save the file as UTF-8",
                            file=path) from None
    try:
        return _toml.loads(text)
    except RecursionError:
        raise SiteFileError("the TOML is nested too deeply to read (a damaged file?)",
                            file=path) from None
    except _toml.TOMLDecodeError as exc:
        msg = str(exc)
        m = _AT_LINE.search(msg)
        what = _AT_LINE.sub("", msg).strip().rstrip(".")
        if m:
            line = int(m.group(1))
            src = text.splitlines()[line - 1].strip() if line <= len(text.splitlines()) else ""
            shown = f" ({src[:60]!r})" if src else ""
            comma = _COMMA_NUMBER.search(src)
            if comma:
                what = (f"the number has a decimal comma: write {comma.group(1)}."
                        f"{comma.group(2)} (a decimal point)")
            raise SiteFileError(f"TOML syntax error at line {line}, column {m.group(2)}{shown}: "
                                f"{what}; fix that line", file=path, field=f"line {line}") from None
        raise SiteFileError(f"TOML syntax error: {what}", file=path) from None


# ------------------------------------------------------------------------------------ writer

def _key(k) -> str:
    k = str(k)
    return k if _BARE_KEY.fullmatch(k) else _string(k)


def _string(s: str) -> str:
    out = []
    for ch in s:
        if ch == "\\":
            out.append("\\\\")
        elif ch == '"':
            out.append('\\"')
        elif ch == "\n":
            out.append("\\n")
        elif ch == "\t":
            out.append("\\t")
        elif ch == "\r":
            out.append("\\r")
        elif ord(ch) < 0x20 or ord(ch) == 0x7F:
            out.append(f"\\u{ord(ch):04X}")
        else:
            out.append(ch)
    return '"' + "".join(out) + '"'


def _plain(v):
    """numpy scalars/arrays and paths -> plain Python values."""
    if isinstance(v, np.ndarray):
        return v.tolist()
    if isinstance(v, np.generic):
        return v.item()
    if isinstance(v, PurePath):
        return v.as_posix()
    if isinstance(v, tuple):
        return list(v)
    return v


def _value(v) -> str:
    v = _plain(v)
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if math.isnan(v):
            return "nan"
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        r = repr(v)
        return r if any(c in r for c in ".en") else r + ".0"
    if isinstance(v, str):
        return _string(v)
    if isinstance(v, (_dt.datetime, _dt.date, _dt.time)):
        return v.isoformat()
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{_key(k)} = {_value(x)}" for k, x in v.items()) + " }" \
            if v else "{}"
    if isinstance(v, list):
        return "[" + ", ".join(_value(x) for x in v) + "]"
    raise TypeError(f"cannot write a {type(v).__name__} to TOML: {v!r}")


def _is_table_array(v) -> bool:
    v = _plain(v)
    return isinstance(v, list) and len(v) > 0 and all(isinstance(x, dict) for x in v)


def _emit(table: dict, path: list[str], lines: list[str], *, inline_nested: bool) -> None:
    subtables, arrays = [], []
    for k, v in table.items():
        v = _plain(v)
        if isinstance(v, dict) and not inline_nested:
            subtables.append((k, v))
        elif _is_table_array(v) and not inline_nested:
            arrays.append((k, v))
        else:
            lines.append(f"{_key(k)} = {_value(v)}")
    for k, v in subtables:
        lines.append("")
        lines.append("[" + ".".join(_key(p) for p in [*path, k]) + "]")
        _emit(v, [*path, k], lines, inline_nested=False)
    for k, items in arrays:
        for item in items:
            lines.append("")
            lines.append("[[" + ".".join(_key(p) for p in [*path, k]) + "]]")
            # nested values inside an array element are written inline: simple and unambiguous
            _emit(item, [*path, k], lines, inline_nested=True)


def dump_toml(data: dict) -> str:
    """Serialise a dict (as returned by :func:`read_toml`) to TOML text.

    Top-level scalars come first, then ``[tables]``, then ``[[arrays of tables]]``; values
    nested inside an array-of-tables element are written as inline tables/arrays.  numpy
    scalars and arrays and :class:`pathlib.Path` values are accepted.

    Examples
    --------
    >>> print(dump_toml({"title": "x", "air": {"temperature_c": 6.0}}))
    title = "x"
    <BLANKLINE>
    [air]
    temperature_c = 6.0
    <BLANKLINE>
    """
    if not isinstance(data, dict):
        raise TypeError(f"data must be a dict, got {type(data).__name__}")
    lines: list[str] = []
    _emit(data, [], lines, inline_nested=False)
    while lines and lines[0] == "":
        lines.pop(0)
    return "\n".join(lines) + "\n"

"""A small TOML writer for nested mappings of TOML values."""

from __future__ import annotations

import math
import os
import re
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np

# --------------------------------------------------------------------------- writing TOML
_WIDTH = 88
_BARE_KEY = re.compile(r"[A-Za-z0-9_-]+")
_ESCAPES = {
    '"': '\\"',
    "\\": "\\\\",
    "\b": "\\b",
    "\t": "\\t",
    "\n": "\\n",
    "\f": "\\f",
    "\r": "\\r",
}


def _toml_string(text: str) -> str:
    out = []
    for ch in text:
        if ch in _ESCAPES:
            out.append(_ESCAPES[ch])
        elif ord(ch) < 0x20 or ord(ch) == 0x7F:
            out.append(f"\\u{ord(ch):04x}")
        else:
            out.append(ch)
    return '"' + "".join(out) + '"'


def _toml_key(key: Any) -> str:
    text = str(key)
    return text if _BARE_KEY.fullmatch(text) else _toml_string(text)


def _toml_value(value: Any, where: str) -> str:
    if isinstance(value, (bool, np.bool_)):
        return "true" if value else "false"
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        x = float(value)
        if not math.isfinite(x):
            raise ValueError(f"{where}: cannot write the non-finite number {x!r} to a spec file.")
        return repr(x)
    if isinstance(value, str):
        return _toml_string(value)
    if isinstance(value, os.PathLike):
        return _toml_string(Path(value).as_posix())
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(v, where) for v in value) + "]"
    raise TypeError(f"{where}: cannot write a value of type {type(value).__name__} to TOML.")


def _emit_table(lines: list[str], name: tuple[str, ...], table: Mapping[Any, Any]) -> None:
    scalars = [(k, v) for k, v in table.items() if not isinstance(v, Mapping) and v is not None]
    tables = [(k, v) for k, v in table.items() if isinstance(v, Mapping)]
    # A table with only sub-tables needs no header of its own; an empty one does.
    if name and (scalars or not tables):
        if lines:
            lines.append("")
        lines.append("[" + ".".join(name) + "]")
    for key, value in scalars:
        dotted = ".".join((*name, str(key)))
        line = f"{_toml_key(key)} = {_toml_value(value, dotted)}"
        if len(line) > _WIDTH and isinstance(value, (list, tuple)) and value:
            lines.append(f"{_toml_key(key)} = [")
            items = [_toml_value(v, dotted) for v in value]
            row = "   "
            for item in items:
                if len(row) + len(item) + 2 > _WIDTH and row.strip():
                    lines.append(row.rstrip())
                    row = "   "
                row += f" {item},"
            lines.append(row.rstrip())
            lines.append("]")
        else:
            lines.append(line)
    for key, sub in tables:
        _emit_table(lines, (*name, _toml_key(key)), sub)


def dumps_toml(document: Mapping[str, Any], *, header: str | None = None) -> str:
    """Serialise nested mappings of TOML values (no arrays of tables) to TOML text.

    Parameters
    ----------
    document : Mapping
        Tables are mappings; values are strings, booleans, integers, finite floats, paths
        or arrays of those. ``None`` values are left out (TOML has no null).
    header : str, optional
        Comment written at the top, one ``#`` line per line of text.

    Returns
    -------
    str
    """
    lines: list[str] = []
    if header:
        lines.extend(f"# {line}".rstrip() for line in header.splitlines())
    body: list[str] = []
    _emit_table(body, (), document)
    if lines and body:
        lines.append("")
    lines.extend(body)
    return "\n".join(lines) + "\n"


def _relative_path(path: Path, folder: str | os.PathLike[str] | None) -> str:
    if folder is None:
        return Path(path).absolute().as_posix()
    try:
        return Path(os.path.relpath(Path(path).absolute(), Path(folder).absolute())).as_posix()
    except ValueError:  # different drives on Windows
        return Path(path).absolute().as_posix()

"""A small TOML writer for the tests (the standard library reads TOML but
does not write it): job documents built in a test, and job echoes written back
as job files."""

from __future__ import annotations

import math


def toml_string(text: str) -> str:
    """A TOML basic string: quote, backslash and control characters escaped."""
    out = []
    for ch in text:
        if ch in '"\\':
            out.append("\\" + ch)
        elif ord(ch) < 0x20 or ord(ch) == 0x7F:
            out.append(f"\\u{ord(ch):04x}")
        else:
            out.append(ch)
    return '"' + "".join(out) + '"'


def toml_value(value) -> str:
    """TOML text of a str, bool, int, float, list or dict (an inline table)."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        return repr(value)  # 'inf', '-inf', '1e-05', '0.001': all TOML floats
    if isinstance(value, str):
        return toml_string(value)
    if isinstance(value, list):
        return "[" + ", ".join(toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{" + ", ".join(f"{toml_string(k)} = {toml_value(v)}"
                               for k, v in value.items()) + "}"
    raise TypeError(type(value))


def toml_document(doc: dict) -> str:
    """Top-level non-table values first (TOML needs them before any [table])."""
    lines = [f"{toml_string(k)} = {toml_value(v)}" for k, v in doc.items()
             if not isinstance(v, dict)]
    for name, table in doc.items():
        if isinstance(table, dict):
            lines.append(f"[{toml_string(name)}]")
            lines += [f"{toml_string(k)} = {toml_value(v)}" for k, v in table.items()]
    return "\n".join(lines) + "\n"

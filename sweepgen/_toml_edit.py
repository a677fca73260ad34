"""A user's TOML file with some dotted keys set to new values, its layout and comments kept.

Each key's line is found under its table's header (``[chirp]`` for
``chirp.force_fraction``) and only its value is replaced (a comment after it is
kept); a key the file does not hold is added under its table, and a table the
file does not have is added at the end. The result is parsed again and compared
with what was wanted; when a text edit cannot be done exactly (inline tables,
dotted keys written out), the file is written from its data instead, without
comments, and the caller is told so.
"""

from __future__ import annotations

import re
import tomllib

from sweepgen.profile_writer import toml_value

_HEADER = re.compile(r"^\s*\[\s*([A-Za-z0-9_.\-]+)\s*\]\s*(#.*)?$")


def with_values(text: str, values: dict, wanted: dict) -> tuple[str, bool]:
    """``text`` with every dotted key of ``values`` set; ``wanted`` is the table the result must
    parse to. Returns ``(text, kept_layout)``."""
    lines = text.splitlines()
    for key, value in values.items():
        table, _, name = key.rpartition(".")
        lines = _set(lines, table, name, value)
    out = "\n".join(lines) + "\n"
    try:
        if tomllib.loads(out) == wanted:
            return out, True
    except tomllib.TOMLDecodeError:
        pass
    return dump(wanted), False


def _set(lines: list, table: str, name: str, value) -> list:
    line = f"{name} = {toml_value(value)}"
    start, end = _table_lines(lines, table)
    if start is None:
        return lines + ["", f"[{table}]", line] if table else [line] + lines
    pattern = re.compile(rf"^(\s*){re.escape(name)}\s*=\s*(.*?)(\s+#.*)?$")
    for i in range(start, end):
        match = pattern.match(lines[i])
        if match:
            return lines[:i] + [match.group(1) + line + (match.group(3) or "")] + lines[i + 1:]
    return lines[:start] + [line] + lines[start:]


def _table_lines(lines: list, table: str) -> tuple:
    """``(first, end)`` line indices of the body of ``[table]`` (the top level for ``""``), or None."""
    heads = [(i, m.group(1)) for i, ln in enumerate(lines) if (m := _HEADER.match(ln))]
    if not table:
        return 0, heads[0][0] if heads else len(lines)
    for n, (i, name) in enumerate(heads):
        if name == table:
            return i + 1, heads[n + 1][0] if n + 1 < len(heads) else len(lines)
    return None, None


def dump(data: dict, prefix: str = "") -> str:
    """A TOML table written from its data: plain keys first, then each sub-table under its header."""
    plain = [f"{k} = {toml_value(v)}" for k, v in data.items() if not isinstance(v, dict)]
    out = ("\n".join(plain) + "\n") if plain else ""
    for k, v in data.items():
        if isinstance(v, dict):
            name = f"{prefix}.{k}" if prefix else k
            out += f"\n[{name}]\n" + dump(v, name)
    return out

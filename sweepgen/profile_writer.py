"""Writing a laser profile with one ``[[chain]]`` stage replaced.

The user's file is kept as written (comments, order, spacing): only the text of
the replaced stage changes. The result is parsed again and compared with the
original data, stage by stage; if the text edit could not be done exactly (an
unusual layout), the whole profile is written from its data instead, without the
comments, and the caller is told so. Files are written atomically, and an
existing file is replaced only when the caller says so.
"""

from __future__ import annotations

import math
import re
import tomllib
from pathlib import Path

from sweepgen.errors import InputError

_HEADER = re.compile(r"^\s*\[\[?\s*([A-Za-z0-9_.\-]+)\s*\]\]?\s*(#.*)?$")
_CHAIN = re.compile(r"^\s*\[\[\s*chain\s*\]\]\s*(#.*)?$")


def toml_value(value) -> str:
    """One TOML value (strings, numbers, booleans and lists of them)."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if not math.isfinite(value):
            raise ValueError("TOML profiles hold finite numbers only")
        return repr(value)
    if isinstance(value, str):
        return '"' + value.replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n") + '"'
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(toml_value(v) for v in value) + "]"
    raise TypeError(f"cannot write {type(value).__name__} into a profile")


def stage_text(stage: dict, comments=()) -> str:
    """A ``[[chain]]`` table: comment lines first, then one line per key (lists wrapped)."""
    lines = ["[[chain]]"] + [f"# {c}" for c in comments]
    for key, value in stage.items():
        text = toml_value(value)
        if isinstance(value, list) and len(text) > 100:
            text = "[\n" + "".join(f"    {toml_value(v)},\n" for v in value) + "]"
        lines.append(f"{key} = {text}")
    return "\n".join(lines) + "\n"


def _blocks(lines: list[str]) -> list[tuple[int, int]]:
    """Line ranges ``[start, end)`` of each ``[[chain]]`` table (header to the next header)."""
    heads = [i for i, ln in enumerate(lines) if _HEADER.match(ln)]
    out = []
    for n, i in enumerate(heads):
        if _CHAIN.match(lines[i]):
            end = heads[n + 1] if n + 1 < len(heads) else len(lines)
            # keep the comment/blank lines that introduce the next table with it
            while end - 1 > i and (not lines[end - 1].strip() or lines[end - 1].lstrip().startswith("#")):
                end -= 1
            out.append((i, end))
    return out


def _dump(data: dict) -> str:
    """The whole profile from its data (tables and arrays of tables of scalars)."""
    head, tables = [], []
    for key, value in data.items():
        if isinstance(value, dict):
            tables.append(f"\n[{key}]\n" + "".join(f"{k} = {toml_value(v)}\n" for k, v in value.items()))
        elif isinstance(value, list) and value and all(isinstance(v, dict) for v in value):
            tables.extend("\n" + stage_text(v) if key == "chain" else
                          f"\n[[{key}]]\n" + "".join(f"{k} = {toml_value(x)}\n" for k, x in v.items())
                          for v in value)
        else:
            head.append(f"{key} = {toml_value(value)}\n")
    return "".join(head) + "".join(tables)


def replace_stage(source: str, index: int, stage: dict, comments=(), preamble=()) -> tuple[str, bool]:
    """The profile text with stage ``index`` replaced by ``stage``.

    Returns ``(text, kept_layout)``: ``kept_layout`` is False when the text
    could not be edited in place and the profile was written from its data.
    ``preamble`` lines become comments at the top of the file.
    """
    data = tomllib.loads(source)
    want = dict(data)
    want["chain"] = list(data["chain"])
    want["chain"][index] = stage
    top = "".join(f"# {p}\n" for p in preamble)
    lines = source.splitlines()
    blocks = _blocks(lines)
    if len(blocks) == len(data["chain"]):
        a, b = blocks[index]
        text = "\n".join(lines[:a]) + ("\n" if a else "") + stage_text(stage, comments).rstrip("\n") + "\n" \
            + "\n".join(lines[b:]) + ("\n" if b < len(lines) else "")
        try:
            if tomllib.loads(text) == want:
                return top + text, True
        except tomllib.TOMLDecodeError:
            pass
    return top + _dump(want), False


def write_new(path, text: str, *, overwrite: bool = False, protect=()) -> Path:
    """Write ``text`` to ``path`` atomically; an existing file only with ``overwrite``.

    ``protect`` lists files (the profile read) that are never replaced silently either:
    they too need ``overwrite``.
    """
    from sweepgen._atomic import atomic_write_text

    path = Path(path)
    if path.exists() and not overwrite:
        raise InputError("exists; choose another name with --output, or pass --overwrite to replace it",
                         file=str(path), key="--output")
    if path.is_dir():
        raise InputError("is a folder; give a file name for the new profile", file=str(path), key="--output")
    for p in protect:
        if p is not None and path.resolve() == Path(p).resolve() and not overwrite:
            raise InputError("is the profile that was read; write the calibration to a new file",
                             file=str(path), key="--output")
    try:
        return atomic_write_text(path, text)
    except OSError as exc:
        raise InputError(f"cannot write ({exc.strerror})", file=str(path), key="--output") from None

"""The virtual instrument's SCPI parser: program messages, headers, parameters, lookup.

It reads what a client sends the way IEEE 488.2 and SCPI-1999 describe it:
a program message is program message units separated by ``;`` (outside quoted
strings); a unit is a header, then parameters separated by ``,``; headers come
in long or short form, with optional nodes and numeric suffixes; after ``;`` a
header without a leading ``:`` continues the path of the previous one
(SCPI-1999 6.2.4). Command patterns are written as in SCPI documents,
``[SOURce#:]FUNCtion[:SHAPe]`` (``#`` = numeric suffix, ``|`` = alias).

Every refusal is a :class:`SCPIError` carrying its SCPI error number; the
instrument queues it. No I/O and no instrument state here.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np

from sweepgen.wire.scpi import NAME

MAX_HEADER = 12                       # characters in one SCPI mnemonic (SCPI-1999 6.2.1)
_TOKEN = re.compile(r"^([A-Za-z]+)(\d*)$")
_PRINTABLE = re.compile(r"[^\x20-\x7e\t\r\x00]")


class SCPIError(Exception):
    """A refused command: its SCPI error number and device-dependent detail."""

    def __init__(self, code: int, detail: str = ""):
        super().__init__(code, detail)
        self.code = code
        self.detail = detail

    @property
    def is_command_error(self) -> bool:
        """-1xx: IEEE 488.2 6.1.6.1 discards the rest of the program message."""
        return -199 <= self.code <= -100


@dataclass(frozen=True)
class _Node:
    forms: tuple            # ((short, long), ...)
    optional: bool
    suffix: bool
    key: str                # long form of the first alternative, for captured suffixes

    def accepts(self, mnemonic: str, suffix: str) -> bool:
        if suffix and not self.suffix:
            return False
        return any(mnemonic in (short, long) for short, long in self.forms)


def _node(text: str, optional: bool) -> _Node:
    suffix = text.endswith("#")
    text = text.rstrip("#")
    forms = tuple((re.sub(r"[^A-Z]", "", alt), alt.upper()) for alt in text.split("|"))
    return _Node(forms, optional, suffix, forms[0][1])


def _compile(pattern: str) -> tuple:
    nodes = []
    for optional, required in re.findall(r"\[:?([A-Za-z|#]+):?\]|:?([A-Za-z|#]+)", pattern):
        nodes.append(_node(optional or required, bool(optional)))
    return tuple(nodes)


def _match(nodes, tokens, i=0, j=0):
    """Suffixes captured {node key: int} when ``tokens`` match ``nodes``, else None."""
    if i == len(nodes):
        return {} if j == len(tokens) else None
    node = nodes[i]
    if j < len(tokens) and node.accepts(*tokens[j]):
        rest = _match(nodes, tokens, i + 1, j + 1)
        if rest is not None:
            if tokens[j][1]:
                rest[node.key] = int(tokens[j][1])
            return rest
    if node.optional:
        return _match(nodes, tokens, i + 1, j)
    return None


def choice(param, options: dict, what: str):
    """Character data matched against {"SINusoid": value, ...} (short or long form)."""
    text = text_of(param).upper()
    for word, value in options.items():
        if text in (re.sub(r"[^A-Z]", "", word), word.upper()):
            return value
    raise SCPIError(-224, f"{what} must be one of {', '.join(options)}, got {text[:20]}")


def text_of(param) -> str:
    kind, value = param
    if kind != "text":
        raise SCPIError(-104, "expected character or numeric data")
    return value


def number(param, what: str) -> float:
    text = text_of(param)
    try:
        value = float(text)
    except ValueError:
        raise SCPIError(-120, f"{what} must be a number, got {text[:20]}") from None
    if not np.isfinite(value):
        raise SCPIError(-120, f"{what} must be finite")
    return value


def boolean(param) -> bool:
    text = text_of(param).upper()
    if text in ("ON", "OFF"):
        return text == "ON"
    try:
        return round(float(text)) != 0
    except ValueError:
        raise SCPIError(-224, f"expected ON, OFF, 1 or 0, got {text[:20]}") from None


def trace_name(param) -> str:
    kind, value = param
    if kind == "block":
        raise SCPIError(-104, "expected a trace name")
    if not NAME.match(value):
        raise SCPIError(-141 if kind == "text" else -151, "a trace name is a letter, then letters, digits "
                                                        "or '_', at most 12 characters")
    return value.upper()


def count(params, low: int, high: int) -> None:
    if len(params) < low:
        raise SCPIError(-109)
    if len(params) > high:
        raise SCPIError(-108)


def split(text: str, sep: str) -> list[str]:
    """Split at ``sep`` outside quoted strings (IEEE 488.2 string data, doubled quotes)."""
    if '"' not in text and "'" not in text:
        return text.split(sep)
    parts, current, quote = [], [], None
    for ch in text:
        if quote:
            current.append(ch)
            if ch == quote:
                quote = None
        elif ch in "\"'":
            quote = ch
            current.append(ch)
        elif ch == sep:
            parts.append("".join(current))
            current = []
        else:
            current.append(ch)
    if quote:
        raise SCPIError(-102, "unterminated string")
    parts.append("".join(current))
    return parts


def parameter(text: str, blocks: list):
    text = text.strip(" \t\r")
    if not text:
        raise SCPIError(-102, "empty parameter")
    if text.startswith("\x00B") and text.endswith("\x00"):
        return ("block", blocks[int(text[2:-1])])
    if text[0] in "\"'":
        quote = text[0]
        if len(text) < 2 or text[-1] != quote:
            raise SCPIError(-102, "unterminated string")
        inner = text[1:-1]
        if re.search(f"(?<!{quote}){quote}(?!{quote})", inner.replace(quote * 2, "")):
            raise SCPIError(-102, "unexpected quote")
        return ("string", inner.replace(quote * 2, quote))
    if re.search(r"[\s\"'\x00]", text):
        raise SCPIError(-102, f"unexpected character in parameter {text[:20]!r}")
    return ("text", text)



def units(text: str) -> list[str]:
    """The program message units of one message (a trailing ``;`` is allowed)."""
    if _PRINTABLE.search(text):
        raise SCPIError(-101, "non-printable character")
    parts = split(text, ";")
    if len(parts) > 1 and not parts[-1].strip(" \t\r"):
        parts.pop()                                   # a trailing ';'
    return parts


def _tokens(header: str, base: str) -> list[tuple[str, str]]:
    """(mnemonic, suffix) pairs of a header without its leading ':' and trailing '?'."""
    if not base:
        raise SCPIError(-102, "empty header")
    tokens = []
    for word in base.split(":"):
        tm = _TOKEN.match(word)
        if not tm:
            raise SCPIError(-102, f"bad header {header[:24]!r}")
        if len(tm.group(1)) > MAX_HEADER:
            raise SCPIError(-112, tm.group(1)[:24])
        tokens.append((tm.group(1).upper(), tm.group(2)))
    return tokens


class CommandTable:
    """Common commands (``*IDN?`` ...) and SCPI command patterns, each with its handler.

    ``common`` maps ``"IDN?"``, ``"RST"`` ... to ``handler(params)``; ``patterns``
    lists ``(pattern, is_query, handler)`` with ``handler(params, captures)``,
    ``captures`` holding the numeric suffixes by node (``{"SOURCE": 2}``).
    """

    def __init__(self, common: dict, patterns: list):
        self.common = common
        self.patterns = [(_compile(pattern), query, handler) for pattern, query, handler in patterns]

    def resolve(self, unit: str, blocks: list, path: list):
        """``(run, path)`` for one program message unit: ``run()`` executes it; ``path`` is
        the header path the next unit continues from."""
        unit = unit.strip(" \t\r")
        if not unit:
            raise SCPIError(-102, "empty command")
        m = re.match(r"^(\S+)(?:[ \t]+(.*))?$", unit, re.S)
        header, rest = m.group(1), m.group(2)
        if "\x00" in header:                           # a block glued to the header
            raise SCPIError(-102, "missing space before the data")
        params = [] if rest is None or not rest.strip() else [parameter(p, blocks) for p in split(rest, ",")]
        query = header.endswith("?")
        base = header[:-1] if query else header
        if base.startswith("*"):
            word = base[1:].upper()
            if not re.fullmatch(r"[A-Z]{1,12}", word):
                raise SCPIError(-102, f"bad common command {header[:20]!r}")
            handler = self.common.get(word + ("?" if query else ""))
            if handler is None:
                raise SCPIError(-113, header[:20])
            return (lambda: handler(params)), path
        absolute = base.startswith(":")
        tokens = _tokens(header, base[1:] if absolute else base)
        # SCPI-1999 6.2.4: after ';' a header without a leading ':' continues the previous path
        full = tokens if absolute else path + tokens
        for nodes, is_query, handler in self.patterns:
            captures = _match(nodes, full) if is_query == query else None
            if captures is not None:
                return (lambda: handler(params, captures)), full[:-1]
        raise SCPIError(-113, header[:24])

"""Every error sweepgen raises on purpose, in one place.

The CLI maps them to exit codes without a traceback:

* :class:`InputError` (exit 2): a file, key, value or option is wrong. The
  message is one line naming the file, the key and what was expected.
* :class:`CheckFailed` (exit 1): the input is well formed but a rule fails (the
  sweep would not be safe or playable).
* :class:`InstrumentError` (exit 1): an instrument or link refused, timed out or
  answered wrongly. ``step`` names the step of the sequence that failed.

:class:`DeprecatedKey` is a warning, not an error: a user file used a key's old
name; the command line prints it as one line on stderr, once.
"""

from __future__ import annotations

import os

#: longest value or key quoted in a message (characters); longer ones are cut in the middle
QUOTE_CHARS = 200


class SweepgenError(Exception):
    """Base class of the expected errors; ``exit_code`` is what the CLI returns."""

    exit_code = 1


class InputError(SweepgenError, ValueError):
    """Bad input: a user file, a key in it, a value or a command-line option."""

    exit_code = 2

    def __init__(self, message: str, *, file: str | None = None, key: str | None = None):
        self.file = display_path(file) if file else file
        self.key = clip(key, QUOTE_CHARS) if key else key
        message = clip(message, 3 * QUOTE_CHARS)
        self.detail = message
        where = []
        if self.file:
            where.append(self.file)
        if self.key:
            where.append(f"{'option' if self.key.startswith('-') else 'key'} '{self.key}'")
        prefix = ": ".join(where)
        super().__init__(f"{prefix}: {message}" if prefix else message)


class PlanError(InputError):
    """The scenario is well formed but asks for a sweep that cannot exist: the
    design atom cannot follow it at all (for example it would be in the dark
    when the chirp starts). A sweep that exists but breaks a limit (a slowing
    distance longer than the room before the target) is no error here but a
    failed check rule (exit 1)."""


class CheckFailed(SweepgenError):
    """At least one rule of the checker failed; ``findings`` holds them all."""

    exit_code = 1

    def __init__(self, message: str, findings=None):
        super().__init__(message)
        self.findings = findings or []


class InstrumentError(SweepgenError):
    """An instrument or a link failed; ``step`` names where in the sequence."""

    exit_code = 1

    def __init__(self, message: str, *, step: str | None = None, reply: str | None = None):
        self.step = step
        self.reply = reply
        text = f"step '{step}': {message}" if step else message
        if reply:
            text += f" (instrument said: {reply})"
        super().__init__(text)


class DeprecatedKey(FutureWarning):
    """A key of a user file read under its old name; the command line prints it once on stderr."""

    def __init__(self, file: str | None, key: str, replacement: str):
        self.file = file
        self.key = key
        self.replacement = replacement
        where = f"{file}: " if file else ""
        super().__init__(f"{where}key '{key}' is deprecated: write '{replacement}' instead "
                         f"(the same value under its new name)")


class DriverError(SweepgenError):
    """A delivery driver could not deliver the table (file system, registry)."""

    exit_code = 1


def display_path(path) -> str:
    """``path`` as messages show it: lexically normalised (``bad/../bad/f.toml`` → ``bad/f.toml``)."""
    return os.path.normpath(str(path))


def clip(text: str, limit: int) -> str:
    """``text`` cut in the middle to at most ``limit`` characters (a hostile file's megabyte-long
    value or key must not become a megabyte-long message)."""
    text = str(text)
    if len(text) <= limit:
        return text
    keep = (limit - 1) // 2
    return f"{text[:keep]}…{text[len(text) - keep:]}"

"""SCPI command templates of a generator profile: the instrument's dialect.

Every command sweepgen sends to an arbitrary-waveform generator is a template
from the ``[commands]`` table of its generator profile, so a user adapts the
tool to an instrument by writing a profile, never code. The built-in dialect
(profile ``virtual-awg``) uses only IEEE 488.2 common commands and SCPI-1999
standard subsystems.

Templates
---------
A template is one line of SCPI with ``{placeholders}``. The values put into them
are checked here (:func:`render`): a trace name is SCPI character data (a
letter, then letters, digits or ``_``, at most 12 characters), numbers are
finite and written as plain decimal numbers, so no ``;``, newline, quote or
``#`` can reach the instrument through a value (no command injection). The
placeholders (:data:`PLACEHOLDERS`):

``{channel}``      output channel (1, 2, ...)
``{name}``         trace name (``trace_name`` setting)
``{data}``         the table: an IEEE 488.2 definite-length block, or an ASCII
                   list of codes (``upload_mode``); only in ``upload``
``{format}``       ``INT,16`` / ``UINT,32`` / ``REAL,32`` ... or ``ASC`` (ASCII uploads)
``{type}``, ``{bits}``   the two parts of ``{format}`` (``INT`` and ``16``)
``{border}``       ``NORM`` (most significant byte first) or ``SWAP``
                   (``byte_order`` setting, SCPI ``FORMat:BORDer``)
``{rate}``         sample rate in samples/s
``{frequency}``    repetition frequency of the table, rate/count, in Hz
``{period}``       duration of the table, count/rate, in s
``{count}``        samples in the table
``{amplitude}``    peak-to-peak volts to program; ``{offset}`` its centre (V)
``{high}``, ``{low}``    offset ± amplitude/2 (V)
``{trigger_source}``    the instrument's own name (``[trigger]`` of the profile) of the
                        source the scenario's ``[timing] source`` asks for
                        (``external``: the trigger input; ``internal``: free running;
                        ``software``); sweepgen assumes no name of its own
``{edge}``         the instrument's name of the active edge (``[trigger] rising``/``falling``)
``{level}``        the trigger input's threshold (V)
``{delay}``        the trigger delay (s): the first sample plays this long after the edge
``{cycles}``       periods played per trigger in burst mode

Templates of the trigger and playback mode (all optional): ``trigger``
(source), ``trigger_edge``, ``trigger_level``, ``trigger_delay``, ``burst``
(one burst of ``{cycles}`` periods per trigger) and ``repeat`` (play on and
on). ``output_state`` is a query answering 0/OFF or 1/ON: where a profile has it,
every switch-off and every switch-on is read back and must be what was asked.
"""

from __future__ import annotations

import re
import string
from dataclasses import dataclass, field

from sweepgen.errors import InputError
from sweepgen.wire.scpi import NAME, format_number

#: Templates that may appear in [commands]; values are command strings with {placeholders}.
TEMPLATE_KEYS = (
    "identify", "reset", "clear", "output_off", "format", "upload", "wait", "error_query",
    "readback", "checksum", "function", "rate", "amplitude", "offset", "trigger", "output_on",
    "output_state", "trigger_edge", "trigger_level", "trigger_delay", "burst", "repeat",
)
#: Settings in [commands] that are not command templates.
SETTING_KEYS = ("identity_pattern", "no_error_pattern", "upload_mode", "trace_name", "byte_order")
REQUIRED = ("identify", "identity_pattern", "output_off", "clear", "upload", "wait", "error_query",
            "no_error_pattern", "output_on")
#: Templates that must be queries (they are answered).
QUERIES = ("identify", "wait", "error_query", "readback", "checksum", "output_state")

#: Every placeholder a template may use (see the module docstring).
PLACEHOLDERS = frozenset({
    "channel", "name", "data", "format", "type", "bits", "border", "rate", "frequency", "period",
    "count", "amplitude", "offset", "high", "low", "trigger_source", "edge", "level", "delay", "cycles",
})

_SAFE_TOKEN = re.compile(r"[A-Za-z0-9_.+\-]+(,[A-Za-z0-9_.+\-]+)?\Z")


# ---------------------------------------------------------------------------------------------
# The [commands] table of a profile
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Commands:
    """The command templates and settings of one instrument dialect."""

    templates: dict = field(default_factory=dict)
    identity_pattern: str = ""
    no_error_pattern: str = ""
    upload_mode: str = "block"        # "block" (IEEE 488.2 definite-length) | "ascii"
    trace_name: str = "SWEEP"
    byte_order: str = "little"        # byte order of binary blocks

    def has(self, name: str) -> bool:
        return bool(self.templates.get(name))

    def render(self, key: str, /, **values) -> str:
        """The command for template ``key`` with ``values`` checked and filled in."""
        return render(self.templates[key], key, **values)


def placeholders(template: str) -> list[str]:
    """The placeholder names used in ``template`` (in order)."""
    return [fname for _, fname, _, _ in string.Formatter().parse(template) if fname is not None]


def _check_template(section, name: str, value: str) -> None:
    if "\n" in value or "\r" in value:
        raise section.error(name, "a command template must be one line")
    try:
        used = placeholders(value)
    except ValueError as exc:
        raise section.error(name, f"malformed template {value!r} ({exc}); write braces as {{{{ }}}}") from None
    for field_name in used:
        if field_name not in PLACEHOLDERS:
            raise section.error(name, f"unknown placeholder {{{field_name}}} in {value!r} "
                                      f"(known: {', '.join(sorted(PLACEHOLDERS))})")
    for _, _, spec, conv in string.Formatter().parse(value):
        if spec or conv:
            raise section.error(name, f"placeholders take no format spec or conversion in {value!r}")
    if name == "upload":
        if used.count("data") != 1:
            raise section.error(name, f"the upload template needs exactly one {{data}}, got {value!r}")
    elif "data" in used:
        raise section.error(name, "{data} may only appear in the upload template")
    if name in QUERIES and "?" not in value:
        raise section.error(name, f"expected a query (a command with '?'), got {value!r}")


def parse_commands(section) -> Commands:
    """Read the ``[commands]`` table of a generator profile (a :class:`sweepgen._config.Section`)."""
    templates = {}
    for name in TEMPLATE_KEYS:
        value = section.string(name, None)
        if value is not None:
            _check_template(section, name, value)
            templates[name] = value
    settings = {}
    settings["identity_pattern"] = section.string("identity_pattern", "")
    settings["no_error_pattern"] = section.string("no_error_pattern", "")
    settings["upload_mode"] = section.string("upload_mode", "block", choices=("block", "ascii"))
    settings["trace_name"] = section.string("trace_name", "SWEEP")
    settings["byte_order"] = section.string("byte_order", "little", choices=("little", "big"))
    for name in REQUIRED:
        if not (templates.get(name) or settings.get(name)):
            raise section.error(name, "missing (required in a generator's [commands])")
    for name in ("identity_pattern", "no_error_pattern"):
        try:
            re.compile(settings[name])
        except re.error as exc:
            raise section.error(name, f"not a valid regular expression ({exc})") from None
    if not NAME.match(settings["trace_name"]):
        raise section.error("trace_name", "expected SCPI character data: a letter, then letters, digits "
                                          f"or '_', at most 12 characters, got {settings['trace_name']!r}")
    section.finish()
    return Commands(templates=templates, **settings)


# ---------------------------------------------------------------------------------------------
# Values put into templates
# ---------------------------------------------------------------------------------------------
def format_value(key: str, value) -> str:
    """Check one placeholder value and return its text; refuses anything that could inject."""
    if key == "name":
        if not isinstance(value, str) or not NAME.match(value):
            raise ValueError(f"trace name must be SCPI character data (a letter, then letters, digits "
                             f"or '_', at most 12 characters), got {value!r}")
        return value
    if key in ("channel", "count", "bits", "cycles"):
        least = 0 if key == "count" else 1
        if isinstance(value, bool) or not isinstance(value, int) or value < least:
            raise ValueError(f"{key} must be a whole number >= {least}, got {value!r}")
        return str(value)
    if key in ("rate", "frequency", "period", "amplitude", "offset", "high", "low", "level", "delay"):
        return format_number(value)
    if key in ("format", "type", "border", "trigger_source", "edge"):
        if not isinstance(value, str) or not _SAFE_TOKEN.match(value):
            raise ValueError(f"{key} must be SCPI character data, got {value!r}")
        return value
    raise ValueError(f"unknown placeholder {{{key}}}")


def render(template_text: str, template: str | None = None, /, **values) -> str:
    """Fill ``template_text`` with checked ``values``; ``{data}`` is left in place for the caller.

    Raises :class:`sweepgen.errors.InputError` naming the template when a value
    is missing or unsafe.
    """
    out = []
    for literal, key, _, _ in string.Formatter().parse(template_text):
        out.append(literal)
        if key is None:
            continue
        if key == "data":
            out.append("{data}")
            continue
        if key not in values or values[key] is None:
            raise InputError(f"template {template_text!r} needs a value for {{{key}}}, which this "
                             f"table does not provide", key=f"commands.{template or '?'}")
        try:
            out.append(format_value(key, values[key]))
        except ValueError as exc:
            raise InputError(f"refused to send {template_text!r}: {exc}",
                             key=f"commands.{template or '?'}") from None
    return "".join(out)


def split_data(command: str) -> tuple[str, str]:
    """Split a rendered upload command at ``{data}``: (text before, text after)."""
    before, _, after = command.partition("{data}")
    return before, after

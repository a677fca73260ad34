"""SCPI command templates of a generator profile (the instrument's dialect).

Every command sweepgen sends to an arbitrary-waveform generator is a template
from the ``[commands]`` table of its generator profile, so a user adapts the
tool to an instrument by writing a profile, never code. The built-in dialect
(profile ``virtual-awg``) uses only IEEE 488.2 common commands and SCPI-1999
standard subsystems.
"""

from __future__ import annotations

from dataclasses import dataclass, field

#: Templates that may appear in [commands]; values are command strings with {placeholders}.
TEMPLATE_KEYS = (
    "identify", "reset", "clear", "output_off", "format", "upload", "wait", "error_query",
    "readback", "checksum", "function", "rate", "amplitude", "offset", "trigger", "output_on",
)
#: Settings in [commands] that are not command templates.
SETTING_KEYS = ("identity_pattern", "no_error_pattern", "upload_mode", "trace_name", "byte_order")
REQUIRED = ("identify", "identity_pattern", "output_off", "clear", "upload", "wait", "error_query",
            "no_error_pattern", "output_on")


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


def parse_commands(section) -> Commands:
    """Read the ``[commands]`` table of a generator profile (a :class:`sweepgen._config.Section`)."""
    templates = {}
    for name in TEMPLATE_KEYS:
        value = section.string(name, None)
        if value is not None:
            if "\n" in value or "\r" in value:
                raise section.error(name, "a command template must be one line")
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
    section.finish()
    return Commands(templates=templates, **settings)

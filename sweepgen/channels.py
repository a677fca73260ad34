"""Further lights of a scenario beyond the main slowing light: ``[channels.NAME]`` tables.

One schema, one loader, one :class:`Channel` object that the planner, the
checker, the simulation and the playback read. ``NAME`` is the user's word
(``repump``, ...). A scenario without ``[channels]`` has only the main light.

``kind = "frequency"``: a light whose frequency is driven. It either follows the
main sweep at a fixed offset (``offset = "0 MHz"``) or holds one detuning
(``detuning = "-5 MHz"``). A channel's detunings are measured from the
transition it drives, as the main light's are from the slowing transition, so
``offset = "0 MHz"`` keeps it resonant with the same velocity class as the main
light at every moment (as a sideband of the slowing laser at the transitions'
frequency difference does; common practice). ``role = "repump"`` says that
the light pumps atoms back from the dark ground level of the species'
``[off_resonant_level]`` (README.md, "Physics background", hyperfine depumping
and repump). Physics keys:

``saturation``
    peak ``s = I/I_sat`` on the axis of the repump transition; the repump shares
    the slowing light's beam geometry (light start, waist, focus; common practice:
    both lights come out of the same fibre).
"""

from __future__ import annotations

from dataclasses import dataclass

from sweepgen._config import Section

KINDS = ("frequency",)
ROLES = ("repump",)


@dataclass(frozen=True)
class Channel:
    """One further light of the scenario (SI units, Hz for detunings)."""

    name: str
    kind: str                      # "frequency"
    role: str                      # "repump"
    saturation: float              # peak I/I_sat on axis
    offset: float | None = None    # Hz: follows the main sweep, Δ_channel(t) = Δ(t) + offset
    detuning: float | None = None  # Hz: held at this detuning

    @property
    def follows(self) -> bool:
        """Whether the channel follows the main sweep (else it holds one detuning)."""
        return self.offset is not None

    def detuning_with(self, main_detuning: float) -> float:
        """The channel's detuning (Hz) when the main light has ``main_detuning``."""
        return main_detuning + self.offset if self.follows else self.detuning


def channels_from_section(sec: Section | None, species) -> tuple[Channel, ...]:
    """Read ``[channels.NAME]`` tables (absent: no channel)."""
    if sec is None:
        return ()
    out = []
    for name in list(sec.data):
        out.append(_channel(sec.section(name), name, species))
    sec.finish()
    return tuple(out)


def _channel(ch: Section, name: str, species) -> Channel:
    kind = ch.string("kind", choices=KINDS)
    role = ch.string("role", choices=ROLES)
    saturation = ch.number("saturation", positive=True)
    if ch.has("offset") == ch.has("detuning"):
        raise ch.error("offset", "give exactly one of offset (follow the main sweep at this offset) or "
                                 "detuning (hold this detuning)")
    offset = ch.quantity("offset", "Hz", None, example="0 MHz")
    detuning = ch.quantity("detuning", "Hz", None, example="-5 MHz")
    ch.finish()
    if role == "repump" and species.off_resonant is None:
        raise ch.error("role", f"species '{species.key}' has no dark ground level to pump back from "
                               f"(no [off_resonant_level] in its file); remove the channel or describe the level")
    return Channel(name=name, kind=kind, role=role, saturation=saturation, offset=offset, detuning=detuning)

"""Cautions shown beside results that concern stray fields where people may be.

The 0.5 mT line is the limit usually posted for people with implanted medical
devices (common practice, not a value volmag derives). volmag computes fields;
it does not judge the safety of a site.
"""
from __future__ import annotations

#: Flux density (T) of the line usually posted for implanted medical devices
#: (common practice).
IMPLANT_LIMIT_T = 0.5e-3

STRAY_FIELD_CAUTIONS = (
    "People with implanted medical devices (pacemakers, defibrillators, neurostimulators, "
    "insulin pumps) must stay outside the 0.5 mT line; 0.5 mT is the limit usually posted "
    "(common practice), and a device maker's own limit may be lower.",
    "Loose ferromagnetic objects (tools, gas cylinders, chairs, keys) can be pulled in and fly "
    "towards a strong field source; keep them away and secure them.",
    "Magnetised steel parts and magnets can snap together and pinch fingers or skin; handle them "
    "with care and keep them apart.",
    "These are computed fields of an idealised model. Local codes, site rules and licensed "
    "practice decide where people may go; follow them over anything shown here.",
)


def stray_field_cautions(max_B: float) -> tuple[str, ...]:
    """The cautions that apply where the flux density reaches `max_B` (T):
    all of them at or above the 0.5 mT line, none below it."""
    return STRAY_FIELD_CAUTIONS if max_B >= IMPLANT_LIMIT_T else ()


def run_cautions(max_B: float, forces: bool) -> tuple[str, ...]:
    """The cautions a run carries: all of them when the flux density at its
    probes reaches `max_B` (T) >= 0.5 mT, or when it computed `forces` on
    bodies (a field strong enough to pull on steel is worth a force figure);
    none otherwise."""
    return STRAY_FIELD_CAUTIONS if forces else stray_field_cautions(max_B)

#: One-line form for figure captions.
SHORT_CAUTION = ("Caution: 0.5 mT is the limit usually posted for implanted medical devices (common practice); "
                 "strong fields pull in loose ferromagnetic objects and magnetised parts can pinch. "
                 "Follow local codes and licensed practice.")

"""Physical constants and length units.

volmag works in SI inside. Lengths given in a case file or a script in mm or um
are converted once, at the edge, with :func:`length_scale`.
"""
import math

#: Vacuum permeability in H/m. volmag uses the exact pre-2019 value 4e-7*pi;
#: the 2019 SI value differs by 5.5e-10 relative, far below any tolerance here.
MU0 = 4e-7 * math.pi

LENGTH_UNITS = {"m": 1.0, "mm": 1e-3, "um": 1e-6}


def length_scale(unit: str) -> float:
    """Metres per one `unit` ("m", "mm" or "um")."""
    try:
        return LENGTH_UNITS[unit]
    except KeyError:
        raise ValueError(f"unknown length unit {unit!r}; use one of {', '.join(LENGTH_UNITS)}") from None

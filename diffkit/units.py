"""Units and conversions, in one place.

Internal units: length Å, time ps, energy eV, temperature K, charge in
elementary charges. Every physical constant comes from :mod:`scipy.constants`
(CODATA); SI prefixes come from there too, so nothing here is typed by hand.
"""

from __future__ import annotations

import re

from scipy import constants as _c

from .errors import UnitsError

__all__ = [
    "K_B_EV_PER_K",
    "E_CHARGE_C",
    "K_B_J_PER_K",
    "A2_PER_PS_IN_CM2_PER_S",
    "A3_IN_CM3",
    "MS_PER_S",
    "a2ps_to_cm2s",
    "cm2s_to_a2ps",
    "parse_time_ps",
    "parse_temperature_K",
    "parse_quantity",
]

#: Boltzmann constant in eV/K (CODATA via scipy).
K_B_EV_PER_K: float = _c.k / _c.e
#: Boltzmann constant in J/K.
K_B_J_PER_K: float = _c.k
#: Elementary charge in C.
E_CHARGE_C: float = _c.e
#: One Å²/ps expressed in cm²/s.
A2_PER_PS_IN_CM2_PER_S: float = (_c.angstrom / _c.centi) ** 2 / _c.pico
#: One Å³ expressed in cm³.
A3_IN_CM3: float = (_c.angstrom / _c.centi) ** 3
#: mS/cm in one S/cm.
MS_PER_S: float = 1.0 / _c.milli
#: One atomic mass unit in kg.
AMU_KG: float = _c.atomic_mass


def a2ps_to_cm2s(value):
    """Convert a diffusivity from Å²/ps to cm²/s (works on arrays)."""
    return value * A2_PER_PS_IN_CM2_PER_S


def cm2s_to_a2ps(value):
    """Convert a diffusivity from cm²/s to Å²/ps (works on arrays)."""
    return value / A2_PER_PS_IN_CM2_PER_S


# time units accepted on input, in ps
_TIME_PS = {
    "as": _c.atto / _c.pico,
    "fs": _c.femto / _c.pico,
    "ps": 1.0,
    "ns": _c.nano / _c.pico,
    "us": _c.micro / _c.pico,
    "s": 1.0 / _c.pico,
}
_TEMPERATURE = {"K": 1.0}
_NUMBER = r"([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)"
_QUANTITY = re.compile(r"^\s*" + _NUMBER + r"\s*([A-Za-z]*)\s*$")


def parse_quantity(text, table, default_unit, what):
    """Parse ``"20fs"``/``"0.02 ps"``/``20`` into a float in internal units.

    Parameters
    ----------
    text : str or float
        The value, with or without a unit suffix.
    table : dict
        Accepted unit names and their factor to the internal unit.
    default_unit : str or None
        Unit assumed for a bare number; ``None`` makes a bare number an error.
    what : str
        Name used in error messages (e.g. ``"frame interval"``).

    Returns
    -------
    float
        The value in internal units.
    """
    if isinstance(text, (int, float)) and not isinstance(text, bool):
        if default_unit is None:
            raise UnitsError(f"{what}: {text!r} needs a unit, one of {sorted(table)}")
        return float(text) * table[default_unit]
    m = _QUANTITY.match(str(text))
    if not m:
        raise UnitsError(
            f"{what}: cannot read {text!r}; expected a number with an optional unit, "
            f"e.g. 2{default_unit or next(iter(table))}"
        )
    value, unit = float(m.group(1)), m.group(2)
    if not unit:
        if default_unit is None:
            raise UnitsError(f"{what}: {text!r} needs a unit, one of {sorted(table)}")
        unit = default_unit
    if unit not in table:
        raise UnitsError(f"{what}: unknown unit {unit!r} in {text!r}; known units: {sorted(table)}")
    return value * table[unit]


def parse_time_ps(text, what="time"):
    """Parse a time such as ``"2fs"``, ``"0.002ps"`` or a bare number of ps; returns ps."""
    return parse_quantity(text, _TIME_PS, "ps", what)


def parse_temperature_K(text, what="temperature"):
    """Parse a temperature such as ``"900K"`` or ``900``; returns K."""
    return parse_quantity(text, _TEMPERATURE, "K", what)

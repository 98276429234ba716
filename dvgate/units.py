"""Physical quantities written as text in configs: ``"16 g"``, ``"500 ns"``, ``"12 MHz"``.

One small table per kind of quantity, so that a value always means the same thing
everywhere it is parsed. Standard gravity is 9.80665 m/s^2 exactly (3rd CGPM, 1901).
"""

from __future__ import annotations

import math
import re

#: Standard gravity in m/s^2 (3rd CGPM, 1901; ISO 80000-3).
STANDARD_GRAVITY = 9.80665

_NUMBER = r"[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?"
_QUANTITY = re.compile(rf"^\s*({_NUMBER})\s*(\S.*?)?\s*$")

#: Units of each kind, as the factor to the SI unit.
KINDS: dict[str, dict[str, float]] = {
    "time": {"s": 1.0, "ms": 1e-3, "us": 1e-6, "ns": 1e-9},
    "frequency": {"Hz": 1.0, "kHz": 1e3, "MHz": 1e6},
    "acceleration": {"m/s^2": 1.0, "m/s2": 1.0, "g": STANDARD_GRAVITY, "mg": STANDARD_GRAVITY * 1e-3},
    "angular_rate": {"rad/s": 1.0, "deg/s": math.pi / 180.0, "rpm": 2.0 * math.pi / 60.0},
    "velocity": {"m/s": 1.0, "cm/s": 1e-2, "mm/s": 1e-3},
    "angle": {"rad": 1.0, "mrad": 1e-3, "urad": 1e-6, "deg": math.pi / 180.0},
    # Kinds that motion profiles and sensor errors need.
    "length": {"m": 1.0, "km": 1e3, "cm": 1e-2, "mm": 1e-3},
    "mass": {"kg": 1.0, "t": 1e3},
    "force": {"N": 1.0, "kN": 1e3},
    "mass_flow": {"kg/s": 1.0, "g/s": 1e-3},
    "area": {"m^2": 1.0, "m2": 1.0, "cm^2": 1e-4, "cm2": 1e-4},
    # Small accelerations (sensor bias): micro-g is the trade's unit.
    "small_acceleration": {"ug": STANDARD_GRAVITY * 1e-6, "µg": STANDARD_GRAVITY * 1e-6,
                           "mg": STANDARD_GRAVITY * 1e-3, "g": STANDARD_GRAVITY, "m/s^2": 1.0, "m/s2": 1.0},
    # Scale-factor error, as a fraction.
    "ratio": {"ppm": 1e-6, "%": 1e-2},
    # Second-order coefficient, per (m/s^2): micro-g per g squared.
    "second_order": {"ug/g^2": 1e-6 / STANDARD_GRAVITY, "ug/g2": 1e-6 / STANDARD_GRAVITY,
                     "µg/g^2": 1e-6 / STANDARD_GRAVITY, "/(m/s^2)": 1.0},
    # Velocity random walk, in m/s per root second.
    "velocity_random_walk": {"m/s/sqrt(h)": 1.0 / 60.0, "m/s/sqrt(s)": 1.0, "m/s/sqrt(Hz)": 1.0},
    "share": {"%": 1e-2},
}


class QuantityError(ValueError):
    """A quantity's text could not be read; the message says what is allowed."""


def parse_quantity(text: str | int | float, kind: str, *, extra_units: tuple[str, ...] = ()) -> tuple[float, str]:
    """Read ``"<number> <unit>"`` as a value of ``kind``.

    Parameters
    ----------
    text : str, int or float
        The written value. A bare number is refused: every quantity names its unit.
    kind : str
        A key of :data:`KINDS`.
    extra_units : tuple of str
        Units outside the table that the caller handles itself (such as ``"cycles"``);
        the number is returned unconverted with that unit.

    Returns
    -------
    tuple of (float, str)
        The value in SI units (or unconverted, for an extra unit) and the unit seen.
    """
    units = KINDS[kind]
    allowed = ", ".join([*units, *extra_units])
    if isinstance(text, bool) or not isinstance(text, (str, int, float)):
        raise QuantityError(f"expected text such as '1 {next(iter(units))}' (units: {allowed})")
    if not isinstance(text, str):
        raise QuantityError(
            f"a bare number is ambiguous; write it with a unit, such as '{text} {next(iter(units))}' "
            f"(units: {allowed})"
        )
    match = _QUANTITY.match(text)
    if not match or not match.group(2):
        raise QuantityError(f"expected '<number> <unit>' with a unit among {allowed}")
    number, unit = float(match.group(1)), match.group(2)
    if not math.isfinite(number):
        raise QuantityError("the number must be finite")
    if unit in extra_units:
        return number, unit
    if unit not in units:
        raise QuantityError(f"unknown unit {unit!r}; allowed: {allowed}")
    return number * units[unit], unit


def format_si(value: float, unit: str, digits: int = 4) -> str:
    """Format ``value`` with an SI prefix, such as ``750 ns`` or ``12 MHz``."""
    if value == 0:
        return f"0 {unit}"
    prefixes = [(1e9, "G"), (1e6, "M"), (1e3, "k"), (1.0, ""), (1e-3, "m"), (1e-6, "u"), (1e-9, "n"), (1e-12, "p")]
    for factor, prefix in prefixes:
        if abs(value) >= factor:
            return f"{value / factor:.{digits}g} {prefix}{unit}"
    return f"{value:.{digits}g} {unit}"

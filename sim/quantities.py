"""Quantities of motion and of sensor errors, written as text with their unit.

Scenario files and the ``[sensor]``, ``[host]`` and ``[program]`` config sections write
every physical value with its unit (``"1.5 m"``, ``"120 ug"``, ``"100 ppm"``). The kinds
that :mod:`dvgate.units` already knows (time, acceleration, angular rate, angle...) use
its table, so a unit means the same thing everywhere; this module adds the kinds that
only motion profiles and sensor errors need (length, mass, force, mass flow, small
accelerations in micro-g, parts per million, random walk, share).
"""

from __future__ import annotations

import math
import re
from typing import Annotated, Any

from pydantic import PlainValidator

from dvgate.units import KINDS, STANDARD_GRAVITY, QuantityError

_NUMBER = r"[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?"
_TEXT = re.compile(rf"^\s*({_NUMBER})\s*(\S.*?)?\s*$")

_G = STANDARD_GRAVITY
#: Kinds beyond :data:`dvgate.units.KINDS`, as the factor to the SI unit.
EXTRA_KINDS: dict[str, dict[str, float]] = {
    "length": {"m": 1.0, "km": 1e3, "cm": 1e-2, "mm": 1e-3},
    "mass": {"kg": 1.0, "t": 1e3},
    "force": {"N": 1.0, "kN": 1e3},
    "mass_flow": {"kg/s": 1.0, "g/s": 1e-3},
    "area": {"m^2": 1.0, "m2": 1.0, "cm^2": 1e-4, "cm2": 1e-4},
    # Small accelerations (sensor bias): micro-g is the trade's unit.
    "small_acceleration": {"ug": _G * 1e-6, "µg": _G * 1e-6, "mg": _G * 1e-3, "g": _G,
                           "m/s^2": 1.0, "m/s2": 1.0},
    # Scale-factor error, as a fraction.
    "ratio": {"ppm": 1e-6, "%": 1e-2},
    # Second-order coefficient, per (m/s^2): micro-g per g squared.
    "second_order": {"ug/g^2": 1e-6 / _G, "ug/g2": 1e-6 / _G, "µg/g^2": 1e-6 / _G, "/(m/s^2)": 1.0},
    # Velocity random walk, in m/s per root second.
    "velocity_random_walk": {"m/s/sqrt(h)": 1.0 / 60.0, "m/s/sqrt(s)": 1.0, "m/s/sqrt(Hz)": 1.0},
    "share": {"%": 1e-2},
}
EXTRA_KINDS["angular_rate_ext"] = {**KINDS["angular_rate"], "rpm": 2.0 * math.pi / 60.0}


def units_of(kind: str) -> dict[str, float]:
    """The unit table of ``kind``: :data:`dvgate.units.KINDS` first, then :data:`EXTRA_KINDS`."""
    if kind in KINDS:
        return KINDS[kind]
    return EXTRA_KINDS[kind]


def parse(text: Any, kind: str) -> float:
    """Read ``"<number> <unit>"`` as an SI value of ``kind``.

    Raises
    ------
    QuantityError
        With the units allowed, when the text is not a number and a known unit.
    """
    units = units_of(kind)
    allowed = ", ".join(units)
    example = next(iter(units))
    if isinstance(text, bool) or not isinstance(text, (str, int, float)):
        raise QuantityError(f"expected text such as '1 {example}' (units: {allowed})")
    if not isinstance(text, str):
        raise QuantityError(f"a bare number is ambiguous; write it with a unit, such as '{text} {example}' "
                            f"(units: {allowed})")
    match = _TEXT.match(text)
    if not match or not match.group(2):
        raise QuantityError(f"expected '<number> <unit>' with a unit among {allowed}")
    number, unit = float(match.group(1)), match.group(2)
    if not math.isfinite(number):
        raise QuantityError("the number must be finite")
    if unit not in units:
        raise QuantityError(f"unknown unit {unit!r}; allowed: {allowed}")
    return number * units[unit]


def field(kind: str, *, minimum: float | None = None, positive: bool = False) -> Any:
    """A pydantic field type: text read as an SI float of ``kind`` (optionally bounded)."""

    def check(raw: Any) -> float:
        try:
            value = parse(raw, kind)
        except QuantityError as error:
            raise ValueError(str(error)) from None
        if positive and value <= 0:
            raise ValueError("must be greater than zero")
        if minimum is not None and value < minimum:
            raise ValueError(f"must be at least {minimum:g} (SI)")
        return value

    return Annotated[float, PlainValidator(check)]


__all__ = ["EXTRA_KINDS", "QuantityError", "field", "parse", "units_of"]

"""Quantities of motion and of sensor errors, written as text with their unit.

Scenario files and the ``[sensor]``, ``[host]`` and ``[program]`` config sections write
every physical value with its unit (``"1.5 m"``, ``"120 ug"``, ``"100 ppm"``). Every
kind lives in the one table of :mod:`dvgate.units`, so a unit means the same thing
everywhere; this module turns them into pydantic field types.
"""

from __future__ import annotations

from typing import Annotated, Any

from pydantic import PlainValidator

from dvgate.units import QuantityError, parse_quantity


def parse(text: Any, kind: str) -> float:
    """Read ``"<number> <unit>"`` as an SI value of ``kind`` (see :func:`dvgate.units.parse_quantity`).

    Raises
    ------
    QuantityError
        With the units allowed, when the text is not a number and a known unit.
    """
    return parse_quantity(text, kind)[0]


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


__all__ = ["QuantityError", "field", "parse"]

"""PLL settings that turn a board's oscillator into the clock a config asks for.

Every cycle count of an emulator (pulse width, gap, glitch filter, rate scale) derives
from its clock, so a PLL that lands near the asked clock is not good enough: the
solver returns settings only when the output is exactly the asked frequency, and
otherwise raises a :class:`UserError` that names the nearest frequency the PLL can make.

Arithmetic is exact (:class:`fractions.Fraction`). This module imports no Amaranth; the
board top (``dvgate.boards``) turns a :class:`PllPlan` into the vendor primitive.

The limits below are the ones the open tools' PLL calculators use (``icepll`` of
IceStorm, ``ecppll`` of Project Trellis); the tests check our results against those
tools where they are installed.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from fractions import Fraction

from dvgate.errors import UserError

MHZ = 1_000_000

# iCE40 sysCLOCK PLL, simple feedback path (from memory of the iCE40 PLL user guide and
# icepll; checked against icepll by tests/test_pll.py).
ICE40_IN_HZ = (10 * MHZ, 133 * MHZ)
ICE40_OUT_HZ = (16 * MHZ, 275 * MHZ)
ICE40_PFD_HZ = (10 * MHZ, 133 * MHZ)
ICE40_VCO_HZ = (533 * MHZ, 1066 * MHZ)
ICE40_DIVR = range(0, 16)
ICE40_DIVF = range(0, 128)
ICE40_DIVQ = range(1, 7)
#: Loop filter setting by phase-detector frequency: (upper bound in Hz, FILTER_RANGE).
ICE40_FILTER = ((17 * MHZ, 1), (26 * MHZ, 2), (44 * MHZ, 3), (66 * MHZ, 4), (101 * MHZ, 5))

# ECP5 EHXPLLL with CLKOP as feedback (from memory of ecppll; checked against ecppll by
# tests/test_pll.py).
ECP5_IN_HZ = (8 * MHZ, 400 * MHZ)
ECP5_OUT_HZ = (10 * MHZ, 400 * MHZ)
ECP5_PFD_HZ = (Fraction(3125, 1000) * MHZ, 400 * MHZ)
ECP5_VCO_HZ = (400 * MHZ, 800 * MHZ)
ECP5_CLKI_DIV = range(1, 129)
ECP5_CLKFB_DIV = range(1, 81)
ECP5_CLKOP_DIV = range(1, 129)
#: The VCO frequency the solver prefers among equal outputs (middle of the range).
ECP5_VCO_PREFERRED = 600 * MHZ

FAMILIES = ("ice40", "ecp5")
_FAMILY_NAME = {"ice40": "iCE40", "ecp5": "ECP5"}


@dataclass(frozen=True)
class PllPlan:
    """Settings of one PLL and the frequencies they give.

    Attributes
    ----------
    family : str
        ``"ice40"`` or ``"ecp5"``.
    input_hz, output_hz, pfd_hz, vco_hz : Fraction
        Oscillator, PLL output, phase-detector and VCO frequencies in Hz.
    settings : dict of str to int
        Divider settings under the vendor primitive's parameter names
        (iCE40: ``DIVR``, ``DIVF``, ``DIVQ``, ``FILTER_RANGE``; ECP5: ``CLKI_DIV``,
        ``CLKFB_DIV``, ``CLKOP_DIV``, ``CLKOP_CPHASE``).
    """

    family: str
    input_hz: Fraction
    output_hz: Fraction
    pfd_hz: Fraction
    vco_hz: Fraction
    settings: dict[str, int] = field(default_factory=dict)

    def describe(self) -> str:
        """One line for reports: frequencies and dividers."""
        divs = " ".join(f"{key}={value}" for key, value in self.settings.items())
        return (f"PLL {_mhz(self.input_hz)} -> {_mhz(self.output_hz)} "
                f"(VCO {_mhz(self.vco_hz)}; {divs})")


def _mhz(hz: Fraction | float) -> str:
    return f"{float(hz) / MHZ:.6g} MHz"


def _within(value: Fraction, bounds: tuple[Fraction | int, Fraction | int]) -> bool:
    return bounds[0] <= value <= bounds[1]


def exact_hz(hz: float | int | Fraction) -> Fraction:
    """A frequency as an exact fraction; a float is read as its shortest decimal text."""
    if isinstance(hz, Fraction):
        return hz
    if isinstance(hz, int):
        return Fraction(hz)
    return Fraction(repr(float(hz)))


def ice40_candidates(input_hz: Fraction) -> list[PllPlan]:
    """Every valid iCE40 PLL setting for this input, in search order (DIVR, DIVF, DIVQ)."""
    out = []
    for divr in ICE40_DIVR:
        pfd = input_hz / (divr + 1)
        if not _within(pfd, ICE40_PFD_HZ):
            continue
        filter_range = next((value for bound, value in ICE40_FILTER if pfd < bound), 6)
        for divf in ICE40_DIVF:
            vco = pfd * (divf + 1)
            if not _within(vco, ICE40_VCO_HZ):
                continue
            for divq in ICE40_DIVQ:
                output = vco / (1 << divq)
                if not _within(output, ICE40_OUT_HZ):
                    continue
                out.append(PllPlan("ice40", input_hz, output, pfd, vco, {
                    "DIVR": divr, "DIVF": divf, "DIVQ": divq, "FILTER_RANGE": filter_range}))
    return out


def ecp5_candidates(input_hz: Fraction) -> list[PllPlan]:
    """Every valid ECP5 PLL setting for this input (CLKOP fed back)."""
    out = []
    for clki_div in ECP5_CLKI_DIV:
        pfd = input_hz / clki_div
        if not _within(pfd, ECP5_PFD_HZ):
            continue
        for clkfb_div in ECP5_CLKFB_DIV:
            output = pfd * clkfb_div
            if not _within(output, ECP5_OUT_HZ):
                continue
            # The VCO runs at output x CLKOP_DIV: only a short run of dividers fits.
            first = max(ECP5_CLKOP_DIV.start, math.ceil(ECP5_VCO_HZ[0] / output))
            last = min(ECP5_CLKOP_DIV.stop - 1, math.floor(ECP5_VCO_HZ[1] / output))
            for clkop_div in range(first, last + 1):
                vco = output * clkop_div
                out.append(PllPlan("ecp5", input_hz, output, pfd, vco, {
                    "CLKI_DIV": clki_div, "CLKFB_DIV": clkfb_div, "CLKOP_DIV": clkop_div,
                    # Phase 0 on CLKOP, as ecppll writes it.
                    "CLKOP_CPHASE": (clkop_div - 1) // 2}))
    return out


_INPUT_LIMITS = {"ice40": ICE40_IN_HZ, "ecp5": ECP5_IN_HZ}
_CANDIDATES = {"ice40": ice40_candidates, "ecp5": ecp5_candidates}


def nearest(family: str, input_hz: float | Fraction, output_hz: float | Fraction) -> PllPlan | None:
    """The setting whose output is nearest ``output_hz`` (None when no setting exists).

    Among equal outputs the first in search order wins, except that on ECP5 the one whose
    VCO is nearest the middle of its range wins.
    """
    if family not in FAMILIES:
        raise ValueError(f"family must be one of {FAMILIES}, not {family!r}")
    fin, fout = exact_hz(input_hz), exact_hz(output_hz)
    best: PllPlan | None = None
    for plan in _CANDIDATES[family](fin):
        if best is None:
            best = plan
            continue
        error, best_error = abs(plan.output_hz - fout), abs(best.output_hz - fout)
        if error < best_error or (
                family == "ecp5" and error == best_error
                and abs(plan.vco_hz - ECP5_VCO_PREFERRED) < abs(best.vco_hz - ECP5_VCO_PREFERRED)):
            best = plan
    return best


def plan_pll(family: str, input_hz: float | Fraction, output_hz: float | Fraction, *,
             field_name: str = "clock", board: str = "the board") -> PllPlan:
    """PLL settings that make exactly ``output_hz`` from ``input_hz``.

    Raises
    ------
    UserError
        When the input is outside the PLL's range, or no setting gives the exact output;
        the message names the nearest frequency that can be made.
    """
    fin, fout = exact_hz(input_hz), exact_hz(output_hz)
    low, high = _INPUT_LIMITS[family]
    if not _within(fin, (low, high)):
        raise UserError(f"{board}'s oscillator ({_mhz(fin)}) is outside the {_FAMILY_NAME[family]} PLL's input range "
                        f"({_mhz(low)} to {_mhz(high)}); set {field_name} to {_mhz(fin)} to run without a PLL")
    best = nearest(family, fin, fout)
    if best is None:
        raise UserError(f"{_FAMILY_NAME[family]} PLL: no setting for an input of {_mhz(fin)}")
    if best.output_hz != fout:
        raise UserError(
            f"{field_name} = {_mhz(fout)!r}: {board} makes its clock with the {_FAMILY_NAME[family]} PLL from "
            f"a {_mhz(fin)} oscillator, which cannot make {_mhz(fout)} exactly (every cycle count derives "
            f"from the clock); nearest: {float(best.output_hz) / MHZ:.9g} MHz; exact choices near it: "
            f"{_exact_examples(family, fin, fout)}")
    return best


def _exact_examples(family: str, fin: Fraction, fout: Fraction, count: int = 3) -> str:
    """A few whole-kHz frequencies the PLL makes exactly, nearest ``fout`` first."""
    outputs = {plan.output_hz for plan in _CANDIDATES[family](fin) if plan.output_hz % 1000 == 0}
    if not outputs:
        return "none in whole kHz"
    ranked = sorted(outputs, key=lambda hz: (abs(hz - fout), hz))[:count]
    return ", ".join(repr(_mhz(hz)) for hz in sorted(ranked))

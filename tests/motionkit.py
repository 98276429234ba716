"""Shared helpers for the motion-profile tests: small, fast emulator configs."""

from __future__ import annotations

import copy
from typing import Any

from dvgate.config import Config, parse_config

#: A three-axis emulator that simulates long profiles quickly: 1 MHz clock, a strobe
#: every 10 ms, one rest pulse per line, pulses 1 us wide with 1 us gaps.
FAST: dict[str, Any] = {
    "clock": "1 MHz",
    "strobe": {"min_width": "3 us", "absence_timeout": "50 ms", "period": "10 ms"},
    "pulses": {"scheme": "burst", "rest": 1, "width": "1 us", "gap": "1 us"},
    "rate": {"frac_bits": 36, "clamp": 2000, "backlog": 4000, "owed_bits": 24},
    "defaults": {"weight": "0.01 m/s", "range": "16 g"},
    "channels": [{"name": "x"}, {"name": "y"}, {"name": "z"}],
}


def fast_config(source: str = "fast.toml", **sections: Any) -> Config:
    """:data:`FAST` with top-level keys or whole sections replaced (``host={...}``)."""
    raw = copy.deepcopy(FAST)
    for key, value in sections.items():
        raw[key] = value
    return parse_config(raw, source)

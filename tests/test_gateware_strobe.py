# amaranth: UnusedElaboratable=no
"""StrobeDetector against hand-worked cycles of docs/timing.md ("Strobe detector")."""

import random

import pytest

from dvgate.gateware.strobe import StrobeDetector
from dvgate.sim.testbench import run_cycles

WATCH = ("stb", "strobes", "period", "host_absent")


def run(pin_levels: list[int], *, edge_rising: bool = True, min_width_cyc: int = 3,
        absence_cyc: int = 1000) -> list[dict[str, int]]:
    dut = StrobeDetector(edge_rising=edge_rising, min_width_cyc=min_width_cyc,
                         absence_cyc=absence_cyc)
    return run_cycles(dut, [{"pin": v} for v in pin_levels], WATCH)


def pin(cycles: int, active: list[tuple[int, int]], *, rising: bool = True) -> list[int]:
    """Physical pin levels: active on [start, stop) for each pair."""
    level = [0] * cycles
    for start, stop in active:
        for k in range(start, stop):
            level[k] = 1
    return level if rising else [1 - v for v in level]


def stb_cycles(rows: list[dict[str, int]]) -> list[int]:
    return [k for k, row in enumerate(rows) if row["stb"]]


@pytest.mark.parametrize("m", [1, 2, 3, 5])
def test_strobe_at_e_plus_m_plus_1(m: int) -> None:
    # timing.md: a pin active from cycle e gives stb at cycle e + M + 1, one cycle long.
    e = 7
    rows = run(pin(40, [(e, e + 12)]), min_width_cyc=m)
    assert stb_cycles(rows) == [e + m + 1]


def test_glitch_shorter_than_m_is_ignored_and_exactly_m_is_taken() -> None:
    m = 4
    # M - 1 active cycles at 5..7: ignored. Exactly M active cycles at 20..23: taken.
    rows = run(pin(40, [(5, 5 + m - 1), (20, 20 + m)]), min_width_cyc=m)
    assert stb_cycles(rows) == [20 + m + 1]


def test_active_low_pin() -> None:
    # edge_rising=False: the pin idles high and is active low.
    rows = run(pin(30, [(4, 10)], rising=False), edge_rising=False, min_width_cyc=2)
    assert stb_cycles(rows) == [4 + 2 + 1]


def test_active_low_pin_held_high_gives_nothing() -> None:
    rows = run([1] * 30, edge_rising=False, min_width_cyc=1)
    assert stb_cycles(rows) == []


def test_long_strobe_counts_once_and_a_gap_of_one_cycle_rearms() -> None:
    # Active 3..19, idle at 20, active again 21..29: two strobes, M = 2.
    rows = run(pin(40, [(3, 20), (21, 30)]), min_width_cyc=2)
    assert stb_cycles(rows) == [3 + 3, 21 + 3]


def test_counters_period_and_host_absence() -> None:
    absence = 12
    # Strobes at cycles 6 (pin from 4) and 26 (pin from 24), M = 1.
    rows = run(pin(60, [(4, 6), (24, 26)]), min_width_cyc=1, absence_cyc=absence)
    assert stb_cycles(rows) == [6, 26]
    assert [rows[k]["strobes"] for k in (6, 7, 26, 27, 59)] == [0, 1, 1, 2, 2]
    # period(k+1) = since(k) + 1; since(6) = 6 (counted from reset), since(26) = 19.
    assert [rows[k]["period"] for k in (6, 7, 26, 27)] == [0, 7, 7, 20]
    # host_absent(k) = since(k) >= T; since(k) = k before the first strobe,
    # since(7) = 0 after it, so absence returns at 7 + 12 = 19 and clears at 27.
    absent = [k for k, row in enumerate(rows) if row["host_absent"]]
    assert absent == list(range(absence, 7)) + list(range(19, 27)) + list(range(27 + absence, 60))


@pytest.mark.parametrize(("field", "kwargs"), [
    ("min_width_cyc", {"min_width_cyc": 0, "absence_cyc": 10}),
    ("absence_cyc", {"min_width_cyc": 1, "absence_cyc": 0}),
])
def test_parameter_checks(field: str, kwargs: dict) -> None:
    with pytest.raises(ValueError, match=field):
        StrobeDetector(edge_rising=True, **kwargs)


@pytest.mark.parametrize("min_width", [1, 2, 4])
@pytest.mark.parametrize("edge_rising", [True, False])
def test_stb_next_is_next_cycles_stb(min_width, edge_rising):
    rng = random.Random(min_width)  # fixed seed: the same pin pattern every run
    level = 0
    inputs = []
    for _ in range(300):
        if rng.random() < 0.3:
            level ^= 1
        inputs.append({"pin": level if edge_rising else 1 - level})
    dut = StrobeDetector(edge_rising=edge_rising, min_width_cyc=min_width, absence_cyc=50)
    rows = run_cycles(dut, inputs, ("stb", "stb_next"))
    assert sum(r["stb"] for r in rows) > 5
    assert [r["stb_next"] for r in rows[:-1]] == [r["stb"] for r in rows[1:]]
    # two strobes never on consecutive cycles: the accumulator relies on it
    assert not any(a["stb"] and b["stb"] for a, b in zip(rows, rows[1:], strict=False))


@pytest.mark.parametrize("min_width", [1, 2, 3, 24])
@pytest.mark.parametrize("edge_rising", [True, False])
def test_in_view_is_a_strobe_still_to_come(min_width, edge_rising):
    # Its definition (the port's docstring): ``ahead_valid`` and not ``stb``, every cycle,
    # with runs long and short around the filter's length so that every value of ``ahead``
    # occurs, and runs that end before their strobe.
    rng = random.Random(100 + min_width)  # fixed seed: the same pin pattern every run
    inputs = []
    level = 0
    while len(inputs) < 1500:
        stretch = rng.randint(1, 2 * min_width + 2)
        inputs += [{"pin": level if edge_rising else 1 - level}] * stretch
        level ^= 1
    dut = StrobeDetector(edge_rising=edge_rising, min_width_cyc=min_width, absence_cyc=50)
    rows = run_cycles(dut, inputs, ("stb", "ahead_valid", "ahead", "in_view"))
    assert sum(r["stb"] for r in rows) > 10
    assert {r["ahead"] for r in rows if r["ahead_valid"]} == set(range(min_width))
    assert [r["in_view"] for r in rows] == [int(r["ahead_valid"] and not r["stb"]) for r in rows]

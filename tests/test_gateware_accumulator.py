"""RateAccumulator against hand-worked cycles of docs/timing.md ("Rate accumulator")."""

import pytest

from dvgate.gateware.accumulator import RateAccumulator
from dvgate.params import HardwareParams
from dvgate.sim.testbench import run_cycles

WATCH = ("n", "new_pos", "new_neg", "load", "clamp_evt", "defer_evt", "sat_evt", "owed")
ONE = 1 << 8  # one pulse with frac_bits = 8


def params(**changes) -> HardwareParams:
    base = dict(clock_hz=1e6, names=("x",), edge_rising=True, min_width_cyc=2, absence_cyc=100,
                scheme="burst", rest=1, width_cyc=2, gap_cyc=2, order="interleaved",
                active_low=False, frac_bits=8, rate_bits=16, owed_bits=8, clamp=4, backlog=12)
    base.update(changes)
    return HardwareParams(**base)


def run(p: HardwareParams, inputs: list[dict[str, int]]) -> list[dict[str, int]]:
    return run_cycles(RateAccumulator(p), inputs, WATCH)


def hand_over(p: HardwareParams, owed: int, *, accept: int = 1) -> tuple[dict, int]:
    """Load ``owed`` with one cycle of rate, take a strobe next cycle; (row, owed after).

    ``prepare`` comes the cycle before the take, as the strobe detector's ``stb_next`` does.
    """
    rows = run(p, [
        {"armed": 1, "rate": owed, "prepare": 1},
        {"rate": 0, "take": 1, "accept": accept, "prepare": 0},
        {"take": 0},
    ])
    assert rows[1]["owed"] == owed
    return rows[1], rows[2]["owed"]


def test_owed_integrates_rate_while_armed_and_clears_when_disarmed() -> None:
    rows = run(params(), [{"armed": 1, "rate": 100}] + [{}] * 5 + [{"armed": 0}] + [{}] * 3)
    # owed(k+1) = owed(k) + rate(k) while armed; owed(k+1) = 0 after a disarmed cycle.
    assert [r["owed"] for r in rows] == [0, 100, 200, 300, 400, 500, 600, 0, 0, 0]
    assert not any(r["sat_evt"] or r["load"] for r in rows)


@pytest.mark.parametrize(("owed", "n", "after"), [
    (640, 2, 128),            # 2.5 pulses: whole part 2, half stays owed
    (-640, -2, -128),         # -2.5: truncated toward zero, not floored to -3
    (-768, -3, 0),            # exactly -3
    (-100, 0, -100),          # under one pulse: only the rest pulses
    (4 * ONE + 1, 4, 1),      # at the clamp: no clamp event
])
def test_burst_hand_over_truncates_toward_zero(owed: int, n: int, after: int) -> None:
    p = params()
    row, owed_after = hand_over(p, owed)
    assert (row["n"], row["load"], row["clamp_evt"]) == (n, 1, 0)
    # Burst: R + max(n, 0) positive, R + max(-n, 0) negative (R = 1).
    assert (row["new_pos"], row["new_neg"]) == (1 + max(n, 0), 1 + max(-n, 0))
    assert owed_after == after


@pytest.mark.parametrize("sign", [1, -1])
def test_burst_clamp_keeps_the_rest_owed(sign: int) -> None:
    p = params()
    owed = sign * (7 * ONE + 10)  # |whole| = 7 > clamp 4
    row, owed_after = hand_over(p, owed)
    assert (row["n"], row["clamp_evt"], row["load"]) == (sign * 4, 1, 1)
    assert (row["new_pos"], row["new_neg"]) == ((5, 1) if sign > 0 else (1, 5))
    assert owed_after == sign * (3 * ONE + 10)


def test_deferred_hand_over_keeps_everything_owed_and_is_no_clamp() -> None:
    p = params()
    row, owed_after = hand_over(p, 7 * ONE, accept=0)
    # n is what the strobe asks for; nothing is taken, no clamp is counted.
    assert (row["load"], row["defer_evt"], row["clamp_evt"]) == (0, 1, 0)
    assert owed_after == 7 * ONE


def test_no_take_no_hand_over() -> None:
    rows = run(params(), [{"armed": 1, "rate": 3 * ONE}, {"rate": 0, "accept": 1}, {}])
    assert rows[1]["load"] == 0 and rows[2]["owed"] == 3 * ONE


def test_saturation_holds_the_limits_and_flags_each_cycle() -> None:
    p = params()  # owed is 16 bits: -32768 .. 32767
    rows = run(p, [{"armed": 1, "rate": p.rate_max}, {}, {}, {"rate": -p.rate_max - 1},
                   {}, {}, {}, {}])
    owed = [r["owed"] for r in rows]
    # 32767 + 32767 would wrap in 16 bits; it must hold at 32767.
    assert owed[:4] == [0, 32767, 32767, 32767]
    assert [r["sat_evt"] for r in rows[:4]] == [0, 1, 1, 0]
    # -1 + -32768 is already one below the limit.
    assert owed[4:] == [-1, -32768, -32768, -32768]
    assert [r["sat_evt"] for r in rows[4:]] == [1, 1, 1, 1]


def test_saturation_with_rate_wider_than_owed() -> None:
    p = params(rate_bits=20)  # rate up to 2**19 - 1, owed still 16 bits
    rows = run(p, [{"armed": 1, "rate": -(1 << 19)}, {"rate": 5}, {}])
    assert [r["owed"] for r in rows] == [0, -32768, -32763]
    assert [r["sat_evt"] for r in rows] == [1, 0, 0]


def test_binary_alternates_at_zero_rate() -> None:
    p = params(scheme="binary", rest=0)
    # a strobe every other cycle (the closest two can come), prepared the cycle before
    prepare = {"prepare": 1, "take": 0}
    take = {"prepare": 0, "take": 1}
    rows = run(p, [{"armed": 1, "rate": 0, "accept": 1, **prepare}] + [take, prepare] * 3)
    takes = rows[1::2]
    # owed 0 -> n = +1 -> owed -1 pulse -> n = -1 -> owed 0 -> ...
    assert [r["n"] for r in takes] == [1, -1, 1]
    assert [(r["new_pos"], r["new_neg"]) for r in takes[:2]] == [(1, 0), (0, 1)]
    assert [r["owed"] for r in rows] == [0, 0, -ONE, -ONE, 0, 0, -ONE]


def test_hand_over_is_decided_the_cycle_before() -> None:
    # prepare samples the owed amount of the next cycle; a rate change on the take's own
    # cycle does not change the hand-over (it counts toward the next one).
    p = params()
    rows = run(p, [{"armed": 1, "rate": 3 * ONE, "prepare": 1}, {"rate": 5 * ONE, "take": 1, "accept": 1,
                                                                "prepare": 0}, {"take": 0}])
    assert rows[1]["n"] == 3 and rows[2]["owed"] == 5 * ONE


@pytest.mark.parametrize(("owed", "n"), [
    (ONE, 1), (ONE - 1, 0), (0, 0), (-ONE + 1, 0), (-ONE, -1), (3 * ONE, 1),
])
def test_ternary_thresholds(owed: int, n: int) -> None:
    p = params(scheme="ternary", rest=0)
    row, owed_after = hand_over(p, owed)
    assert row["n"] == n
    assert (row["new_pos"], row["new_neg"]) == (int(n > 0), int(n < 0))
    assert owed_after == owed - n * ONE

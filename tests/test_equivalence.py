"""The Amaranth simulation of the gateware against the reference model, exactly.

Every case ends with the conservation check on both results (skipped by the check itself
when a stimulus sets an output fault). A failing case writes a VCD of the simulation next
to the test's temporary folder and names it.
"""

from __future__ import annotations

import random
from pathlib import Path

import pytest
from conftest import small_params
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from satkit import assert_covers_the_rule, saturating_stimulus

from dvgate.config import load_config
from dvgate.params import HardwareParams
from dvgate.sim.books import conservation_errors
from dvgate.sim.model import run_model, simulate
from dvgate.sim.stimulus import periodic_strobe_edges
from dvgate.sim.testbench import run_amaranth
from dvgate.sim.trace import FaultChange, Faults, RateChange, Stimulus
from dvgate.simulate import compare_results


def assert_same(params: HardwareParams, stim: Stimulus, vcd_dir: Path | None = None) -> None:
    got = run_amaranth(params, stim)
    want = run_model(params, stim)
    problems = compare_results(got, want, params.names)
    problems += [f"simulation: {p}" for p in conservation_errors(params, stim, got)]
    problems += [f"model: {p}" for p in conservation_errors(params, stim, want)]
    if problems:
        where = ""
        if vcd_dir is not None:
            vcd = vcd_dir / "failure.vcd"
            run_amaranth(params, stim, vcd_path=vcd)
            where = f"\nVCD of the simulation: {vcd}"
        pytest.fail("simulation (first) and model (second) differ:\n" + "\n".join(problems) + where)


def strobes(cycles: int, period: int, width: int, first: int = 3) -> tuple[int, ...]:
    return periodic_strobe_edges(cycles, period, width, first=first)


def many(n: int, **changes: object) -> HardwareParams:
    names = tuple(f"c{i}" for i in range(n))
    changes.setdefault("init_rates", tuple(((i * 37) % 23 - 11) * 9 for i in range(n)))
    return small_params(names=names, **changes)


@pytest.mark.parametrize("scheme", ["binary", "ternary", "burst"])
@pytest.mark.parametrize("order", ["interleaved", "grouped"])
def test_each_scheme(scheme, order, tmp_path):
    params = many(3, scheme=scheme, order=order, rest=2 if scheme == "burst" else 0,
                  backlog=20 if scheme == "burst" else 2)
    stim = Stimulus(cycles=600, strobe_edges=strobes(600, 37, 3),
                    rate_changes=(RateChange(200, 1, 150), RateChange(350, 0, -250)))
    assert_same(params, stim, tmp_path)


@pytest.mark.parametrize("n", [1, 3, 6, 16])
def test_channel_counts(n, tmp_path):
    params = many(n, rest=1)
    cycles = 700 if n < 16 else 300
    assert_same(params, Stimulus(cycles=cycles, strobe_edges=strobes(cycles, 41, 2)), tmp_path)


@pytest.mark.parametrize("width, gap, rest", [(1, 1, 0), (1, 3, 1), (3, 1, 2), (4, 4, 3)])
def test_widths_gaps_rests(width, gap, rest, tmp_path):
    params = many(2, width_cyc=width, gap_cyc=gap, rest=rest, clamp=3, backlog=3 + 2 * rest + 4)
    assert_same(params, Stimulus(cycles=800, strobe_edges=strobes(800, 53, 3)), tmp_path)


def test_latency_same_for_every_channel_count(tmp_path):
    for n in (1, 4, 16):
        params = many(n, init_rates=(0,) * n, rest=1)
        stim = Stimulus(cycles=60, strobe_edges=(20, 23))
        got = run_amaranth(params, stim)
        assert {min(e.rise for e in got.edges if e.channel == ch) for ch in range(n)} == {20 + params.latency_cyc}
        assert_same(params, stim, tmp_path)


def test_rate_change_in_the_middle_of_a_burst(tmp_path):
    params = small_params(rest=2, init_rates=(200,), clamp=8, backlog=30)
    # stb at 13; the burst runs for about 10 pulses x 3 cycles; change the rate at 20, 21 and 25
    stim = Stimulus(cycles=120, strobe_edges=(10, 12, 60, 62),
                    rate_changes=(RateChange(20, 0, -300), RateChange(21, 0, 7), RateChange(25, 0, -1)))
    assert_same(params, stim, tmp_path)


def test_several_channels_change_on_one_cycle(tmp_path):
    params = many(4)
    changes = tuple(RateChange(100, ch, 40 * ch - 70) for ch in range(4))
    assert_same(params, Stimulus(cycles=300, strobe_edges=strobes(300, 29, 2), rate_changes=changes), tmp_path)


def test_strobe_jitter(tmp_path):
    rng = random.Random(7)  # fixed seed: the same jittered strobe every run
    edges, t = [], 5
    while t < 900:
        width = rng.randint(2, 5)
        edges += [t, t + width]
        t += 40 + rng.randint(-6, 6)
    params = many(3, rest=1)
    assert_same(params, Stimulus(cycles=920, strobe_edges=tuple(edges)), tmp_path)


@pytest.mark.parametrize("edge_rising", [True, False])
def test_glitches_ignored_and_just_long_enough_taken(edge_rising, tmp_path):
    params = small_params(min_width_cyc=4, edge_rising=edge_rising)
    # glitches of 1, 2 and 3 cycles (ignored), then strobes of exactly 4 and of 5 cycles (taken)
    edges = (10, 11, 20, 22, 30, 33, 40, 44, 60, 65)
    got = run_amaranth(params, Stimulus(cycles=100, strobe_edges=edges))
    assert got.status.strobes == 2
    assert_same(params, Stimulus(cycles=100, strobe_edges=edges), tmp_path)


def test_strobe_during_burst_overruns_and_loses_nothing(tmp_path):
    params = small_params(rest=2, init_rates=(100,), clamp=4, backlog=40)
    stim = Stimulus(cycles=200, strobe_edges=strobes(200, 9, 2))  # bursts of 5+ pulses take 15+ cycles
    got = run_amaranth(params, stim)
    assert got.status.overrun and got.status.overruns > 0
    assert_same(params, stim, tmp_path)


def test_clamp_and_backlog_limit(tmp_path):
    params = small_params(rest=1, init_rates=(900,), clamp=2, backlog=6, owed_bits=6)
    stim = Stimulus(cycles=300, strobe_edges=strobes(300, 7, 2))
    got = run_amaranth(params, stim)
    assert got.status.clamped and got.status.deferred
    assert_same(params, stim, tmp_path)


def test_saturation_flagged(tmp_path):
    params = small_params(rest=0, init_rates=(2047,), clamp=1, owed_bits=4)
    stim = Stimulus(cycles=120, strobe_edges=strobes(120, 30, 2))
    assert run_amaranth(params, stim).status.saturated
    assert_same(params, stim, tmp_path)


# The saturation rule's hand-worked runs of tests/test_model.py, on the gateware: a mark
# counted once at the next take, two stretches counted once, none after the last take, a
# mark kept through an ignored and a disarmed strobe, the take's own cycle left to the next.
SAT_RULE = {
    "before a take": ((0,), Stimulus(cycles=60, strobe_edges=(20, 23, 40, 43),
                                     rate_changes=(RateChange(5, 0, 2047), RateChange(8, 0, 0)))),
    "two stretches": ((0,), Stimulus(cycles=60, strobe_edges=(0, 3, 20, 23, 40, 43),
                                     rate_changes=(RateChange(5, 0, 2047), RateChange(8, 0, 0),
                                                   RateChange(12, 0, -2048), RateChange(16, 0, 0)))),
    "after the last take": ((0,), Stimulus(cycles=60, strobe_edges=(20, 23),
                                           rate_changes=(RateChange(30, 0, 2047), RateChange(34, 0, 0)))),
    "ignored and disarmed": ((0,), Stimulus(cycles=70, strobe_edges=(20, 23, 40, 43, 60, 63),
                                            rate_changes=(RateChange(5, 0, 2047), RateChange(8, 0, 0)),
                                            arm_changes=((0, True), (38, False), (48, True)),
                                            ignore_windows=((20, 10),))),
    "the take's own cycle": ((75,), Stimulus(cycles=44, strobe_edges=(20, 23, 40, 43),
                                             rate_changes=(RateChange(23, 0, 2047), RateChange(24, 0, 0)))),
}


@pytest.mark.parametrize("case", list(SAT_RULE))
def test_saturation_rule(case, tmp_path):
    rates, stim = SAT_RULE[case]
    params = small_params(owed_bits=4, clamp=2, rest=0, init_rates=rates)
    want = {"before a take": 1, "two stretches": 1, "after the last take": 0, "ignored and disarmed": 1,
            "the take's own cycle": 1}[case]
    assert run_amaranth(params, stim).status.saturations == want
    assert_same(params, stim, tmp_path)


@pytest.mark.parametrize("seed", range(6))
def test_saturation_with_ignore_windows_and_disarming(seed, tmp_path):
    rng = random.Random(seed)  # fixed seeds: the same runs every time
    params = many(3, owed_bits=4, clamp=2, rest=rng.randint(0, 2), backlog=12,
                  scheme=rng.choice(["burst", "binary", "ternary"]))
    stim = saturating_stimulus(params, rng, 700)
    assert_covers_the_rule(simulate(params, stim))
    assert_same(params, stim, tmp_path)


def test_disarmed_outputs_idle(tmp_path):
    params = many(2, active_low=True, rest=1)
    stim = Stimulus(cycles=400, strobe_edges=strobes(400, 23, 2),
                    arm_changes=((0, False), (50, True), (130, False), (200, True), (333, False)))
    got = run_amaranth(params, stim)
    armed = [(51, 131), (201, 334)]
    assert got.edges and all(any(a <= e.rise and (e.fall or 400) <= b for a, b in armed) for e in got.edges)
    assert_same(params, stim, tmp_path)


def test_never_armed_stays_idle(tmp_path):
    params = many(2)
    stim = Stimulus(cycles=200, strobe_edges=strobes(200, 23, 2), arm_changes=())
    got = run_amaranth(params, stim)
    assert got.edges == () and got.status.strobes > 0
    assert_same(params, stim, tmp_path)


def test_armed_again_on_the_last_cycle(tmp_path):
    # Re-armed so that the outputs are armed from cycle N itself: the books at N are those
    # of an arming at N (nothing owed yet), not of the earlier armed stretch. Found by the
    # random test below.
    params = many(1, scheme="binary", rest=0)
    stim = Stimulus(cycles=23, strobe_edges=(), arm_changes=((0, True), (1, False), (22, True)))
    assert_same(params, stim, tmp_path)


def test_example_config(tmp_path):
    config = load_config("dvgate/examples/bench.toml")
    # a shortened strobe period so a few strobes fit in a quick run
    stim = Stimulus(cycles=3000, strobe_edges=strobes(3000, 1400, config.strobe_width_cyc, first=600))
    assert_same(config.hw, stim, tmp_path)


@st.composite
def cases(draw):
    n = draw(st.integers(1, 4))
    scheme = draw(st.sampled_from(["binary", "ternary", "burst"]))
    rest = draw(st.integers(0, 3)) if scheme == "burst" else 0
    clamp = draw(st.integers(1, 6))
    width, gap = draw(st.integers(1, 4)), draw(st.integers(1, 4))
    frac = draw(st.integers(2, 8))
    rate_bits = draw(st.integers(frac - 1, frac + 3)) if frac > 2 else 3
    rate_bits = max(rate_bits, 2)
    lim = (1 << (rate_bits - 1)) - 1
    rate = st.integers(-lim - 1, lim)
    per = 2 * rest + clamp if scheme == "burst" else 1
    params = HardwareParams(
        clock_hz=1e6, names=tuple(f"c{i}" for i in range(n)), edge_rising=draw(st.booleans()),
        min_width_cyc=draw(st.integers(1, 4)), absence_cyc=draw(st.integers(1, 200)), scheme=scheme, rest=rest,
        width_cyc=width, gap_cyc=gap, order=draw(st.sampled_from(["interleaved", "grouped"])),
        active_low=draw(st.booleans()), frac_bits=frac, rate_bits=rate_bits,
        owed_bits=draw(st.integers(clamp.bit_length() + 2, 8)), clamp=clamp,
        backlog=draw(st.integers(per, per + 10)), init_rates=tuple(draw(rate) for _ in range(n)),
    )
    cycles = draw(st.integers(20, 400))
    edges = sorted(draw(st.sets(st.integers(0, cycles - 1), max_size=30)))
    change_cycles = sorted(draw(st.sets(st.integers(n, cycles - 1), max_size=4)))
    changes, last = [], -10
    for c in change_cycles:
        if c - last > n:  # the register port needs a cycle per channel written
            changes.append(RateChange(c, draw(st.integers(0, n - 1)), draw(rate)))
            last = c
    arms = [(0, True)]
    for c in sorted(draw(st.sets(st.integers(1, cycles - 1), max_size=3))):
        arms.append((c, not arms[-1][1]))
    # Faults: one port write per cycle, so distinct cycles (up to N: a change at N shows at N).
    faults = tuple(FaultChange(c, draw(st.integers(0, n - 1)), draw(fault_sets()))
                   for c in sorted(draw(st.sets(st.integers(1, cycles), max_size=3))))
    windows = tuple((c, draw(st.integers(1, 80)))
                    for c in sorted(draw(st.sets(st.integers(1, cycles), max_size=2))))
    return params, Stimulus(cycles=cycles, strobe_edges=tuple(edges), rate_changes=tuple(changes),
                            arm_changes=tuple(arms), fault_changes=faults, ignore_windows=windows)


@st.composite
def fault_sets(draw):
    """A channel's fault set: each fault now and then, a storm of any period (the width included)."""
    flag = st.sampled_from([False, False, False, True])  # each output fault about one time in four
    return Faults(silence_pos=draw(flag), silence_neg=draw(flag), stuck_pos=draw(flag), stuck_neg=draw(flag),
                  swap=draw(flag), no_rest=draw(st.booleans()),
                  storm_period=draw(st.one_of(st.just(0), st.integers(1, 12))), storm_neg=draw(st.booleans()))


@settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(cases())
def test_random_configs_and_programs(case):
    params, stim = case
    assert_same(params, stim)


def test_disarm_on_the_last_cycle(tmp_path):
    # Arm falls at N - 1, so cycle N is the first disarmed one: its output is idle, the books are N's.
    params = HardwareParams(
        clock_hz=1e6, names=("c0",), edge_rising=False, min_width_cyc=3, absence_cyc=50, scheme="burst", rest=1,
        width_cyc=1, gap_cyc=2, order="interleaved", active_low=False, frac_bits=2, rate_bits=3, owed_bits=3,
        clamp=1, backlog=3, init_rates=(1,),
    )
    stim = Stimulus(cycles=20, strobe_edges=(9,), arm_changes=((0, True), (1, False), (2, True), (19, False)))
    assert_same(params, stim, tmp_path)

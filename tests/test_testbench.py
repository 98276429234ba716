# amaranth: UnusedElaboratable=no
"""The Amaranth testbench runner and the Emulator top, on hand-worked runs of docs/timing.md."""

import dataclasses

import pytest

from dvgate.gateware.top import Emulator, write_verilog
from dvgate.params import HardwareParams
from dvgate.sim.testbench import input_plan, run_amaranth
from dvgate.sim.trace import NEG, POS, ChannelState, Edge, RateChange, Stimulus


def params(**changes) -> HardwareParams:
    base = dict(clock_hz=12e6, names=("x", "y", "z"), edge_rising=True, min_width_cyc=3,
                absence_cyc=1000, scheme="burst", rest=1, width_cyc=2, gap_cyc=2,
                order="interleaved", active_low=False, frac_bits=8, rate_bits=16, owed_bits=8,
                clamp=4, backlog=12, init_rates=(100, -50, 0))
    base.update(changes)
    return HardwareParams(**base)


def armed_at(stim: Stimulus, cycle: int) -> bool:
    """armed(k) = arm(k - 1), armed(0) = 0."""
    level = False
    for at, value in stim.arm_changes:
        if at <= cycle - 1:
            level = bool(value)
    return cycle >= 1 and level


def rate_at(p: HardwareParams, stim: Stimulus, channel: int, cycle: int) -> int:
    rate = p.rates[channel]
    for change in stim.rate_changes:
        if change.channel == channel and change.cycle <= cycle:
            rate = change.rate
    return rate


def assert_conserved(p: HardwareParams, stim: Stimulus, result) -> None:
    """docs/timing.md "Conservation", at cycle N for a run armed from cycle 0 on."""
    assert not result.status.saturated
    for ch, books in enumerate(result.channels):
        pos, neg = result.counts(ch)
        owed_total = sum(rate_at(p, stim, ch, j) for j in range(stim.cycles) if armed_at(stim, j))
        net = pos - neg + books.pend_pos - books.pend_neg
        assert (net << p.frac_bits) + books.owed == owed_total, f"channel {ch}"


# Two strobes (pin active at 10 and 60) with rate changes at 50, N = 120.
HAND_STIM = Stimulus(cycles=120, strobe_edges=(10, 14, 60, 64),
                     rate_changes=(RateChange(50, 0, 400), RateChange(50, 2, -300)))


def hand_edges() -> tuple[Edge, ...]:
    """HAND_STIM worked by hand from docs/timing.md.

    stb at 14 (= 10 + M + 1); owed(14) = 13 cycles of rate (armed from 1):
    x: 1300 -> whole 5, clamp 4: 5 pos + 1 neg; owed(15) = 1300 + 100 - 1024 = 376.
    y: -650 -> whole -2 (toward zero): 1 pos + 3 neg; owed(15) = -188.
    z: 0 -> rest only: 1 pos + 1 neg; owed(15) = 0.
    stb at 64: x: 376 + 35 * 100 + 14 * 400 = 9476 -> clamp 4: 5 pos + 1 neg.
    y: -188 - 49 * 50 = -2638 -> clamp -4; z: -14 * 300 = -4200 -> clamp -4: 1 pos + 5 neg.
    Starts at 14 and 64, one every W + G = 4 cycles, rising a cycle later;
    interleaved: while both lines wait, the line other than the last one started
    (negative at reset, so x starts its second burst on neg, y and z on pos).
    """
    def train(ch, start, lines):
        return [Edge(ch, line, start + 1 + 4 * i, start + 3 + 4 * i) for i, line in enumerate(lines)]
    P, N = POS, NEG
    edges = (train(0, 14, [P, N, P, P, P, P]) + train(1, 14, [P, N, N, N]) + train(2, 14, [P, N])
             + train(0, 64, [N, P, P, P, P, P]) + train(1, 64, [P] + [N] * 5)
             + train(2, 64, [P] + [N] * 5))
    return tuple(sorted(edges))


def test_hand_worked_run() -> None:
    p = params()
    result = run_amaranth(p, HAND_STIM)
    assert result.cycles == 120
    assert result.edges == hand_edges()
    s = result.status
    assert (s.strobes, s.period, s.host_absent) == (2, 50, False)
    assert (s.overrun, s.clamped, s.deferred, s.saturated) == (False, True, False, False)
    assert (s.overruns, s.clamps, s.deferrals, s.saturations) == (0, 2, 0, 0)
    # owed(120) = owed(65) + 55 cycles of rate; owed(65) = owed(64) + rate - n * 256.
    assert result.channels == (
        ChannelState(9476 + 400 - 1024 + 55 * 400, 0, 0),
        ChannelState(-2638 - 50 + 1024 - 55 * 50, 0, 0),
        ChannelState(-4200 - 300 + 1024 - 55 * 300, 0, 0),
    )
    assert_conserved(p, HAND_STIM, result)


def test_polarity_and_strobe_edge_do_not_change_logical_results() -> None:
    base = run_amaranth(params(), HAND_STIM)
    other = run_amaranth(params(active_low=True, edge_rising=False), HAND_STIM)
    assert other == base


@pytest.mark.parametrize("m", [1, 4])
def test_latency_is_m_plus_2_on_every_channel(m: int) -> None:
    p = params(min_width_cyc=m)
    e = 20
    result = run_amaranth(p, Stimulus(cycles=40, strobe_edges=(e, e + m)))
    firsts = [min(edge.rise for edge in result.edges if edge.channel == ch) for ch in range(p.n)]
    assert firsts == [e + p.latency_cyc] * p.n == [e + m + 2] * p.n


def test_disarm_cuts_the_pulse_and_clears_the_books() -> None:
    # Disarmed from arm's change at 27: armed(28) = 0, so pulses rising at 27 end at 28.
    stim = Stimulus(cycles=40, strobe_edges=(10, 14), arm_changes=((0, True), (27, False)))
    result = run_amaranth(params(), stim)
    cut = [e for e in hand_edges() if e.rise < 27] + [Edge(0, POS, 27, 28), Edge(1, NEG, 27, 28)]
    assert result.edges == tuple(sorted(cut))
    assert result.channels == (ChannelState(0, 0, 0),) * 3
    assert result.status.strobes == 1  # the detector runs whether armed or not


def test_strobe_before_arming_is_not_taken() -> None:
    # arm from 20: armed from 21, owed counts from 21; the strobe at 14 is ignored.
    stim = Stimulus(cycles=30, strobe_edges=(10, 14), arm_changes=((20, True),))
    result = run_amaranth(params(), stim)
    assert result.edges == ()
    assert [c.owed for c in result.channels] == [9 * 100, 9 * -50, 0]


def test_rate_change_takes_effect_at_its_cycle() -> None:
    p = params(init_rates=(3, 0, 0))
    stim = Stimulus(cycles=50, rate_changes=(
        RateChange(5, 0, 11), RateChange(5, 1, 1), RateChange(5, 2, 2), RateChange(6, 1, -4),
        RateChange(30, 0, 7)))
    result = run_amaranth(p, stim)
    # armed from 1: x = 3 * 4 (1..4) + 11 * 25 (5..29) + 7 * 20 (30..49);
    # y = 1 (5) - 4 * 44 (6..49); z = 2 * 45 (5..49).
    assert [c.owed for c in result.channels] == [12 + 275 + 140, 1 - 4 * 44, 2 * 45]


def test_input_plan_writes_before_the_change_and_commits_last() -> None:
    p = params()
    stim = Stimulus(cycles=20, rate_changes=(
        RateChange(10, 2, 5), RateChange(10, 0, -7), RateChange(10, 2, 6), RateChange(11, 1, 9)))
    plan = input_plan(p, stim)
    # Channel 2's second change replaces its first: two writes, at 8 and 9.
    assert plan[8] == {"rate_addr": 2, "rate_data": 6, "rate_we": 1, "rate_commit": 0}
    assert plan[9] == {"rate_addr": 0, "rate_data": -7, "rate_we": 1, "rate_commit": 1}
    assert plan[10] == {"rate_addr": 1, "rate_data": 9, "rate_we": 1, "rate_commit": 1}
    assert plan[11] == {"rate_we": 0, "rate_commit": 0}
    assert plan[0] == {"strobe": 0, "arm": 1, "rate_we": 0, "rate_commit": 0}


@pytest.mark.parametrize(("changes", "match"), [
    ((RateChange(1, 0, 5), RateChange(1, 1, 5)), "rate changes at cycle 1.*cycle 0 comes first"),
    ((RateChange(10, 0, 5), RateChange(11, 1, 5), RateChange(11, 2, 5)),
     "rate changes at cycle 11.*write cycles 9 to 10.*commit of the changes at cycle 10"),
    ((RateChange(5, 3, 5),), "channel is 3, allowed 0 to 2"),
    ((RateChange(5, 0, 1 << 15),), "rate is 32768, allowed -32768 to 32767"),
])
def test_input_plan_refuses_what_the_port_cannot_write(changes, match: str) -> None:
    stim = Stimulus(cycles=20, rate_changes=changes)
    with pytest.raises(ValueError, match=match):
        input_plan(params(), stim)
    with pytest.raises(ValueError, match=match):
        run_amaranth(params(), stim)


def test_overrun_and_deferral() -> None:
    # Binary, M = 1, W = G = 2, backlog 1; pin active at 10, 12, 14: stb at 12, 14, 16.
    p = params(names=("x",), init_rates=(0,), scheme="binary", rest=0, min_width_cyc=1,
               backlog=1, clamp=1, owed_bits=3)
    stim = Stimulus(cycles=30, strobe_edges=(10, 11, 12, 13, 14, 15))
    result = run_amaranth(p, stim)
    # 12: idle, +1 (owed 0), starts at 12. 14: HIGH -> overrun; -1 joins the backlog.
    # 16: GAP (timer 0) -> overrun; 1 pending + 1 new > 1 -> deferred; the -1 starts.
    assert result.edges == (Edge(0, POS, 13, 15), Edge(0, NEG, 17, 19))
    s = result.status
    assert (s.strobes, s.period) == (3, 2)
    assert (s.overrun, s.deferred, s.clamped, s.saturated) == (True, True, False, False)
    assert (s.overruns, s.deferrals, s.clamps, s.saturations) == (2, 1, 0, 0)
    assert result.channels == (ChannelState(0, 0, 0),)
    assert_conserved(p, stim, result)


def test_host_absent_and_pulse_still_high_at_the_end() -> None:
    p = params(absence_cyc=10, width_cyc=8)
    result = run_amaranth(p, Stimulus(cycles=30, strobe_edges=(10, 14)))
    # stb at 14, since(15) = 0 -> since(30) = 15 >= 10. Pulses every 10 cycles from 15:
    # x goes pos, then neg at 25, still high at cycle 30.
    assert result.status.host_absent
    assert result.edges[:2] == (Edge(0, POS, 15, 23), Edge(0, NEG, 25, None))


def test_conservation_under_overruns_and_rate_changes() -> None:
    p = params(backlog=8, width_cyc=3, gap_cyc=1, order="grouped", owed_bits=10)
    edges = tuple(x for k in range(5, 600, 23) for x in (k, k + 3))
    changes = tuple(RateChange(c, ch, r) for c, ch, r in
                    [(100, 0, 200), (100, 1, -150), (250, 2, 60), (250, 0, -100), (401, 1, 5)])
    stim = Stimulus(cycles=592, strobe_edges=edges, rate_changes=changes)  # ends mid-burst
    result = run_amaranth(p, stim)
    assert result.status.overruns > 0 and result.status.deferrals > 0
    assert any(c.pend_pos + c.pend_neg for c in result.channels)
    assert_conserved(p, stim, result)


def test_vcd_is_written(tmp_path) -> None:
    path = tmp_path / "run.vcd"
    result = run_amaranth(params(), Stimulus(cycles=30, strobe_edges=(10, 14)), vcd_path=path)
    text = path.read_text()
    assert "$enddefinitions" in text and "x_pos" in text
    assert result == run_amaranth(params(), Stimulus(cycles=30, strobe_edges=(10, 14)))


def test_write_verilog(tmp_path) -> None:
    path = tmp_path / "top.v"
    text = write_verilog(params(), path)
    assert path.read_text() == text
    assert "module dvgate_top" in text
    for port in ("strobe", "arm", "rate_addr", "rate_data", "rate_we", "rate_commit",
                 "x_pos", "x_neg", "z_neg", "strobes", "period", "host_absent", "flags",
                 "overruns", "clamps", "deferrals", "saturations"):
        assert f" {port};" in text, port


@pytest.mark.parametrize(("names", "match"), [
    (("x", "x-axis"), "channel name 'x-axis'"),
    (("x", "x"), "channel names must differ"),
])
def test_emulator_refuses_bad_channel_names(names, match: str) -> None:
    p = dataclasses.replace(params(), names=names, init_rates=())
    with pytest.raises(ValueError, match=match):
        Emulator(p)


def _plan_by_hand(p: HardwareParams, stim: Stimulus) -> dict[int, dict[str, int]]:
    """The plan's rules (docs/timing.md, "Cycles and stimulus"; input_plan's docstring), cycle by cycle.

    Independent of input_writes: dictionaries updated in the order the rules apply.
    """
    plan: dict[int, dict[str, int]] = {0: {"strobe": 0 if p.edge_rising else 1, "arm": 0, "rate_we": 0,
                                           "rate_commit": 0}}
    level = plan[0]["strobe"]
    for edge in stim.strobe_edges:
        if edge < stim.cycles:
            level ^= 1
            plan.setdefault(edge, {})["strobe"] = level
    for cycle, arm in stim.arm_changes:
        if cycle < stim.cycles:
            plan.setdefault(cycle, {})["arm"] = int(arm)
    groups: dict[int, dict[int, int]] = {}
    for change in stim.rate_changes:
        groups.setdefault(change.cycle, {})[change.channel] = change.rate
    for cycle, rates in groups.items():
        for j, (channel, rate) in enumerate(rates.items()):
            plan.setdefault(cycle - len(rates) + j, {}).update(
                rate_addr=channel, rate_data=rate, rate_we=1, rate_commit=int(j == len(rates) - 1))
        plan.setdefault(cycle, {}).setdefault("rate_we", 0)
        plan[cycle].setdefault("rate_commit", 0)
    return {c: plan[c] for c in sorted(plan) if c < stim.cycles}


@pytest.mark.parametrize("seed", range(6))
def test_input_plan_of_the_compact_forms_is_the_same(seed: int) -> None:
    # Long runs hold their strobe edges and rate changes as arrays (Cycles, RateChanges);
    # the plan is the same as from the tuples, and as the rules worked out by hand.
    import random

    from dvgate.sim.trace import Cycles, RateChanges

    rng = random.Random(seed)
    p = params(edge_rising=bool(seed % 2))
    changes, cycle = [], 0
    while len(changes) < 300:
        cycle += rng.choice([4, 4, 5, 9, 30])
        for channel in rng.sample(range(3), rng.randint(1, 3)):
            changes.append(RateChange(cycle, channel, rng.randint(-500, 500)))
        if rng.random() < 0.2:  # a second change of one channel at the same cycle replaces the first
            changes.append(RateChange(cycle, changes[-1].channel, rng.randint(-500, 500)))
    edges = sorted(rng.sample(range(cycle + 50), 400))
    n_cyc = cycle - rng.randint(0, 40)  # the last changes may fall beyond the run
    tuples = Stimulus(cycles=n_cyc, strobe_edges=tuple(edges), rate_changes=tuple(changes),
                      arm_changes=((0, True), (n_cyc // 2, False)))
    compact = dataclasses.replace(tuples, strobe_edges=Cycles(edges), rate_changes=RateChanges.of(tuple(changes)))
    assert compact == tuples
    plan = input_plan(p, tuples)
    assert plan == _plan_by_hand(p, tuples)
    assert input_plan(p, compact) == plan
    assert list(input_plan(p, compact)) == sorted(plan)


def test_input_writes_are_the_plan_as_arrays() -> None:
    from dvgate.sim.testbench import PLAN_PORTS, input_writes

    p = params()
    stim = Stimulus(cycles=20, strobe_edges=(0, 4), rate_changes=(
        RateChange(10, 2, 5), RateChange(10, 0, -7), RateChange(10, 2, 6), RateChange(11, 1, 9)))
    writes = input_writes(p, stim)
    rows = [(c, PLAN_PORTS[k], v) for c, k, v in zip(writes.cycle.tolist(), writes.port.tolist(),
                                                      writes.value.tolist(), strict=True)]
    # One entry per cycle and port, in cycle order, then port order; the edge at 0 replaces the idle level.
    assert rows == [(0, "strobe", 1), (0, "arm", 1), (0, "rate_we", 0), (0, "rate_commit", 0), (4, "strobe", 0),
                    (8, "rate_we", 1), (8, "rate_commit", 0), (8, "rate_addr", 2), (8, "rate_data", 6),
                    (9, "rate_we", 1), (9, "rate_commit", 1), (9, "rate_addr", 0), (9, "rate_data", -7),
                    (10, "rate_we", 1), (10, "rate_commit", 1), (10, "rate_addr", 1), (10, "rate_data", 9),
                    (11, "rate_we", 0), (11, "rate_commit", 0)]
    assert [c for c, *_ in rows if _[0] == "strobe"] == [0, 4]
    assert len(input_writes(p, stim, strobe=False).cycle) == len(rows) - 1  # only the idle level at 0


@pytest.mark.parametrize(("changes", "match"), [
    (((1, 0, 5), (1, 1, 5)), "rate changes at cycle 1.*cycle 0 comes first"),
    (((10, 0, 5), (11, 1, 5), (11, 2, 5)),
     "rate changes at cycle 11.*write cycles 9 to 10.*commit of the changes at cycle 10"),
    (((5, 0, 1), (6, 3, 5)), "rate change at cycle 6: channel is 3, allowed 0 to 2"),
    (((5, 0, 1 << 15),), "rate change at cycle 5: rate is 32768, allowed -32768 to 32767"),
])
def test_compact_rate_changes_are_refused_with_the_same_messages(changes, match: str) -> None:
    from dvgate.sim.trace import RateChanges

    cycles, channels, rates = zip(*changes, strict=True)
    stim = Stimulus(cycles=20, rate_changes=RateChanges(cycles, channels, rates))
    with pytest.raises(ValueError, match=match):
        input_plan(params(), stim)

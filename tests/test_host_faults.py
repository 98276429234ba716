"""Each fault kind, seen by the computer: a liveness alarm, or counts changed exactly as the
model predicts (and the compiled gateware agrees with the model on every run)."""

import pytest
from conftest import need_tool
from motionkit import fast_config

from dvgate.sim.host import host_timing, host_view, pulse_counts, read_cycles
from dvgate.sim.model import run_model
from dvgate.sim.stimulus import stimulus_for
from dvgate.sim.trace import FaultChange, Faults

# 1 MHz clock, a strobe every 10 ms; the computer reads every 10 ms and calls a line dead
# after 25 ms without a pulse. x at 1 g, y and z at rest.
CFG = fast_config(host={"cycle": "10 ms", "silence": "25 ms"},
                  channels=[{"name": "x", "rate": "1 g"}, {"name": "y"}, {"name": "z"}])
SECONDS = 0.3
AT = 100_000  # the fault takes effect 0.1 s in


def view_of(stim):
    result = run_model(CFG.hw, stim)
    timing = host_timing(CFG)
    reads = read_cycles(timing, 0, stim.cycles)
    return result, host_view(pulse_counts(result, reads, CFG.hw.n), CFG, timing, start=0, stop=stim.cycles)


def with_faults(faults=(), ignore=()):
    base = stimulus_for(CFG, SECONDS)
    return type(base)(cycles=base.cycles, strobe_edges=base.strobe_edges, fault_changes=tuple(faults),
                      ignore_windows=tuple(ignore))


def alarms(view):
    return sorted((a.channel, a.line) for a in view.alarms)


@pytest.fixture(scope="module")
def baseline():
    return view_of(with_faults())


def check_engine_agrees(stim, result):
    need_tool("g++")
    from dvgate.sim.compiled import run_compiled

    assert run_compiled(CFG.hw, stim) == result


def test_no_fault_no_alarm(baseline):
    _, view = baseline
    assert alarms(view) == []


@pytest.mark.parametrize("fault, dead", [
    (Faults(silence_pos=True), [("x", "pos")]),
    (Faults(stuck_neg=True), [("x", "neg")]),  # held active: no new pulse edges reach the counter
    (Faults(silence_pos=True, silence_neg=True), [("x", "neg"), ("x", "pos")]),
])
def test_line_faults_trip_the_liveness_alarm(fault, dead):
    stim = with_faults([FaultChange(AT, 0, fault)])
    result, view = view_of(stim)
    assert alarms(view) == dead
    check_engine_agrees(stim, result)


def test_no_rest_at_zero_input_silences_both_lines():
    stim = with_faults([FaultChange(AT, 1, Faults(no_rest=True))])
    result, view = view_of(stim)
    assert alarms(view) == [("y", "neg"), ("y", "pos")]
    check_engine_agrees(stim, result)


def test_storm_adds_exactly_the_predicted_pulses(baseline):
    base_result, base_view = baseline
    stim = with_faults([FaultChange(AT, 2, Faults(storm_period=1000))])  # one extra pulse every 1 ms on z pos
    result, view = view_of(stim)
    extra = result.counts(2)[0] - base_result.counts(2)[0]
    assert extra == pytest.approx(200, abs=2)  # 0.2 s at one per ms, less any that merge with rest pulses
    assert view.counts[-1, 2] - base_view.counts[-1, 2] == extra  # the computer counts them all
    assert alarms(view) == []
    check_engine_agrees(stim, result)


def test_swap_reverses_the_counted_velocity(baseline):
    _, base_view = baseline
    stim = with_faults([FaultChange(AT, 0, Faults(swap=True))])
    result, view = view_of(stim)
    before = view.reads <= AT
    assert (view.counts[before, 0] == base_view.counts[before, 0]).all()
    # after the swap the computer sees x decelerate at the rate it accelerated before
    assert view.delta[-5:, 0].tolist() == [-d for d in base_view.delta[-5:, 0].tolist()]
    check_engine_agrees(stim, result)


def test_ignored_strobes_silence_every_line_and_lose_nothing(baseline):
    base_result, _ = baseline
    stim = with_faults(ignore=[(AT, 60_000)])  # 60 ms: six strobes not taken
    result, view = view_of(stim)
    assert result.status.ignored == 6
    assert alarms(view) == [(ch, line) for ch in ("x", "y", "z") for line in ("neg", "pos")]
    # the owed velocity is handed over at the next taken strobe: the totals come back
    net = lambda r: r.counts(0)[0] - r.counts(0)[1]  # noqa: E731
    assert net(result) == net(base_result)
    check_engine_agrees(stim, result)

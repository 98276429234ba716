# amaranth: UnusedElaboratable=no
"""Fault injection (docs/timing.md, "Fault injection"): hand-worked cases on the model, each
also run on the Amaranth simulation, which must match the model exactly.

The base run (``small_params``: M = 2, W = 2, G = 1, rest 1, interleaved, rate 64/256
pulse per tick, armed from cycle 1): the pin is active 10..12, so the strobe is taken at
13 with 12 ticks owed = 3 pulses: rest 1 + 3 positive and rest 1 negative, starting at 13,
16, 19, 22, 25 and rising a cycle later:

    pos [14, 16) [20, 22) [23, 25) [26, 28)       neg [17, 19)
"""

from __future__ import annotations

import dataclasses

import pytest
from conftest import small_params
from test_equivalence import assert_same

from dvgate.gateware.faults import FaultLayout, pack_faults
from dvgate.gateware.top import write_verilog
from dvgate.sim.books import conservation_errors
from dvgate.sim.model import run_model, simulate
from dvgate.sim.testbench import input_plan
from dvgate.sim.trace import NEG, POS, Edge, FaultChange, Faults, RateChange, Stimulus

FAULT_BITS = FaultLayout.as_shape().size
BASE_POS = [(14, 16), (20, 22), (23, 25), (26, 28)]
BASE_NEG = [(17, 19)]


def base(cycles: int = 40, **fields) -> Stimulus:
    return Stimulus(cycles=cycles, strobe_edges=(10, 13), **fields)


def lines(result, channel: int = 0) -> tuple[list, list]:
    """The pulses of a channel's positive and negative outputs as ``(rise, fall)``."""
    pos = [(e.rise, e.fall) for e in result.edges if e.channel == channel and e.line == POS]
    neg = [(e.rise, e.fall) for e in result.edges if e.channel == channel and e.line == NEG]
    return pos, neg


def test_base_run_without_faults(tmp_path):
    params = small_params()
    assert lines(run_model(params, base())) == (BASE_POS, BASE_NEG)
    assert_same(params, base(), tmp_path)


def test_silence_cuts_a_pulse_and_hides_the_next(tmp_path):
    params = small_params()
    stim = base(fault_changes=(FaultChange(21, 0, Faults(silence_pos=True)), FaultChange(25, 0, Faults())))
    result = run_model(params, stim)
    # [20, 22) is cut at 21; [23, 25) lies wholly in the silenced cycles 21..24.
    assert lines(result) == ([(14, 16), (20, 21), (26, 28)], BASE_NEG)
    # The books are those of the run without the fault: the emitter played all its pulses.
    assert result.channels == run_model(params, base()).channels
    assert_same(params, stim, tmp_path)


def test_stuck_lines(tmp_path):
    params = small_params()
    stim = base(fault_changes=(FaultChange(20, 0, Faults(stuck_neg=True)), FaultChange(30, 0, Faults()),
                               FaultChange(33, 0, Faults(stuck_pos=True))))
    result = run_model(params, stim)
    # neg held 20..29 (one pulse, apart from [17, 19)); pos held from 33, open at the end (N = 40).
    assert lines(result) == (BASE_POS + [(33, None)], BASE_NEG + [(20, 30)])
    assert_same(params, stim, tmp_path)


def test_stuck_line_is_cut_by_disarming(tmp_path):
    params = small_params()
    # arm low at 8 and high again at 20: armed 1..8 and from 21 (armed(k+1) = arm(k)).
    stim = base(fault_changes=(FaultChange(5, 0, Faults(stuck_pos=True)),),
                arm_changes=((0, True), (8, False), (20, True)))
    result = run_model(params, stim)
    # The strobe at 13 finds the outputs disarmed: no pulse of the emitter at all.
    assert lines(result) == ([(5, 9), (21, None)], [])
    assert_same(params, stim, tmp_path)


def test_swap_in_the_middle_of_a_pulse(tmp_path):
    params = small_params()
    stim = base(fault_changes=(FaultChange(18, 0, Faults(swap=True)),))
    result = run_model(params, stim)
    # Up to 17 the outputs show their own lines; from 18 each shows the other: the
    # negative pulse [17, 19) is split between the two outputs.
    assert lines(result) == ([(14, 16), (18, 19)], [(17, 18), (20, 22), (23, 25), (26, 28)])
    assert_same(params, stim, tmp_path)


def test_no_rest_drops_the_rest_pulses(tmp_path):
    params = small_params()
    stim = base(fault_changes=(FaultChange(5, 0, Faults(no_rest=True)),))
    result = run_model(params, stim)
    # The same 3 net pulses, without the rest pair: 3 positive, one every W + G = 3 cycles.
    assert lines(result) == ([(14, 16), (17, 19), (20, 22)], [])
    assert result.channels == run_model(params, base()).channels  # rest pulses cancel in the books
    assert conservation_errors(params, stim, result) == []
    # At zero rate the strobe asks for nothing at all.
    quiet = small_params(init_rates=(0,))
    assert lines(run_model(quiet, base())) == ([(14, 16)], [(17, 19)])
    assert lines(run_model(quiet, stim)) == ([], [])
    assert_same(params, stim, tmp_path)
    assert_same(quiet, stim, tmp_path)


def test_no_rest_only_where_it_is_set(tmp_path):
    params = small_params()
    # Set 5..12, cleared at 13: the hand-over at 13 has its rest pulses again.
    stim = base(fault_changes=(FaultChange(5, 0, Faults(no_rest=True)), FaultChange(13, 0, Faults())))
    assert lines(run_model(params, stim)) == (BASE_POS, BASE_NEG)
    # Set at 13 exactly: the hand-over at 13 has none.
    stim = base(fault_changes=(FaultChange(13, 0, Faults(no_rest=True)),))
    assert lines(run_model(params, stim)) == ([(14, 16), (17, 19), (20, 22)], [])
    assert_same(params, stim, tmp_path)


def test_storm_merges_with_the_line_pulses(tmp_path):
    params = small_params()
    stim = base(fault_changes=(FaultChange(16, 0, Faults(storm_period=6)),))
    result = run_model(params, stim)
    # Storm active where (k - 16) mod 6 < 2: [16, 18) [22, 24) [28, 30) [34, 36) [40, ...).
    # It touches [14, 16) and [26, 28) and bridges [20, 22) and [23, 25): one pulse each.
    assert lines(result) == ([(14, 18), (20, 25), (26, 30), (34, 36), (40, None)], BASE_NEG)
    assert result.channels == run_model(params, base()).channels
    assert conservation_errors(params, stim, result) == []  # skipped: pins differ from the books
    assert_same(params, stim, tmp_path)


def test_storm_on_the_negative_line(tmp_path):
    params = small_params()
    stim = base(fault_changes=(FaultChange(16, 0, Faults(storm_period=4, storm_neg=True)),))
    # (k - 16) mod 4 < 2: [16, 18) overlaps [17, 19) -> [16, 19); then every 4 cycles.
    neg = [(16, 19), (20, 22), (24, 26), (28, 30), (32, 34), (36, 38), (40, None)]
    assert lines(run_model(params, stim)) == (BASE_POS, neg)
    assert_same(params, stim, tmp_path)


def test_every_write_restarts_the_storm(tmp_path):
    params = small_params(init_rates=(0,))  # rest pulses only: pos [14, 16), neg [17, 19)
    storm = Faults(storm_period=7)
    stim = base(fault_changes=(FaultChange(20, 0, storm), FaultChange(24, 0, dataclasses.replace(storm, swap=True)),
                               FaultChange(30, 0, storm)))
    # 20: [20, 22); rewritten at 24 (same period): [24, 26), its next pulse would be at 31;
    # written again at 30: [30, 32) [37, 39). The swap shows no line pulse: none after 19.
    assert lines(run_model(params, stim)) == ([(14, 16), (20, 22), (24, 26), (30, 32), (37, 39)], [(17, 19)])
    assert_same(params, stim, tmp_path)


@pytest.mark.parametrize("period", [1, 2])
def test_storm_period_up_to_the_width_holds_the_line(period, tmp_path):
    params = small_params()  # W = 2
    stim = base(fault_changes=(FaultChange(30, 0, Faults(storm_period=period)),))
    assert lines(run_model(params, stim)) == (BASE_POS + [(30, None)], BASE_NEG)
    assert_same(params, stim, tmp_path)


def test_storm_and_silence_on_one_line(tmp_path):
    params = small_params()
    # Silence wins over the storm and the line on the same output; the other line is untouched.
    stim = base(fault_changes=(FaultChange(16, 0, Faults(storm_period=6, silence_pos=True)),))
    assert lines(run_model(params, stim)) == ([(14, 16)], BASE_NEG)
    assert_same(params, stim, tmp_path)


def test_storm_is_gated_by_armed(tmp_path):
    params = small_params()
    # arm low at 34, high at 38: disarmed 35..38. Storm (k - 16) mod 6 < 2 from 16.
    stim = base(fault_changes=(FaultChange(16, 0, Faults(storm_period=6)),),
                arm_changes=((0, True), (34, False), (38, True)))
    # [34, 36) is cut to [34, 35); [40, ...) is armed again.
    assert lines(run_model(params, stim)) == ([(14, 18), (20, 25), (26, 30), (34, 35), (40, None)], BASE_NEG)
    assert_same(params, stim, tmp_path)


def test_faults_of_one_channel_leave_the_others_alone(tmp_path):
    params = small_params(names=("x", "y", "z"), init_rates=(64, -64, 0))
    stim = base(fault_changes=(FaultChange(15, 1, Faults(swap=True, storm_period=5)),
                               FaultChange(16, 0, Faults(stuck_neg=True))))
    faulted = run_model(params, stim)
    clean = run_model(params, base())
    assert lines(faulted, 2) == lines(clean, 2)
    assert lines(faulted, 0)[0] == lines(clean, 0)[0]  # channel 0's positive output
    assert_same(params, stim, tmp_path)


# -- ignore windows: pin active at 10, 30, 50, 70 -> strobes detected at 13, 33, 53, 73.
IGNORE_EDGES = (10, 12, 30, 32, 50, 52, 70, 72)


def test_ignore_windows(tmp_path):
    params = small_params()
    # 30..39 holds the strobe at 33; 50..79 is cut at 60 by the next window (60..60): 53 is ignored,
    # 73 is taken.
    stim = Stimulus(cycles=100, strobe_edges=IGNORE_EDGES, ignore_windows=((30, 10), (50, 30), (60, 1)))
    result = run_model(params, stim)
    assert result.status.strobes == 4 and result.status.ignored == 2
    # owed(73) = 64 (left at 14) + 59 ticks x 64 = 3840: 15 whole, clamped to 4 -> 5 positive + 1 negative;
    # the last line started was positive, so the negative one first.
    second_pos = [(77, 79), (80, 82), (83, 85), (86, 88), (89, 91)]
    assert lines(result) == (BASE_POS + second_pos, BASE_NEG + [(74, 76)])
    assert result.status.clamps == 1
    assert conservation_errors(params, stim, result) == []
    assert_same(params, stim, tmp_path)


def test_window_replaced_by_a_later_one(tmp_path):
    params = small_params()
    # Without the second window the strobe at 73 would be ignored too.
    one = Stimulus(cycles=100, strobe_edges=IGNORE_EDGES, ignore_windows=((50, 30),))
    two = Stimulus(cycles=100, strobe_edges=IGNORE_EDGES, ignore_windows=((50, 30), (60, 1)))
    assert run_model(params, one).status.ignored == 2
    assert run_model(params, two).status.ignored == 1
    assert_same(params, one, tmp_path)
    assert_same(params, two, tmp_path)


def test_ignored_strobe_is_no_overrun(tmp_path):
    params = small_params()
    # A second strobe at 23 falls in the burst of the first (14..27): an overrun, unless ignored.
    edges = (10, 12, 20, 22)
    plain = run_model(params, Stimulus(cycles=60, strobe_edges=edges))
    assert plain.status.overruns == 1
    stim = Stimulus(cycles=60, strobe_edges=edges, ignore_windows=((23, 1),))
    ignored = run_model(params, stim)
    assert ignored.status.overruns == 0 and ignored.status.ignored == 1
    assert lines(ignored) == (BASE_POS, BASE_NEG)
    assert_same(params, stim, tmp_path)


def test_ignored_counts_while_disarmed(tmp_path):
    params = small_params()
    stim = Stimulus(cycles=100, strobe_edges=IGNORE_EDGES, arm_changes=(), ignore_windows=((5, 60),))
    result = run_model(params, stim)
    assert result.edges == () and result.status.strobes == 4 and result.status.ignored == 3
    assert_same(params, stim, tmp_path)


def test_ignored_saturates():
    params = small_params(min_width_cyc=1)
    # Pin active one cycle in two: a strobe every 2 cycles, 70000 of them, all in one window.
    cycles = 140_010
    edges = tuple(range(2, cycles - 4))
    stim = Stimulus(cycles=cycles, strobe_edges=edges, arm_changes=(), ignore_windows=((1, cycles),))
    result = run_model(params, stim)
    assert result.status.strobes > 65535 and result.status.ignored == 65535


def test_fault_change_on_the_last_cycle_shows(tmp_path):
    params = small_params()
    stim = base(fault_changes=(FaultChange(40, 0, Faults(stuck_neg=True)),))  # N = 40
    assert lines(run_model(params, stim)) == (BASE_POS, BASE_NEG + [(40, None)])
    assert_same(params, stim, tmp_path)


def test_counts_without_recording_match_the_edges():
    params = small_params()
    stim = base(fault_changes=(FaultChange(16, 0, Faults(storm_period=6)), FaultChange(30, 0, Faults(swap=True))))
    counted = simulate(params, stim, record=False)
    assert counted.result.edges == ()
    assert counted.counts == [run_model(params, stim).counts(0)]


# -- the ports and the stimulus checks


def test_fault_ports():
    text = write_verilog(small_params(names=("x", "y", "z")))
    # fault_addr as wide as rate_addr (2 bits for 3 channels); fault_data is the packed FaultLayout.
    for port in ("input [1:0] rate_addr;", "input [1:0] fault_addr;", f"input [{FAULT_BITS - 1}:0] fault_data;",
                 "input fault_we;", "input ignore_we;", "input [31:0] ignore_cycles;", "output [15:0] ignored;"):
        assert f"  {port}" in text, port


def test_pack_faults_places_each_field():
    assert pack_faults(Faults()) == 0
    assert pack_faults(Faults(silence_pos=True)) == 1
    assert pack_faults(Faults(no_rest=True)) == 1 << 5
    assert pack_faults(Faults(storm_period=0xFFFF)) == 0xFFFF << 6
    assert pack_faults(Faults(storm_neg=True)) == 1 << 22


def test_plan_writes_faults_and_windows_the_cycle_before():
    params = small_params(names=("x", "y"))
    storm = Faults(storm_period=9)
    stim = Stimulus(cycles=50, fault_changes=(FaultChange(10, 1, storm),), ignore_windows=((20, 7),))
    plan = input_plan(params, stim)
    assert plan[9] == {"fault_addr": 1, "fault_data": pack_faults(storm), "fault_we": 1}
    assert plan[10] == {"fault_we": 0}
    assert plan[19] == {"ignore_we": 1, "ignore_cycles": 7}
    assert plan[20] == {"ignore_we": 0}
    # A stimulus without faults leaves the new ports out of the plan (they are 0 at reset).
    assert not any(k.startswith(("fault", "ignore")) for row in input_plan(params, Stimulus(cycles=50)).values()
                   for k in row)


def test_plan_refuses_two_channels_on_one_cycle():
    params = small_params(names=("x", "y"))
    stim = Stimulus(cycles=50, fault_changes=(FaultChange(10, 0, Faults(swap=True)),
                                              FaultChange(10, 1, Faults(swap=True))))
    with pytest.raises(ValueError, match=r"fault changes at cycle 10: channels 0 and 1 both need the fault port "
                                         r"at cycle 9"):
        input_plan(params, stim)
    assert run_model(params, stim).edges == ()  # the model itself has no port to share


def test_plan_refuses_an_unknown_channel():
    with pytest.raises(ValueError, match="fault change at cycle 5: channel is 3, allowed 0 to 0"):
        input_plan(small_params(), Stimulus(cycles=50, fault_changes=(FaultChange(5, 3, Faults()),)))


def test_plan_refuses_a_window_longer_than_the_port():
    with pytest.raises(ValueError, match=r"ignore window at cycle 5: length is 4294967296, allowed 1 to 4294967295"):
        input_plan(small_params(), Stimulus(cycles=50, ignore_windows=((5, 1 << 32),)))


@pytest.mark.parametrize("fields, message", [
    ({"fault_changes": (FaultChange(9, 0, Faults()), FaultChange(5, 0, Faults()))},
     "fault_changes must be sorted by cycle"),
    ({"fault_changes": (FaultChange(0, 0, Faults()),)}, "fault change at cycle 0: changes start at cycle 1"),
    ({"fault_changes": (FaultChange(5, 0, Faults()), FaultChange(5, 0, Faults(swap=True)))},
     "fault changes at cycle 5: channel 0 is set twice"),
    ({"ignore_windows": ((9, 1), (9, 2))}, "ignore_windows must be strictly increasing in cycle"),
    ({"ignore_windows": ((0, 4),)}, "ignore window at cycle 0: windows start at cycle 1"),
    ({"ignore_windows": ((3, 0),)}, "ignore window at cycle 3: length is 0, allowed 1 or more"),
])
def test_stimulus_checks(fields, message):
    with pytest.raises(ValueError, match=message):
        Stimulus(cycles=50, **fields)


@pytest.mark.parametrize("period", [-1, 1 << 16, 2.5])
def test_storm_period_checked(period):
    with pytest.raises(ValueError, match=f"storm_period must be an integer from 0 \\(off\\) to 65535 cycles, "
                                         f"not {period!r}"):
        Faults(storm_period=period)


def test_faults_with_rate_changes_and_bursts(tmp_path):
    # A busier run: two channels, several strobes, rate changes, every kind of fault in turn.
    params = small_params(names=("x", "y"), init_rates=(90, -40), rest=2, clamp=3, backlog=20)
    changes = (FaultChange(30, 0, Faults(storm_period=9, storm_neg=True)), FaultChange(45, 1, Faults(swap=True)),
               FaultChange(70, 0, Faults(no_rest=True, silence_neg=True)), FaultChange(95, 1, Faults(stuck_pos=True)),
               FaultChange(120, 0, Faults()), FaultChange(121, 1, Faults(storm_period=3)))
    stim = Stimulus(cycles=200, strobe_edges=tuple(c for s in range(5, 200, 23) for c in (s, s + 2)),
                    rate_changes=(RateChange(60, 0, -120), RateChange(100, 1, 200)),
                    fault_changes=changes, ignore_windows=((50, 20), (140, 3)))
    assert_same(params, stim, tmp_path)
    assert run_model(params, stim).edges != run_model(params, dataclasses.replace(stim, fault_changes=())).edges


def test_edges_are_logical_with_active_low_outputs(tmp_path):
    params = small_params(active_low=True)
    stim = base(fault_changes=(FaultChange(18, 0, Faults(swap=True)), FaultChange(33, 0, Faults(stuck_pos=True))))
    assert lines(run_model(params, stim)) == ([(14, 16), (18, 19), (33, None)],
                                              [(17, 18), (20, 22), (23, 25), (26, 28)])
    assert_same(params, stim, tmp_path)
    assert Edge(0, POS, 33, None) in run_model(params, stim).edges

"""The fault stage alone, cycle by cycle (docs/timing.md, "Fault injection")."""

import dataclasses

from conftest import small_params

from dvgate.gateware.faults import FaultStage
from dvgate.sim.testbench import run_cycles
from dvgate.sim.trace import Faults

WATCH = ["pos", "neg", "phase", "faults.no_rest"]


def drive(rows: int, writes: dict[int, Faults], **levels: dict[int, int]) -> list[dict[str, int]]:
    """Run a stage (W = 2) for ``rows`` cycles: fault writes and input levels by cycle."""
    inputs = []
    for k in range(rows):
        fields = dataclasses.asdict(writes.get(k, Faults()))
        row = {"we": int(k in writes), "data": {name: int(v) for name, v in fields.items()}}
        for port, at in levels.items():
            row[port] = at.get(k, 0)
        inputs.append(row)
    return run_cycles(FaultStage(small_params()), inputs, WATCH)


def test_storm_counts_from_the_cycle_the_set_holds():
    armed = dict.fromkeys(range(20), 1)
    rows = drive(14, {2: Faults(storm_period=3)}, armed_next=armed)
    # Written at 2, in force from 3: active where (k - 3) mod 3 < 2.
    assert [r["pos"] for r in rows] == [0, 0, 0, 1, 1, 0, 1, 1, 0, 1, 1, 0, 1, 1]
    assert [r["phase"] for r in rows][3:9] == [0, 1, 2, 0, 1, 2]
    assert not any(r["neg"] for r in rows)


def test_outputs_follow_the_next_line_values_through_the_set():
    armed = dict.fromkeys(range(1, 20), 1)
    line_pos = {3: 1, 4: 1, 9: 1}
    line_neg = {6: 1}
    rows = drive(12, {5: Faults(swap=True, no_rest=True), 8: Faults(silence_pos=True, stuck_neg=True)},
                 armed_next=armed, line_pos_next=line_pos, line_neg_next=line_neg)
    # A next value at k shows at k + 1; the set written at k holds from k + 1.
    assert [r["pos"] for r in rows] == [0, 0, 0, 0, 1, 1, 0, 1, 0, 0, 0, 0]
    assert [r["neg"] for r in rows] == [0, 0, 0, 0, 0, 0, 0, 0, 0, 1, 1, 1]
    assert [r["faults.no_rest"] for r in rows] == [0] * 6 + [1] * 3 + [0] * 3


def test_disarmed_outputs_are_idle_even_when_stuck():
    rows = drive(8, {1: Faults(stuck_pos=True, stuck_neg=True)}, armed_next={3: 1, 4: 1})
    assert [(r["pos"], r["neg"]) for r in rows] == [(0, 0)] * 4 + [(1, 1)] * 2 + [(0, 0)] * 2

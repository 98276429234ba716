# amaranth: UnusedElaboratable=no
"""The status logic both tops share, against docs/timing.md ("Status")."""

import pytest
from amaranth.hdl import Module, Signal
from amaranth.lib import wiring
from amaranth.lib.wiring import In, Out

from dvgate.gateware.top import StatusFlags, status_logic
from dvgate.sim.testbench import run_cycles

#: The counters' width (docs/timing.md, "Status": 16 bits, saturating).
TOP = (1 << 16) - 1


class StatusHarness(wiring.Component):
    """``status_logic`` of two channels, its inputs as ports."""

    def __init__(self, late_events: bool) -> None:
        self._late = late_events
        super().__init__()

    take: In(1)
    overrun: In(2)
    clamped: In(2)
    deferred: In(2)
    sat_evt: In(2)
    flags: Out(StatusFlags)
    overruns: Out(16)
    clamps: Out(16)
    deferrals: Out(16)
    saturations: Out(16)

    def elaborate(self, platform) -> Module:
        m = Module()
        overrun, clamped, deferred = Signal(2), Signal(2), Signal(2)
        # The events only in a cycle that takes a strobe, as the tops drive them.
        m.d.comb += [overrun.eq(self.overrun & self.take.replicate(2)),
                     clamped.eq(self.clamped & self.take.replicate(2)),
                     deferred.eq(self.deferred & self.take.replicate(2))]
        status_logic(m, self, self.take, overrun, clamped, deferred, self.sat_evt, late_events=self._late)
        return m


@pytest.mark.parametrize("late_events", [False, True])
def test_counters_count_events_and_stop_at_the_top(late_events: bool):
    # An overrun on every cycle for longer than the counter's range; one deferral and a
    # saturation mark taken by a later strobe; no clamp. Counting the events a cycle
    # later (the shared top) shows the same values on every cycle.
    n = TOP + 5
    inputs = [{"take": 1, "overrun": 0b10}] * n
    inputs[3] = {"take": 1, "overrun": 0b10, "deferred": 0b01}
    inputs[4] = {"take": 0, "overrun": 0b10, "deferred": 0, "sat_evt": 0b01}
    inputs[5] = {"take": 1, "overrun": 0b10, "sat_evt": 0}
    rows = run_cycles(StatusHarness(late_events), inputs, ("overruns", "deferrals", "clamps", "saturations",
                                                "flags.overrun", "flags.clamped", "flags.deferred",
                                                "flags.saturated"))
    # Every flag and counter is a register: an event at cycle k shows from k + 1.
    assert [r["overruns"] for r in rows[:6]] == [0, 1, 2, 3, 4, 4]
    assert rows[TOP + 1]["overruns"] == TOP
    assert rows[TOP + 2]["overruns"] == TOP and rows[-1]["overruns"] == TOP
    assert [r["deferrals"] for r in rows[3:6]] == [0, 1, 1] and rows[-1]["deferrals"] == 1
    assert [r["saturations"] for r in rows[5:8]] == [0, 1, 1]
    assert rows[-1]["clamps"] == 0 and not rows[-1]["flags.clamped"]
    assert rows[0]["flags.overrun"] == 0 and rows[1]["flags.overrun"] == 1
    assert rows[-1]["flags.deferred"] and rows[-1]["flags.saturated"]

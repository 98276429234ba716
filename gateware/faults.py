"""Output fault stage: one channel's fault set, the storm generator and the output registers.

Cycle rules: ``docs/timing.md``, section "Fault injection".
"""

from amaranth.hdl import Module, Mux, Signal
from amaranth.lib import data, wiring
from amaranth.lib.wiring import In, Out

from dvgate.params import STORM_PERIOD_BITS, HardwareParams
from dvgate.sim.trace import Faults


# No ``from __future__ import annotations`` here: a data.Struct reads its annotations as shapes.
class FaultLayout(data.Struct):
    """One channel's fault set, as written through the fault port (the fields of :class:`Faults`)."""

    silence_pos: 1
    silence_neg: 1
    stuck_pos: 1
    stuck_neg: 1
    swap: 1
    no_rest: 1
    storm_period: STORM_PERIOD_BITS
    storm_neg: 1


def pack_faults(faults: Faults) -> int:
    """The value of ``fault_data`` that writes ``faults``.

    Parameters
    ----------
    faults : Faults
        The fault set.

    Returns
    -------
    int
        The bits of :class:`FaultLayout`, as an unsigned integer.
    """
    fields = {name: int(getattr(faults, name)) for name, _ in data.Layout.cast(FaultLayout)}
    return FaultLayout.const(fields).as_bits()


class FaultStage(wiring.Component):
    """The fault set of one channel and its output lines, between the emitter and the pins.

    A set written at cycle ``k`` is in force from ``k + 1``. The output registers take
    their cycle ``k + 1`` value from the emitter's lines, ``armed`` and the fault set of
    cycle ``k + 1``, so the outputs come straight from flip-flops, as without faults::

        a = line_neg if swap else line_pos          b = line_pos if swap else line_neg
        pos = armed & (stuck_pos | (~silence_pos & (a | storm on pos)))
        neg = armed & (stuck_neg | (~silence_neg & (b | storm on neg)))

    The storm is active while ``phase < width_cyc``, where ``phase`` counts the cycles
    since the set took effect modulo ``storm_period`` (every write restarts it at 0).
    A period of ``width_cyc`` or less therefore holds the storm line active.

    Parameters
    ----------
    params : HardwareParams
        The pulse width (the storm's pulses are as wide as the emitter's).

    Attributes
    ----------
    we : Signal(1), in
        Write ``data`` as this channel's fault set this cycle.
    data : FaultLayout, in
        The fault set to write.
    line_pos_next, line_neg_next : Signal(1), in
        The emitter's logical lines next cycle (the values its output registers take).
    armed_next : Signal(1), in
        The value ``armed`` has next cycle.
    faults : FaultLayout, out
        The fault set in force (a register; the accumulator reads ``no_rest``).
    phase : Signal(STORM_PERIOD_BITS), out
        Cycles since the set took effect, modulo the storm period (a register; 0 with no storm).
    pos, neg : Signal(1), out
        Logical output lines (registers).
    """

    def __init__(self, params: HardwareParams) -> None:
        self._width = params.width_cyc
        super().__init__({
            "we": In(1),
            "data": In(FaultLayout),
            "line_pos_next": In(1),
            "line_neg_next": In(1),
            "armed_next": In(1),
            "faults": Out(FaultLayout),
            "phase": Out(STORM_PERIOD_BITS),
            "pos": Out(1),
            "neg": Out(1),
        })

    def elaborate(self, platform) -> Module:
        m = Module()

        set_next   = Signal(FaultLayout)
        phase_inc  = Signal(STORM_PERIOD_BITS + 1)
        phase_next = Signal.like(self.phase)
        storm      = Signal()
        a          = Signal()
        b          = Signal()

        m.d.comb += set_next.eq(self.faults)
        with m.If(self.we):
            m.d.comb += set_next.eq(self.data)

        # The period in force now decides the wrap; a write starts the count again.
        m.d.comb += phase_inc.eq(self.phase + 1)
        with m.If(self.we | (phase_inc >= self.faults.storm_period)):
            m.d.comb += phase_next.eq(0)
        with m.Else():
            m.d.comb += phase_next.eq(phase_inc)

        f = set_next
        m.d.comb += [
            storm.eq((f.storm_period != 0) & (phase_next < self._width)),
            a.eq(Mux(f.swap, self.line_neg_next, self.line_pos_next)),
            b.eq(Mux(f.swap, self.line_pos_next, self.line_neg_next)),
        ]
        m.d.sync += [
            self.faults.eq(set_next),
            self.phase.eq(phase_next),
            self.pos.eq(self.armed_next & (f.stuck_pos | (~f.silence_pos & (a | (storm & ~f.storm_neg))))),
            self.neg.eq(self.armed_next & (f.stuck_neg | (~f.silence_neg & (b | (storm & f.storm_neg))))),
        ]
        return m

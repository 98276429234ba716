"""Pulse-pair emitter: turns handed-over counts into pulses on a positive and a negative line.

Cycle rules: ``docs/timing.md``, section "Pulse-pair emitter".
"""

from __future__ import annotations

from amaranth.hdl import Module, Mux, Signal
from amaranth.lib import enum, wiring
from amaranth.lib.wiring import In, Out

from dvgate.gateware.accumulator import count_shape
from dvgate.params import HardwareParams

#: Values of the ``last`` register (same numbering as ``dvgate.sim.trace``).
POS, NEG = 0, 1


class Mode(enum.Enum, shape=2):
    """What an emitter's lines are doing."""

    IDLE = 0
    HIGH = 1
    GAP = 2


class PulseEmitter(wiring.Component):
    """Pending pulses of one channel, played out ``width_cyc`` high and ``gap_cyc`` low.

    A start at cycle ``k`` drives the chosen line from ``k + 1`` for exactly
    ``width_cyc`` cycles; the next start comes ``gap_cyc`` cycles after the line falls,
    so pulses on a busy channel rise ``width_cyc + gap_cyc`` cycles apart.

    The output lines are flip-flops: their next value is gated with ``armed_next``
    (the value ``armed`` takes next cycle), so ``pos``/``neg`` equal
    ``line & armed`` of ``docs/timing.md`` with no gate after the register.

    Parameters
    ----------
    params : HardwareParams
        Width, gap, order and backlog.

    Attributes
    ----------
    load : Signal(1), in
        Take ``new_pos``/``new_neg`` this cycle (only with ``accept`` high).
    new_pos, new_neg : Signal(unsigned), in
        Pulses handed over on each line.
    armed : Signal(1), in
        While low the emitter is cleared: idle, nothing pending, ``last`` negative.
    armed_next : Signal(1), in
        The value ``armed`` has next cycle; gates the output registers.
    accept : Signal(1), out
        ``pend_pos + pend_neg + new_pos + new_neg <= backlog`` (combinational).
    busy : Signal(1), out
        The emitter is not idle (a strobe taken now is an overrun).
    pos, neg : Signal(1), out
        Logical output lines (registered, already gated with ``armed``).
    line_pos_next, line_neg_next : Signal(1), out
        The values ``pos`` and ``neg`` take next cycle (combinational), for a stage that
        registers the lines again after changing them (the fault stage).
    pend_pos, pend_neg : Signal(range(backlog + 1)), out
        Pulses waiting on each line (not counting one being played).
    """

    def __init__(self, params: HardwareParams) -> None:
        self._params = params
        super().__init__({
            "load": In(1),
            "new_pos": In(count_shape(params)),
            "new_neg": In(count_shape(params)),
            "armed": In(1),
            "armed_next": In(1),
            "accept": Out(1),
            "busy": Out(1),
            "pos": Out(1),
            "neg": Out(1),
            "line_pos_next": Out(1),
            "line_neg_next": Out(1),
            "pend_pos": Out(range(params.backlog + 1)),
            "pend_neg": Out(range(params.backlog + 1)),
        })

    def elaborate(self, platform) -> Module:
        m = Module()
        p = self._params

        mode       = Signal(Mode)
        timer      = Signal(range(max(p.width_cyc, p.gap_cyc, 2)))
        last       = Signal(init=NEG)
        avail_pos  = Signal(range(2 * p.backlog + 1))
        avail_neg  = Signal(range(2 * p.backlog + 1))
        may_start  = Signal()
        pick       = Signal()
        mode_next  = Signal(Mode)
        timer_next = Signal.like(timer)
        last_next  = Signal.like(last)
        pos_next   = Signal.like(self.pend_pos)
        neg_next   = Signal.like(self.pend_neg)

        # One sum per line serves both the backlog check and the load.
        sum_pos = Signal.like(avail_pos)
        sum_neg = Signal.like(avail_neg)
        m.d.comb += [
            sum_pos.eq(self.pend_pos + self.new_pos),
            sum_neg.eq(self.pend_neg + self.new_neg),
            self.accept.eq(sum_pos + sum_neg <= p.backlog),
            self.busy.eq(mode != Mode.IDLE),
            avail_pos.eq(Mux(self.load, sum_pos, self.pend_pos)),
            avail_neg.eq(Mux(self.load, sum_neg, self.pend_neg)),
            may_start.eq((mode == Mode.IDLE) | ((mode == Mode.GAP) & (timer == 0))),
        ]
        # Whether a line has a pulse to play comes from the registers and the hand-over's
        # counts, not from the sums, so the choice does not wait for the adders.
        has_pos = Signal()
        has_neg = Signal()
        start   = Signal()
        dec_pos = Signal()
        dec_neg = Signal()
        m.d.comb += [
            has_pos.eq((self.pend_pos != 0) | (self.load & (self.new_pos != 0))),
            has_neg.eq((self.pend_neg != 0) | (self.load & (self.new_neg != 0))),
        ]
        if p.order == "interleaved":
            # Both lines waiting: the one not started last; else the one that waits.
            m.d.comb += pick.eq(Mux(has_pos & has_neg, ~last, ~has_pos))
        else:
            m.d.comb += pick.eq(~has_pos)
        m.d.comb += [
            start.eq(self.armed & may_start & (has_pos | has_neg)),
            dec_pos.eq(start & (pick == POS)),
            dec_neg.eq(start & (pick == NEG)),
        ]

        # Defaults: hold the state; the pending counts take the new pulses and give the
        # one started.
        m.d.comb += [
            mode_next.eq(mode),
            timer_next.eq(timer),
            last_next.eq(last),
            pos_next.eq(avail_pos - dec_pos),
            neg_next.eq(avail_neg - dec_neg),
        ]
        with m.If(~self.armed):
            m.d.comb += [
                mode_next.eq(Mode.IDLE),
                timer_next.eq(0),
                last_next.eq(NEG),
                pos_next.eq(0),
                neg_next.eq(0),
            ]
        with m.Elif(start):
            m.d.comb += [
                mode_next.eq(Mode.HIGH),
                timer_next.eq(p.width_cyc - 1),
                last_next.eq(pick),
            ]
        with m.Elif(may_start):
            m.d.comb += mode_next.eq(Mode.IDLE)
        with m.Elif((mode == Mode.HIGH) & (timer == 0)):
            m.d.comb += [
                mode_next.eq(Mode.GAP),
                timer_next.eq(p.gap_cyc - 1),
            ]
        with m.Elif(timer != 0):
            m.d.comb += timer_next.eq(timer - 1)

        high_next = (mode_next == Mode.HIGH) & self.armed_next
        m.d.comb += [
            self.line_pos_next.eq(high_next & (last_next == POS)),
            self.line_neg_next.eq(high_next & (last_next == NEG)),
        ]
        m.d.sync += [
            mode.eq(mode_next),
            timer.eq(timer_next),
            last.eq(last_next),
            self.pend_pos.eq(pos_next),
            self.pend_neg.eq(neg_next),
            self.pos.eq(self.line_pos_next),
            self.neg.eq(self.line_neg_next),
        ]
        return m

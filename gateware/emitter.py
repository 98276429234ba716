"""Pulse-pair emitter: turns handed-over counts into pulses on a positive and a negative line.

Cycle rules: ``docs/timing.md``, section "Pulse-pair emitter".
"""

from __future__ import annotations

from amaranth.hdl import Const, Module, Mux, Signal, Value, signed
from amaranth.lib import enum, wiring
from amaranth.lib.wiring import In, Out

from dvgate.gateware.accumulator import count_shape
from dvgate.params import HardwareParams

#: Values of the ``last`` register (same numbering as ``dvgate.sim.trace``).
POS, NEG = 0, 1


class Mode(enum.Enum, shape=2):
    """What an emitter's lines are doing.

    :class:`PulseEmitter` keeps no phase register: its ``mode`` counts the cycles left in
    the pulse period, and is ``IDLE`` (0) exactly when the emitter is idle.
    """

    IDLE = 0
    HIGH = 1
    GAP = 2


def above(value: Value, limit: int) -> Value:
    """``value > limit`` for a constant ``limit``, as plain logic.

    Synthesis builds a compare with a constant as a carry chain whose result needs a
    cell of its own to leave the chain; a few LUTs on the bits are smaller and shallower.

    Parameters
    ----------
    value : Value
        Unsigned.
    limit : int
        The constant.

    Returns
    -------
    Value
        One bit.
    """
    if limit < 0:
        return Const(1)
    if limit >= (1 << len(value)) - 1:
        return Const(0)
    # Greater at bit i: a 1 where the limit has a 0, every 1 of the limit above it matched.
    # (Requiring the limit's 0s above to match too would change nothing: a 1 there is
    # itself a term of the OR.)
    greater = Const(0)
    matched = Const(1)
    for i in reversed(range(len(value))):
        if (limit >> i) & 1:
            matched = matched & value[i]
        else:
            greater = greater | (matched & value[i])
    return greater


class PulseEmitter(wiring.Component):
    """Pending pulses of one channel, played out ``width_cyc`` high and ``gap_cyc`` low.

    A start at cycle ``k`` drives the chosen line from ``k + 1`` for exactly
    ``width_cyc`` cycles; the next start comes ``gap_cyc`` cycles after the line falls,
    so pulses on a busy channel rise ``width_cyc + gap_cyc`` cycles apart.

    Registers: ``mode`` counts the cycles left in the pulse period, ``W + G`` after a
    start down to 1 (``W`` = ``width_cyc``, ``G`` = ``gap_cyc``), 0 when idle. The line
    is high while ``mode > G``; a new pulse may start when ``mode <= 1`` (idle, or the
    last cycle of the gap). ``last`` is the line started last, ``pend_pos``/``pend_neg``
    the pulses waiting, ``pos``/``neg`` the output lines.

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
        period = p.width_cyc + p.gap_cyc
        width = len(self.pend_pos)
        # ``keep``: without it synthesis merges the three adds into one four-operand sum
        # built from LUT adders, larger and slower than three carry chains.
        kept = {"keep": 1}

        mode      = Signal(range(period + 1))
        last      = Signal(init=NEG)
        pending   = Signal(range(2 * p.backlog + 1), attrs=kept)
        offered   = Signal(len(self.new_pos) + 1, attrs=kept)
        total     = Signal(max(len(pending), len(offered)) + 1, attrs=kept)
        may_start = Signal()
        start     = Signal()
        pick      = Signal()
        has_pos   = Signal()
        has_neg   = Signal()
        dec_pos   = Signal()
        dec_neg   = Signal()

        # The backlog check: the registers' sum is ready early; the hand-over's arrives late.
        m.d.comb += [
            pending.eq(self.pend_pos + self.pend_neg),
            offered.eq(self.new_pos + self.new_neg),
            total.eq(pending + offered),
            self.accept.eq(~above(total, p.backlog)),
        ]

        # Each pending count moves by one add: pend + (load ? new : 0) - dec is computed
        # as pend + step + ~dec, with step = (load ? new : 0) - 1 (all ones without a
        # load). ``new - 1`` does not wait for the load or the start, and its sign says
        # whether anything is new on the line.
        nexts = []
        for pend, new, dec, has in ((self.pend_pos, self.new_pos, dec_pos, has_pos),
                                    (self.pend_neg, self.new_neg, dec_neg, has_neg)):
            less = Signal(signed(len(new) + 1))
            step = Signal(signed(width))  # modulo 2**width, as the sum is
            m.d.comb += [
                less.eq(new - 1),
                step.eq(Mux(self.load, less, -1)),
                # From the register and the hand-over, not from the sum, so the choice of
                # line does not wait for the adder.
                has.eq((pend != 0) | (self.load & ~less[-1])),
            ]
            nexts.append(pend + step + ~dec)

        if p.order == "interleaved":
            # Both lines waiting: the one not started last; else the one that waits.
            m.d.comb += pick.eq(Mux(has_pos & has_neg, ~last, ~has_pos))
        else:
            m.d.comb += pick.eq(~has_pos)
        m.d.comb += [
            may_start.eq(mode[1:] == 0),
            self.busy.eq(mode != Mode.IDLE.value),
            start.eq(self.armed & may_start & (has_pos | has_neg)),
            dec_pos.eq(start & (pick == POS)),
            dec_neg.eq(start & (pick == NEG)),
        ]

        # High next cycle: a start now, or high now and not in the pulse's last cycle.
        stays = self.armed & above(mode, p.gap_cyc + 1)
        m.d.comb += [
            self.line_pos_next.eq(self.armed_next & (dec_pos | (stays & (last == POS)))),
            self.line_neg_next.eq(self.armed_next & (dec_neg | (stays & (last == NEG)))),
        ]
        m.d.sync += [self.pos.eq(self.line_pos_next), self.neg.eq(self.line_neg_next)]

        with m.If(~self.armed):
            m.d.sync += [
                mode.eq(Mode.IDLE.value),
                last.eq(NEG),
                self.pend_pos.eq(0),
                self.pend_neg.eq(0),
            ]
        with m.Else():
            m.d.sync += [self.pend_pos.eq(nexts[0]), self.pend_neg.eq(nexts[1])]
            with m.If(start):
                m.d.sync += [mode.eq(period), last.eq(pick)]
            with m.Elif(may_start):
                m.d.sync += mode.eq(Mode.IDLE.value)
            with m.Else():
                m.d.sync += mode.eq(mode - 1)
        return m

"""Pulse-pair emitter of the shared datapath: the rules of ``PulseEmitter``, its counting done elsewhere.

Cycle rules: ``docs/timing.md``, section "Pulse-pair emitter"; how the counting is shared:
section "The shared datapath". This emitter keeps no pending counts: the shared pipeline
(``gateware/shared_owed.py``) keeps them in block RAM and folds in, at each visit, the
pulses started and the hand-over loaded since the last one. What the emitter needs
between two folds it keeps as flags:

- ``hp``/``hn``: a pulse is pending on the line, as of the last fold;
- ``tp``/``tn``: a pulse started on the line since the pipeline last read the flags;
- ``lp``: a hand-over was loaded and not yet folded in;
- ``acc0``/``acc1``: whether a strobe's hand-over fits the backlog, computed by the
  pipeline from the counts of the visit that targets the strobe, with no pulse started
  since that visit (``acc0``) or one (``acc1``); ``since`` says which.

Pulses of a channel start ``width + gap`` cycles apart or more, and the config makes that
longer than two visits and a fold (``HardwareParams.shared_pulse_min``): between two
starts a fold that counts the first one always comes, so the flags are exact whenever the
emitter may start a pulse (they are not read at other times), and between the accept
bits' counts and their strobe at most one pulse starts.
"""

from __future__ import annotations

from amaranth.hdl import Const, Module, Mux, Signal, Value
from amaranth.lib import wiring
from amaranth.lib.wiring import In, Out

from dvgate.gateware.emitter import NEG, POS, Mode
from dvgate.params import HardwareParams


class SharedEmitter(wiring.Component):
    """One channel's pulse lines, with its counts kept by the shared pipeline.

    Parameters
    ----------
    params : HardwareParams
        Width, gap, order, rest pulses.

    Attributes
    ----------
    take : Signal(1), in
        A strobe is taken this cycle.
    hand_pos, hand_neg : Signal(1), in
        The strobe's hand-over has pulses on the line beyond the rest pulses.
    rest : Signal(1), in
        Rest pulses are added this cycle (no ``no_rest`` fault in force).
    armed, armed_next : Signal(1), in
        As for :class:`~dvgate.gateware.emitter.PulseEmitter`.
    snap, snap_acc, fold, acc_we : Signal(1), in
        From the pipeline: it reads this channel's flags now (and starts its accept
        bits); it writes the fold's flags (``fold_pos``, ``fold_neg``); it writes the accept
        bits (``acc_in``: with rest pulses, without; none or one pulse started since).
    fold_pos, fold_neg : Signal(1), in
        After the fold, a pulse is pending on the line.
    acc_in : Signal(4), in
    accept, load, busy : Signal(1), out
        The hand-over fits the backlog; it is loaded this cycle; the emitter is not idle.
    pos, neg, line_pos_next, line_neg_next : Signal(1), out
        As for :class:`~dvgate.gateware.emitter.PulseEmitter`.
    tp, tn, lp, lp_rest, cleared : Signal(1), out
        Flags the pipeline reads: pulses started since its last read, a hand-over not
        folded in (and its rest pulses), the emitter cleared (disarmed) since.
    """

    def __init__(self, params: HardwareParams) -> None:
        self._params = params
        super().__init__({
            "take": In(1),
            "hand_pos": In(1),
            "hand_neg": In(1),
            "rest": In(1),
            "armed": In(1),
            "armed_next": In(1),
            "snap": In(1),
            "snap_acc": In(1),
            "fold": In(1),
            "fold_pos": In(1),
            "fold_neg": In(1),
            "acc_we": In(1),
            "acc_in": In(4),
            "accept": Out(1),
            "load": Out(1),
            "busy": Out(1),
            "pos": Out(1),
            "neg": Out(1),
            "line_pos_next": Out(1),
            "line_neg_next": Out(1),
            "tp": Out(1),
            "tn": Out(1),
            "lp": Out(1),
            "lp_rest": Out(1),
            "cleared": Out(1, init=1),
        })

    def elaborate(self, platform) -> Module:
        m = Module()
        p = self._params
        r = p.rest if p.scheme == "burst" else 0

        mode   = Signal(Mode)
        timer  = Signal(range(max(p.width_cyc, p.gap_cyc, 2)))
        last   = Signal(init=NEG)
        hp     = Signal()
        hn     = Signal()
        snapped = Signal()   # the fold under way includes ``lp``
        since  = Signal()    # a pulse started since the accept bits' counts
        acc    = Signal(4)

        # Accept: the pipeline's bit for the rest pulses in force and the pulses since.
        m.d.comb += [
            self.accept.eq(Mux(self.rest, Mux(since, acc[1], acc[0]), Mux(since, acc[3], acc[2]))),
            self.load.eq(self.take & self.accept),
        ]

        # The hand-over the flags do not include yet: this cycle's, or one loaded earlier.
        # Whether a pulse starts, and on which line, is worked out for both outcomes of this
        # cycle's strobe from registers; ``take``, which comes from afar, only picks one.
        may_start = Signal()
        m.d.comb += [
            may_start.eq((mode == Mode.IDLE) | ((mode == Mode.GAP) & (timer == 0))),
            self.busy.eq(mode != Mode.IDLE),
        ]
        def decide(load: Value) -> tuple[Value, Value]:
            held    = load | self.lp
            rest_in = Mux(load, self.rest, self.lp_rest) & (r > 0)
            has_pos = hp | (held & (rest_in | self.hand_pos))
            has_neg = hn | (held & (rest_in | self.hand_neg))
            if p.order == "interleaved":
                pick = Mux(has_pos & has_neg, ~last, ~has_pos)
            else:
                pick = ~has_pos
            return self.armed & may_start & (has_pos | has_neg), pick

        start_t, pick_t = decide(self.accept)
        start_n, pick_n = decide(Const(0))
        start = Signal()
        pick  = Signal()
        m.d.comb += [start.eq(Mux(self.take, start_t, start_n)), pick.eq(Mux(self.take, pick_t, pick_n))]
        took_p = start & (pick == POS)
        took_n = start & (pick == NEG)

        mode_next  = Signal(Mode)
        timer_next = Signal.like(timer)
        last_next  = Signal.like(last)
        m.d.comb += [mode_next.eq(mode), timer_next.eq(timer), last_next.eq(last)]
        with m.If(~self.armed):
            m.d.comb += [mode_next.eq(Mode.IDLE), timer_next.eq(0), last_next.eq(NEG)]
        with m.Elif(start):
            m.d.comb += [mode_next.eq(Mode.HIGH), timer_next.eq(p.width_cyc - 1), last_next.eq(pick)]
        with m.Elif(may_start):
            m.d.comb += mode_next.eq(Mode.IDLE)
        with m.Elif((mode == Mode.HIGH) & (timer == 0)):
            m.d.comb += [mode_next.eq(Mode.GAP), timer_next.eq(p.gap_cyc - 1)]
        with m.Elif(timer != 0):
            m.d.comb += timer_next.eq(timer - 1)
        high_next = (mode_next == Mode.HIGH) & self.armed_next
        m.d.comb += [
            self.line_pos_next.eq(high_next & (last_next == POS)),
            self.line_neg_next.eq(high_next & (last_next == NEG)),
        ]
        m.d.sync += [
            mode.eq(mode_next), timer.eq(timer_next), last.eq(last_next),
            self.pos.eq(self.line_pos_next), self.neg.eq(self.line_neg_next),
        ]

        with m.If(~self.armed):
            m.d.sync += [hp.eq(0), hn.eq(0), self.tp.eq(0), self.tn.eq(0), self.lp.eq(0), since.eq(0),
                         self.cleared.eq(1)]
        with m.Else():
            # The flags follow the folds only: after a start the next one is a pulse period
            # away, and a fold that counts the start comes first (``shared_pulse_min``).
            with m.If(self.fold):
                m.d.sync += [hp.eq(self.fold_pos), hn.eq(self.fold_neg)]
                with m.If(snapped):
                    m.d.sync += self.lp.eq(0)
            with m.If(self.load):
                m.d.sync += [self.lp.eq(1), self.lp_rest.eq(self.rest)]
            m.d.sync += [
                self.tp.eq((self.tp & ~self.snap) | took_p),
                self.tn.eq((self.tn & ~self.snap) | took_n),
                since.eq((since & ~self.snap_acc) | start),
                self.cleared.eq(self.cleared & ~self.snap),
            ]
        with m.If(self.snap):
            m.d.sync += snapped.eq(self.lp)
        with m.If(self.acc_we):
            m.d.sync += acc.eq(self.acc_in)
        return m

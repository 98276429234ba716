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

from amaranth.hdl import Module, Mux, Signal
from amaranth.lib import wiring
from amaranth.lib.wiring import In, Out

from dvgate.gateware.emitter import NEG, POS
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
        period = p.width_cyc + p.gap_cyc

        # The pulse timing as one count down from the start (``period - 1`` after it) and
        # flags that say ahead of time what the count's compares would: a strobe's cycle
        # then starts from flip-flops only (``docs/perf_resources.md``).
        count = Signal(range(period))
        ready = Signal(init=1)   # idle, or the gap's last cycle: a pulse may start
        go    = Signal()         # ready and armed
        high  = Signal()         # the line is high
        ends  = Signal()         # the pulse's last high cycle
        last  = Signal(init=NEG)
        hp    = Signal()
        hn    = Signal()
        snapped = Signal()   # the fold under way includes ``lp``
        since = Signal()     # a pulse started since the accept bits' counts
        acc   = Signal(4)

        # Accept: the pipeline's bit for the rest pulses in force and the pulses since.
        # ``load`` is kept as one net: ``take`` then reaches one LUT per emitter.
        load = Signal(attrs={"keep": 1})
        m.d.comb += [
            self.accept.eq(Mux(self.rest, Mux(since, acc[1], acc[0]), Mux(since, acc[3], acc[2]))),
            load.eq(self.take & self.accept),
            self.load.eq(load),
        ]

        # ``has[line]``: whether the line has a pulse waiting, with this cycle's hand-over
        # loaded and without (a hand-over loaded earlier and not folded in yet adds its
        # rest pulses and its line, a load now its own instead). Then, for each case, the
        # line a start takes (``took_t``, ``took_n``), the lines' next values and whether
        # a pulse starts: ``load``, which waits for ``take`` from afar and the accept bit,
        # picks between the cases as late as it can.
        rest_now = self.rest & (r > 0)
        rest_old = self.lp_rest & (r > 0)
        has = {}
        for line, held, hand in ((POS, hp, self.hand_pos), (NEG, hn, self.hand_neg)):
            has[line] = (held | rest_now | hand, held | (self.lp & (rest_old | hand)))
        stays = self.armed & high & ~ends
        took = {}
        for line in (POS, NEG):
            other = NEG if line == POS else POS
            outcomes = []
            for k in (0, 1):
                mine, theirs = has[line][k], has[other][k]
                if p.order == "interleaved":
                    # Both lines waiting: the one not started last; else the one that waits.
                    picked = mine & (~theirs | (last == other))
                else:
                    picked = mine & ~theirs if line == NEG else mine
                outcomes.append(picked)
            took_t, took_n = outcomes
            took[line] = Signal(name=f"took_{line}")
            line_next = self.line_pos_next if line == POS else self.line_neg_next
            high_on = stays & (last == line)
            m.d.comb += [
                took[line].eq(go & Mux(self.load, took_t, took_n)),
                line_next.eq(Mux(self.load, self.armed_next & ((go & took_t) | high_on),
                                 self.armed_next & ((go & took_n) | high_on))),
            ]
        start = Signal()
        m.d.comb += start.eq(go & Mux(self.load, has[POS][0] | has[NEG][0], has[POS][1] | has[NEG][1]))
        m.d.sync += [self.pos.eq(self.line_pos_next), self.neg.eq(self.line_neg_next)]

        # Next values as plain expressions of ``start`` and registers, with no register
        # holding its value through a choice: synthesis would otherwise make an enable
        # of ``start``, a level of logic and a slow route more on the strobe's cycle.
        armed = self.armed
        ready_next = Signal()
        m.d.comb += ready_next.eq(~armed | (~start & (ready | (count == 1))))
        m.d.sync += [
            ready.eq(ready_next),
            go.eq(ready_next & self.armed_next),
            # The count is 0 while ready.
            count.eq(Mux(start, period - 1, Mux(armed & ~ready, count - 1, 0))),
            high.eq(armed & (start | (high & ~ends))),
            ends.eq(armed & Mux(start, p.width_cyc == 1, count == p.gap_cyc + 1)),
            self.busy.eq(armed & (start | ~ready)),
            last.eq(~armed | took[NEG] | (last & ~took[POS])),
            since.eq(armed & ((since & ~self.snap_acc) | start)),
            self.tp.eq(armed & ((self.tp & ~self.snap) | took[POS])),
            self.tn.eq(armed & ((self.tn & ~self.snap) | took[NEG])),
            self.cleared.eq(~armed | (self.cleared & ~self.snap)),
            # The flags follow the folds only: after a start the next one is a pulse period
            # away, and a fold that counts the start comes first (``shared_pulse_min``).
            self.lp.eq(armed & (self.load | (self.lp & ~(self.fold & snapped)))),
        ]
        with m.If(~armed):
            m.d.sync += [hp.eq(0), hn.eq(0)]
        with m.Elif(self.fold):
            m.d.sync += [hp.eq(self.fold_pos), hn.eq(self.fold_neg)]
        with m.If(armed & self.load):
            m.d.sync += self.lp_rest.eq(self.rest)
        with m.If(self.snap):
            m.d.sync += snapped.eq(self.lp)
        with m.If(self.acc_we):
            m.d.sync += acc.eq(self.acc_in)
        return m

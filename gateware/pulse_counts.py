"""Pulse counters of every output line, in block RAM, for the telemetry's ``pos`` and ``neg``.

Rules: ``docs/link.md``, section "Telemetry". Each line keeps only a small count of the
rising edges not yet added in flip-flops; one adder visits the lines in turn, one per
cycle, and adds that count to the line's 32-bit total in a memory. A line's count at
any cycle is its total in memory plus its pending edges plus a rise on that cycle.
"""

from amaranth.hdl import Module, Mux, Signal
from amaranth.lib import memory, wiring
from amaranth.lib.wiring import In, Out

from dvgate.gateware.ram import NO_RW_CHECK, read_data, sync_read

#: Width of the per-line pulse counters (wrap).
PULSE_COUNT_BITS = 32
#: Block RAM even for a memory this small (synthesis would use flip-flops); no read uses
#: a word written on the same cycle (the adder reads the next line; the reply reads the
#: spare words long after they are written), see ``NO_RW_CHECK``.
TOTALS_ATTRS = {"ram_style": "block", **NO_RW_CHECK}


class PulseCounters(wiring.Component):
    """Count the rising edges of ``2 n`` lines; give one channel's two counts byte by byte.

    Line ``2 i`` is channel ``i``'s positive line, ``2 i + 1`` its negative one. A line
    rises at most every other cycle, so between two visits of the adder (``2 n`` cycles)
    it gathers at most ``n`` pending edges.

    For the telemetry, ``snap`` marks the instant (cycle ``e``) the reply describes, for
    channel ``channel``. The two counts at ``e`` are the totals in memory at ``e`` plus
    the pending edges and the rises at ``e``: the pending parts are kept at ``e``, and on
    the adder's first visit of each of the two lines from ``e`` on (by ``e + 2 n``) it
    copies the total, unchanged since ``e``, into a spare word of the memory instead of
    adding to it; that line adds its pending edges one visit later (so at most ``2 n``
    gather). The reply reads the eight bytes (``pos``, then ``neg``, little-endian) at
    payload offsets ``base .. base + 7`` from the spare words, adding the pending parts
    byte by byte as they are sent.

    Parameters
    ----------
    n : int
        Channel count.
    base : int
        Payload offset of the first byte of ``pos``.

    Attributes
    ----------
    lines : Signal(2 n), in
        The logical lines, ``2 i`` positive and ``2 i + 1`` negative of channel ``i``.
    snap : Signal(1), in
        The telemetry's instant.
    channel : Signal(8), in
        The channel to report, read with ``snap``.
    idx : Signal(8), in
        Payload byte wanted now.
    step : Signal(1), in
        ``idx`` moves on to ``idx + 1`` at the next cycle (the bytes are read a byte ahead).
    take : Signal(1), in
        The byte at ``idx`` was sent.
    data : Signal(8), out
        The byte at ``idx`` (when it is one of the eight).
    totals : Memory
        Each line's total in memory (its count is that plus :meth:`pending`).
    """

    def __init__(self, n: int, base: int) -> None:
        if n < 1:
            raise ValueError(f"n must be at least 1, not {n!r}")
        self._n = n
        self._base = base
        super().__init__({
            "lines": In(2 * n),
            "snap": In(1),
            "channel": In(8),
            "idx": In(8),
            "step": In(1),
            "take": In(1),
            "data": Out(8),
        })
        #: Pending edges per line: at most ``2 n`` (see the class docstring).
        self.pending = [Signal((2 * n).bit_length(), name=f"pend{k}") for k in range(2 * n)]
        #: Each line's total, then the two totals set aside for the telemetry.
        self.totals = memory.Memory(shape=PULSE_COUNT_BITS, depth=2 * n + 2, init=[], attrs=TOTALS_ATTRS)

    def elaborate(self, platform) -> Module:
        m = Module()
        n, base = self._n, self._base
        slots = 2 * n
        m.submodules.totals = totals = self.totals
        t_wr = totals.write_port()
        t_rd = sync_read(m, totals)
        a_rd = sync_read(m, totals)

        before = Signal(slots)
        rise   = Signal(slots)
        slot   = Signal(range(slots))
        after  = Signal(range(slots))
        chan   = Signal(range(n))
        want   = Signal(2)
        extra  = [Signal((2 * n + 1).bit_length(), name=f"extra_{label}") for label in ("pos", "neg")]
        carry  = Signal()
        pend   = Signal.like(self.pending[0])
        hit    = Signal()

        m.d.sync += before.eq(self.lines)
        m.d.comb += [
            rise.eq(self.lines & ~before),
            after.eq(Mux(slot == slots - 1, 0, slot + 1)),
        ]
        m.d.sync += slot.eq(after)

        # The adder: line ``slot``'s total (read on the cycle before) plus its pending edges,
        # unless the total is set aside this cycle (``hit``).
        with m.Switch(slot):
            for k in range(slots):
                with m.Case(k):
                    m.d.comb += pend.eq(self.pending[k])
        m.d.comb += [
            t_rd.addr.eq(after),
            t_wr.addr.eq(Mux(hit, slots + slot[0], slot)),
            t_wr.data.eq(read_data(m, t_rd, t_wr) + Mux(hit, 0, pend)),
            t_wr.en.eq(1),
        ]
        for k in range(slots):
            m.d.sync += self.pending[k].eq(Mux((slot == k) & ~hit, 0, self.pending[k]) + rise[k])

        # The telemetry's instant: keep the pending parts, and set each total aside on the
        # adder's first visit of its line from ``e`` on (on ``e`` itself the memory still
        # holds the total at ``e``, and no visit in between changes it).
        channel = Signal(range(n))
        m.d.comb += channel.eq(Mux(self.snap, self.channel, chan))
        wanted = Signal(2)
        m.d.comb += wanted.eq(Mux(self.snap, 0b11, want))
        which = slot[0]
        m.d.comb += hit.eq(((slot >> 1) == channel) & wanted.bit_select(which, 1))
        with m.If(self.snap):
            m.d.sync += chan.eq(self.channel)
            for k, label_extra in enumerate(extra):
                pick = Signal(n.bit_length() + 1, name=f"pick{k}")
                # The channel is below n at a request: its low bits select.
                with m.Switch(channel):
                    for i in range(n - 1):
                        with m.Case(i):
                            m.d.comb += pick.eq(self.pending[2 * i + k] + rise[2 * i + k])
                    with m.Default():
                        m.d.comb += pick.eq(self.pending[2 * n - 2 + k] + rise[2 * n - 2 + k])
                m.d.sync += label_extra.eq(pick)
        m.d.sync += want.eq(wanted & ~Mux(hit, 1 << which, 0))

        # The reply's bytes: the total set aside plus the pending part, byte by byte.
        offset = Signal(8)
        n_off  = Signal(8)
        m.d.comb += [offset.eq(self.idx - base), n_off.eq(self.idx + 1 - base), a_rd.addr.eq(slots + n_off[2]),
                     a_rd.en.eq(self.step)]
        lane  = offset[:2]
        first = lane == 0
        total = read_data(m, a_rd, t_wr).word_select(lane, 8)
        add   = Mux(first, Mux(offset[2], extra[1], extra[0]), 0)
        total_sum = Signal(9)
        m.d.comb += [total_sum.eq(total + add + (carry & ~first)), self.data.eq(total_sum[:8])]
        inside = offset < 8
        with m.If(self.take & inside):
            m.d.sync += carry.eq(total_sum[8])
        return m

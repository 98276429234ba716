"""Strobe detector: synchronizer, glitch filter and strobe statistics.

Cycle rules: ``docs/timing.md``, section "Strobe detector".
"""

from amaranth.hdl import Module, Mux, Signal
from amaranth.lib import wiring
from amaranth.lib.wiring import In, Out

from dvgate.params import STROBE_COUNT_BITS

_COUNT_MAX = (1 << STROBE_COUNT_BITS) - 1


class StrobeDetector(wiring.Component):
    """Turns the raw strobe pin into a one-cycle strobe and measures the strobe train.

    The pin passes two flip-flops (``s1``, ``s2``), then a glitch filter: the
    synchronized strobe must stay active ``min_width_cyc`` cycles; ``stb`` is high on
    the ``min_width_cyc``-th active cycle only. A pin active from cycle ``e`` gives
    ``stb`` at cycle ``e + min_width_cyc + 1``.

    Parameters
    ----------
    edge_rising : bool
        True when the pin is active high, False when it is active low.
    min_width_cyc : int
        Cycles the synchronized strobe must stay active to count (1 or more).
    absence_cyc : int
        ``host_absent`` rises once this many cycles have passed without a strobe.

    Attributes
    ----------
    pin : Signal(1), in
        Physical level of the strobe pin (asynchronous to the clock).
    stb : Signal(1), out
        One cycle high on each strobe (combinational from registers).
    stb_next : Signal(1), out
        ``stb`` of the next cycle, known one cycle ahead (lets the channels prepare
        their hand-over).
    ahead_valid : Signal(1), out
        The synchronized strobe is active and has not yet given its strobe.
    ahead : Signal(range(min_width_cyc)), out
        With ``ahead_valid``: ``stb`` comes ``ahead`` cycles from now if the strobe stays
        active (0: this cycle). Lets a shared datapath prepare every channel in turn.
    in_view : Signal(1), out
        ``ahead_valid`` and not ``stb``: a strobe is in view and still to come (a
        register, so logic that waits on it starts from a flip-flop).
    strobes : Signal(32), out
        Strobes seen since reset; wraps.
    period : Signal(32), out
        Cycles between the last two strobes (the first counts from reset); 0 before any.
    host_absent : Signal(1), out
        High while ``absence_cyc`` or more cycles have passed since the last strobe.
    """

    def __init__(self, *, edge_rising: bool, min_width_cyc: int, absence_cyc: int) -> None:
        if not isinstance(min_width_cyc, int) or min_width_cyc < 1:
            raise ValueError(f"min_width_cyc must be an integer of at least 1, not {min_width_cyc!r}")
        if not isinstance(absence_cyc, int) or absence_cyc < 1:
            raise ValueError(f"absence_cyc must be an integer of at least 1, not {absence_cyc!r}")
        self._edge_rising = bool(edge_rising)
        self._min_width_cyc = min_width_cyc
        self._absence_cyc = absence_cyc
        super().__init__({
            "pin": In(1),
            "stb": Out(1),
            "stb_next": Out(1),
            "ahead_valid": Out(1),
            "ahead": Out(range(max(2, min_width_cyc))),
            "in_view": Out(1),
            "strobes": Out(STROBE_COUNT_BITS),
            "period": Out(STROBE_COUNT_BITS),
            "host_absent": Out(1),
        })

    def elaborate(self, platform) -> Module:
        m = Module()
        width = self._min_width_cyc
        # The flip-flops hold the physical level; their reset value is the idle level.
        idle = 0 if self._edge_rising else 1

        s1        = Signal(init=idle)
        s2        = Signal(init=idle)
        active    = Signal()
        run       = Signal(range(width + 1))
        since     = Signal(STROBE_COUNT_BITS)
        since_inc = Signal(STROBE_COUNT_BITS)

        m.d.sync += [s1.eq(self.pin), s2.eq(s1)]
        m.d.comb += active.eq(s2 ^ idle)

        # run counts the active cycles seen before this one, up to the filter length.
        with m.If(~active):
            m.d.sync += run.eq(0)
        with m.Elif(run != width):
            m.d.sync += run.eq(run + 1)
        m.d.comb += self.stb.eq(active & (run == width - 1))
        m.d.comb += [self.ahead_valid.eq(active & (run != width)), self.ahead.eq(width - 1 - run)]
        # What stb will be next cycle: s1 becomes s2, run advances. Two strobes are never
        # on consecutive cycles (run passes M - 1 once per active stretch).
        m.d.comb += self.stb_next.eq((s1 ^ idle) & Mux(active, Mux(run != width, run + 1, run) == width - 1,
                                                      width == 1))
        # Next cycle's run is not width - 1 (the strobe's cycle) or width (after it).
        m.d.sync += self.in_view.eq((s1 ^ idle) & Mux(active, run + 2 < width, width > 1))

        # One saturating incrementer serves both the timer and the period.
        m.d.comb += since_inc.eq(Mux(since == _COUNT_MAX, since, since + 1))
        with m.If(self.stb):
            m.d.sync += [
                since.eq(0),
                self.period.eq(since_inc),
                self.strobes.eq(self.strobes + 1),
            ]
        with m.Else():
            m.d.sync += since.eq(since_inc)
        m.d.comb += self.host_absent.eq(since >= self._absence_cyc)
        return m

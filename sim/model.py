"""The reference model: an executable statement of ``docs/timing.md``.

Given the hardware parameters and a :class:`~dvgate.sim.trace.Stimulus`, it predicts
every output edge to the clock cycle, and the status at the end of the run. It works
event by event (strobes, rate changes, arming, pulses), never cycle by cycle, so a run
of billions of cycles costs only as much as its events. It imports neither Amaranth nor
the gateware: it is the independent side of every comparison.
"""

from __future__ import annotations

from bisect import bisect_right
from dataclasses import dataclass, field

from dvgate.params import EVENT_COUNT_BITS, STROBE_COUNT_BITS, HardwareParams
from dvgate.sim.trace import NEG, POS, ChannelState, Edge, RunResult, Status, Stimulus

_EVENT_MAX = (1 << EVENT_COUNT_BITS) - 1
_COUNT_MAX = (1 << STROBE_COUNT_BITS) - 1


def strobe_cycles(params: HardwareParams, edges: tuple[int, ...] | list[int], cycles: int) -> list[int]:
    """Cycles at which the strobe detector's one-cycle ``stb`` is high, below ``cycles``.

    The pin is active during ``[edges[0], edges[1])``, ``[edges[2], edges[3])``...; the
    synchronized copy two cycles later; a run of ``M`` active cycles gives ``stb`` on its
    ``M``-th cycle, so a pin active from ``a`` to ``b`` gives ``stb`` at ``a + M + 1`` when
    ``b - a >= M``.
    """
    m = params.min_width_cyc
    out = []
    for index in range(0, len(edges), 2):
        start = edges[index]
        stop = edges[index + 1] if index + 1 < len(edges) else None
        if stop is not None and stop - start < m:
            continue  # a glitch: shorter than the filter
        stb = start + m + 1
        if stb >= cycles:
            break
        out.append(stb)
    return out


def armed_intervals(stim: Stimulus) -> list[tuple[int, int]]:
    """Half-open cycle intervals during which the outputs are armed.

    The ``arm`` input is registered once (``armed(k+1) = arm(k)``), so an input high
    during ``[a, b)`` arms the outputs during ``[a + 1, b + 1)``.
    """
    out: list[tuple[int, int]] = []
    start: int | None = None
    for cycle, level in stim.arm_changes:
        if level and start is None:
            start = cycle
        elif not level and start is not None:
            out.append((start + 1, cycle + 1))
            start = None
    if start is not None:
        out.append((start + 1, stim.cycles + 1))
    return [(a, b) for a, b in out if a <= stim.cycles]


@dataclass
class _Emitter:
    """One channel's pulse-pair emitter, advanced decision by decision."""

    params: HardwareParams
    channel: int
    record: bool
    pend: list[int] = field(default_factory=lambda: [0, 0])
    last: int = NEG
    next_start: int = 0  # earliest cycle the next pulse may start
    last_start: int | None = None
    pulses: list[tuple[int, int, int]] = field(default_factory=list)  # (line, rise, fall)
    counts: list[int] = field(default_factory=lambda: [0, 0])

    def _pick(self) -> int:
        p, n = self.pend
        if self.params.order == "grouped" or p == 0 or n == 0:
            return POS if p > 0 else NEG
        return NEG if self.last == POS else POS

    def _start(self, cycle: int) -> None:
        line = self._pick()
        self.pend[line] -= 1
        self.last = line
        self.last_start = cycle
        self.next_start = cycle + self.params.pulse_period_cyc
        self.counts[line] += 1
        if self.record:
            self.pulses.append((line, cycle + 1, cycle + 1 + self.params.width_cyc))

    def advance_to(self, cycle: int) -> None:
        """Make every start decision at cycles before ``cycle``."""
        while self.pend[0] + self.pend[1] and self.next_start < cycle:
            self._start(self.next_start)

    def busy(self, cycle: int) -> bool:
        """``mode != IDLE`` at ``cycle`` (after ``advance_to(cycle)``)."""
        return self.last_start is not None and cycle <= self.last_start + self.params.pulse_period_cyc

    def load(self, cycle: int, new_pos: int, new_neg: int) -> None:
        """Add an accepted hand-over at ``cycle`` and start at once if the emitter may."""
        self.pend[POS] += new_pos
        self.pend[NEG] += new_neg
        if self.pend[0] + self.pend[1] and self.next_start <= cycle:
            self._start(cycle)

    def cut(self, cycle: int) -> None:
        """Outputs forced idle from ``cycle``: end a pulse in flight, drop any not yet visible."""
        self.advance_to(cycle)
        if self.record:
            while self.pulses and self.pulses[-1][1] >= cycle:
                line, _, _ = self.pulses.pop()
                self.counts[line] -= 1
            if self.pulses and self.pulses[-1][2] > cycle:
                line, rise, _ = self.pulses[-1]
                self.pulses[-1] = (line, rise, cycle)
        elif self.last_start is not None and self.last_start + 1 >= cycle:
            self.counts[self.last] -= 1

    def disarm(self, cycle: int) -> None:
        """First disarmed cycle: cut the outputs and clear the emitter."""
        self.cut(cycle)
        self.pend = [0, 0]
        self.last = NEG
        self.last_start = None
        self.next_start = cycle + 1  # cleared at `cycle`: idle from the next one


def _advance(acc: int, rate: int, length: int, lo: int, hi: int) -> tuple[int, int]:
    """Add ``rate`` ``length`` times with saturation; return the value and the first
    saturating step (``length`` when none saturates)."""
    if length <= 0 or rate == 0:
        return acc, length
    if rate > 0:
        safe = (hi - acc) // rate
        if safe >= length:
            return acc + rate * length, length
        return hi, safe
    safe = (acc - lo) // (-rate)
    if safe >= length:
        return acc + rate * length, length
    return lo, safe


def _ask(params: HardwareParams, owed: int) -> tuple[int, int, int, bool]:
    """What a taken strobe asks for: net count, new positive and negative pulses, clamp."""
    one = 1 << params.frac_bits
    if params.scheme == "binary":
        n = 1 if owed >= 0 else -1
        return n, int(n > 0), int(n < 0), False
    if params.scheme == "ternary":
        n = 1 if owed >= one else -1 if owed <= -one else 0
        return n, int(n > 0), int(n < 0), False
    whole = owed >> params.frac_bits if owed >= 0 else -((-owed) >> params.frac_bits)
    n = max(-params.clamp, min(params.clamp, whole))
    return n, params.rest + max(n, 0), params.rest + max(-n, 0), n != whole


@dataclass
class ModelRun:
    """Everything the model computed, for callers that want more than :class:`RunResult`.

    Attributes
    ----------
    result : RunResult
        Edges (empty when not recorded), status and books.
    counts : list of (int, int)
        Pulses seen on each channel's positive and negative line.
    strobes : list of int
        Cycles at which the detector's ``stb`` was high.
    """

    result: RunResult
    counts: list[tuple[int, int]]
    strobes: list[int]


def simulate(params: HardwareParams, stim: Stimulus, *, record: bool = True) -> ModelRun:
    """Run the model; with ``record=False`` only counts are kept (for very long runs)."""
    n_cyc = stim.cycles
    stbs = strobe_cycles(params, stim.strobe_edges, n_cyc)
    armed = armed_intervals(stim)
    arm_starts = [a for a, _ in armed]

    def is_armed(cycle: int) -> bool:
        i = bisect_right(arm_starts, cycle) - 1
        return i >= 0 and cycle < armed[i][1]

    takes = [s for s in stbs if is_armed(s)]
    lo, hi = params.owed_min, params.owed_max
    one = 1 << params.frac_bits
    busy_at: set[int] = set()
    clamp_at: set[int] = set()
    defer_at: set[int] = set()
    sat_spans: list[tuple[int, int]] = []
    books: list[ChannelState] = []
    emitters: list[_Emitter] = []

    for ch in range(params.n):
        changes = [(c.cycle, c.rate) for c in stim.rate_changes if c.channel == ch and c.cycle < n_cyc]
        bounds = {a for a, _ in armed} | {b for _, b in armed if b < n_cyc}
        points = sorted({*takes, *(c for c, _ in changes), *bounds})
        change_at = dict(changes)
        take_set = set(takes)
        emitter = _Emitter(params, ch, record)
        acc, rate, k, on = 0, params.rates[ch], 0, False

        for point in [*points, n_cyc]:
            if on:
                acc, safe = _advance(acc, rate, point - k, lo, hi)
                if safe < point - k:
                    sat_spans.append((k + safe, point))
            elif point > k:
                acc = 0
            if point == n_cyc:
                break
            k = point
            rate = change_at.get(point, rate)
            now_on = is_armed(point)
            if on and not now_on:
                emitter.disarm(point)
            elif now_on and not on:
                emitter.next_start = point
            on = now_on
            if point in take_set:
                emitter.advance_to(point)
                busy = emitter.busy(point)
                n, new_p, new_n, clamped = _ask(params, acc)
                if sum(emitter.pend) + new_p + new_n <= params.backlog:
                    if new_p or new_n:
                        emitter.load(point, new_p, new_n)
                    if clamped:
                        clamp_at.add(point)
                else:
                    n = 0
                    defer_at.add(point)
                if busy:
                    busy_at.add(point)
                total = acc + rate - n * one
                acc = min(max(total, lo), hi)
                if acc != total:
                    sat_spans.append((point, point + 1))
                k = point + 1
        emitter.advance_to(n_cyc)
        if on and not is_armed(n_cyc):
            emitter.cut(n_cyc)  # disarmed at the last observed cycle: the books are still those of N
        books.append(ChannelState(owed=acc, pend_pos=emitter.pend[POS], pend_neg=emitter.pend[NEG]))
        emitters.append(emitter)

    edges: list[Edge] = []
    counts: list[tuple[int, int]] = []
    for emitter in emitters:
        counts.append((emitter.counts[POS], emitter.counts[NEG]))
        for line, rise, fall in emitter.pulses:
            edges.append(Edge(emitter.channel, line, rise, fall if fall <= n_cyc else None))
    edges.sort()

    status = _status(params, stbs, n_cyc, busy_at, clamp_at, defer_at, sat_spans)
    result = RunResult(cycles=n_cyc, edges=tuple(edges), status=status, channels=tuple(books))
    return ModelRun(result=result, counts=counts, strobes=stbs)


def _status(params: HardwareParams, stbs: list[int], n_cyc: int, busy_at: set[int], clamp_at: set[int],
            defer_at: set[int], sat_spans: list[tuple[int, int]]) -> Status:
    if stbs:
        since = min(n_cyc - 1 - stbs[-1], _COUNT_MAX)
        prev = stbs[-2] if len(stbs) > 1 else -1
        period = min(stbs[-1] - prev, _COUNT_MAX)
    else:
        since, period = min(n_cyc, _COUNT_MAX), 0
    sat_cycles = 0
    end = -1
    for start, stop in sorted(sat_spans):
        start = max(start, end)
        if stop > start:
            sat_cycles += stop - start
            end = stop
    return Status(
        strobes=len(stbs) & _COUNT_MAX,
        period=period,
        host_absent=since >= params.absence_cyc,
        overrun=bool(busy_at),
        clamped=bool(clamp_at),
        deferred=bool(defer_at),
        saturated=sat_cycles > 0,
        overruns=min(len(busy_at), _EVENT_MAX),
        clamps=min(len(clamp_at), _EVENT_MAX),
        deferrals=min(len(defer_at), _EVENT_MAX),
        saturations=min(sat_cycles, _EVENT_MAX),
    )


def run_model(params: HardwareParams, stim: Stimulus) -> RunResult:
    """Predict every output edge and the final status (see ``docs/timing.md``)."""
    return simulate(params, stim).result

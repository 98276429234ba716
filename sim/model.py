"""The reference model: an executable statement of ``docs/timing.md``.

Given the hardware parameters and a :class:`~dvgate.sim.trace.Stimulus`, it predicts
every output edge to the clock cycle, and the status at the end of the run. It works
event by event (strobes, rate changes, arming, pulses), never cycle by cycle, so a run
of billions of cycles costs only as much as its events. It imports neither Amaranth nor
the gateware: it is the independent side of every comparison.

Faults (``docs/timing.md``, "Fault injection"): ignore windows and ``no_rest`` change
what the accumulators hand over; the output faults (silence, stuck, swap, storm) are
interval operations on a channel's line pulses, one time segment per fault set, and
cost nothing on a channel that never has one.
"""

from __future__ import annotations

from bisect import bisect_left, bisect_right
from dataclasses import dataclass, field

from dvgate.params import EVENT_COUNT_BITS, STROBE_COUNT_BITS, HardwareParams
from dvgate.sim.trace import NEG, POS, ChannelState, Edge, Faults, RunResult, Status, Stimulus

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


def ignore_spans(stim: Stimulus) -> list[tuple[int, int]]:
    """Half-open cycle intervals in which detected strobes are not taken.

    A window ``(c, L)`` covers ``[c, c + L)``, cut short where the next window starts
    (a new window replaces the one in force).
    """
    windows = stim.ignore_windows
    out = []
    for index, (cycle, length) in enumerate(windows):
        stop = cycle + length
        if index + 1 < len(windows):
            stop = min(stop, windows[index + 1][0])
        out.append((cycle, stop))
    return out


def strobe_fates(params: HardwareParams, stim: Stimulus) -> tuple[list[int], list[int], list[int]]:
    """The detector's strobes, those that fell in an ignore window, and those taken.

    A strobe is taken when the outputs are armed at its cycle and no ignore window
    covers it (``docs/timing.md``). Each list is sorted.
    """
    stbs = strobe_cycles(params, stim.strobe_edges, stim.cycles)
    armed = armed_intervals(stim)
    arm_starts = [a for a, _ in armed]
    spans = ignore_spans(stim)
    span_starts = [a for a, _ in spans]
    ignored = [s for s in stbs if _member(span_starts, spans, s)]
    ignored_set = set(ignored)
    takes = [s for s in stbs if _member(arm_starts, armed, s) and s not in ignored_set]
    return stbs, ignored, takes


def counted_saturations(takes: list[int], sat_spans: list[tuple[int, int]]) -> int:
    """Taken strobes whose hand-over finds an owed amount saturated since the previous one.

    ``docs/timing.md``, "Status": the take at ``s`` counts when an update at a cycle in
    ``[prev, s)`` saturated, ``prev`` being the previous taken strobe (0 for the first);
    the update at ``s`` itself belongs to the next take. Not capped at the counter's width.

    Parameters
    ----------
    takes : list of int
        The taken strobes, sorted.
    sat_spans : list of (int, int)
        Sorted, disjoint half-open spans of cycles whose updates saturated (any channel).
    """
    starts = [a for a, _ in sat_spans]
    count, prev = 0, 0
    for take in takes:
        # The last span starting before the take reaches furthest (the spans are disjoint).
        i = bisect_left(starts, take) - 1
        if i >= 0 and sat_spans[i][1] > prev:
            count += 1
        prev = take
    return count


def fault_timeline(stim: Stimulus, channel: int) -> list[tuple[int, Faults]]:
    """The fault sets of ``channel`` with the cycle each takes effect, from ``(0, Faults())``.

    Changes after cycle N are left out: they act on nothing the run observes.
    """
    out = [(0, Faults())]
    for change in stim.fault_changes:
        if change.channel == channel and change.cycle <= stim.cycles:
            out.append((change.cycle, change.faults))
    return out


def _member(starts: list[int], spans: list[tuple[int, int]], cycle: int) -> bool:
    """``cycle`` lies in one of the sorted disjoint ``spans`` (``starts`` their starts)."""
    i = bisect_right(starts, cycle) - 1
    return i >= 0 and cycle < spans[i][1]


def _clip(rises: list[int], falls: list[int], lo: int, hi: int) -> list[tuple[int, int]]:
    """The sorted disjoint intervals ``(rises[i], falls[i])`` cut to ``[lo, hi)``."""
    first, stop = bisect_right(falls, lo), bisect_left(rises, hi)
    return [(max(rises[i], lo), min(falls[i], hi)) for i in range(first, stop)]


def _intersect(a: list[tuple[int, int]], b: list[tuple[int, int]]) -> list[tuple[int, int]]:
    """Intersection of two sorted lists of disjoint half-open intervals."""
    out, i, j = [], 0, 0
    while i < len(a) and j < len(b):
        lo, hi = max(a[i][0], b[j][0]), min(a[i][1], b[j][1])
        if lo < hi:
            out.append((lo, hi))
        if a[i][1] < b[j][1]:
            i += 1
        else:
            j += 1
    return out


def _merge(pieces: list[tuple[int, int]]) -> list[tuple[int, int]]:
    """Union of half-open intervals, sorted and disjoint: overlapping or touching ones join
    (as the pulses a line shows)."""
    out: list[tuple[int, int]] = []
    for lo, hi in sorted(pieces):
        if out and lo <= out[-1][1]:
            if hi > out[-1][1]:
                out[-1] = (out[-1][0], hi)
        else:
            out.append((lo, hi))
    return out


def _storm(start: int, stop: int, period: int, width: int) -> list[tuple[int, int]]:
    """Active cycles ``k`` of ``[start, stop)`` with ``(k - start) mod period < width``."""
    if period == 0:
        return []
    if period <= width:
        return [(start, stop)]  # every cycle: the storm line is held active
    return [(t, min(t + width, stop)) for t in range(start, stop, period)]


def fault_outputs(params: HardwareParams, pulses: list[tuple[int, int, int]], timeline: list[tuple[int, Faults]],
                  armed: list[tuple[int, int]], cycles: int) -> tuple[list[tuple[int, int]], list[tuple[int, int]]]:
    """The positive and negative output pulses of a channel under its output faults.

    Parameters
    ----------
    params : HardwareParams
        The emulator (the storm's pulse width).
    pulses : list of (line, rise, fall)
        The emitter's line pulses, already gated by ``armed``.
    timeline : list of (cycle, Faults)
        The channel's fault sets (:func:`fault_timeline`).
    armed : list of (int, int)
        Armed intervals (:func:`armed_intervals`).
    cycles : int
        Run length N; the outputs are observed for cycles ``1 .. N``.

    Returns
    -------
    tuple of two lists of (rise, fall)
        Merged pulses of the positive and the negative output, cut at ``N + 1``.
    """
    end = cycles + 1
    lines: tuple[tuple[list[int], list[int]], ...] = (([], []), ([], []))
    for line, rise, fall in pulses:
        if rise < end:
            lines[line][0].append(rise)
            lines[line][1].append(min(fall, end))
    arm = [(a, min(b, end)) for a, b in armed if a < end]
    pieces: tuple[list[tuple[int, int]], list[tuple[int, int]]] = ([], [])
    for index, (start, faults) in enumerate(timeline):
        stop = timeline[index + 1][0] if index + 1 < len(timeline) else end
        if stop <= start:
            continue
        armed_here = _intersect(arm, [(start, stop)])
        storm = _intersect(_storm(start, stop, faults.storm_period, params.width_cyc), armed_here)
        for out, own, stuck, silence, stormy in (
            (POS, NEG if faults.swap else POS, faults.stuck_pos, faults.silence_pos, not faults.storm_neg),
            (NEG, POS if faults.swap else NEG, faults.stuck_neg, faults.silence_neg, faults.storm_neg),
        ):
            if stuck:
                pieces[out].extend(armed_here)
            elif not silence:
                pieces[out].extend(_clip(*lines[own], start, stop))
                if stormy:
                    pieces[out].extend(storm)
    return _merge(pieces[POS]), _merge(pieces[NEG])


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


def accumulate(acc: int, rate: int, length: int, lo: int, hi: int) -> tuple[int, int]:
    """Add ``rate`` ``length`` times, holding at ``lo`` and ``hi``; return the value and the
    first step that saturates (``length`` when none does).

    The steps are the owed amount's updates at constant rate and no hand-over: once one
    saturates, every later one does too (the rate keeps pushing past the same limit).
    """
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


def _ask(params: HardwareParams, owed: int, rest: int) -> tuple[int, int, int, bool]:
    """What a taken strobe asks for: net count, new positive and negative pulses, clamp.

    ``rest`` is the rest pulses per line of this hand-over (0 under the ``no_rest`` fault).
    """
    one = 1 << params.frac_bits
    if params.scheme == "binary":
        n = 1 if owed >= 0 else -1
        return n, int(n > 0), int(n < 0), False
    if params.scheme == "ternary":
        n = 1 if owed >= one else -1 if owed <= -one else 0
        return n, int(n > 0), int(n < 0), False
    whole = owed >> params.frac_bits if owed >= 0 else -((-owed) >> params.frac_bits)
    n = max(-params.clamp, min(params.clamp, whole))
    return n, rest + max(n, 0), rest + max(-n, 0), n != whole


@dataclass
class ModelRun:
    """Everything the model computed, for callers that want more than :class:`RunResult`.

    Attributes
    ----------
    result : RunResult
        Edges (empty when not recorded), status and books.
    counts : list of (int, int)
        Pulses seen on each channel's positive and negative output (faults included).
    strobes : list of int
        Cycles at which the detector's ``stb`` was high.
    ignored : list of int
        The strobes among them that fell in an ignore window.
    takes : list of int
        The strobes among them that were taken (armed, not ignored).
    sat_spans : list of (int, int)
        Sorted, disjoint half-open spans of the cycles whose owed update saturated on some
        channel, whether or not a taken strobe reported it in the status.
    """

    result: RunResult
    counts: list[tuple[int, int]]
    strobes: list[int]
    ignored: list[int] = field(default_factory=list)
    takes: list[int] = field(default_factory=list)
    sat_spans: list[tuple[int, int]] = field(default_factory=list)


def simulate(params: HardwareParams, stim: Stimulus, *, record: bool = True) -> ModelRun:
    """Run the model; with ``record=False`` only counts are kept (for very long runs).

    A channel with an output fault keeps its pulses anyway: its outputs are computed
    from them.
    """
    n_cyc = stim.cycles
    stbs, ignored, takes = strobe_fates(params, stim)
    armed = armed_intervals(stim)
    arm_starts = [a for a, _ in armed]

    def is_armed(cycle: int) -> bool:
        return _member(arm_starts, armed, cycle)

    lo, hi = params.owed_min, params.owed_max
    one = 1 << params.frac_bits
    busy_at: set[int] = set()
    clamp_at: set[int] = set()
    defer_at: set[int] = set()
    sat_spans: list[tuple[int, int]] = []
    books: list[ChannelState] = []
    emitters: list[_Emitter] = []
    timelines: list[list[tuple[int, Faults]]] = []

    for ch in range(params.n):
        timeline = fault_timeline(stim, ch)
        fault_starts = [c for c, _ in timeline]
        on_outputs = any(f.on_outputs for _, f in timeline)
        timelines.append(timeline)
        changes = [(c.cycle, c.rate) for c in stim.rate_changes if c.channel == ch and c.cycle < n_cyc]
        bounds = {a for a, _ in armed} | {b for _, b in armed if b < n_cyc}
        points = sorted({*takes, *(c for c, _ in changes), *bounds})
        change_at = dict(changes)
        take_set = set(takes)
        emitter = _Emitter(params, ch, record or on_outputs)
        acc, rate, k, on = 0, params.rates[ch], 0, False

        for point in [*points, n_cyc]:
            if on:
                acc, safe = accumulate(acc, rate, point - k, lo, hi)
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
                faults = timeline[bisect_right(fault_starts, point) - 1][1]
                n, new_p, new_n, clamped = _ask(params, acc, 0 if faults.no_rest else params.rest)
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
    for emitter, timeline in zip(emitters, timelines, strict=True):
        ch = emitter.channel
        if any(f.on_outputs for _, f in timeline):
            outs = fault_outputs(params, emitter.pulses, timeline, armed, n_cyc)
            counts.append((len(outs[POS]), len(outs[NEG])))
            if record:
                edges += [Edge(ch, line, rise, fall if fall <= n_cyc else None)
                          for line in (POS, NEG) for rise, fall in outs[line]]
            continue
        counts.append((emitter.counts[POS], emitter.counts[NEG]))
        for line, rise, fall in emitter.pulses:
            edges.append(Edge(ch, line, rise, fall if fall <= n_cyc else None))
    edges.sort()

    sat_spans = _merge(sat_spans)  # the channels' saturating cycles, as one set
    status = _status(params, stbs, n_cyc, busy_at, clamp_at, defer_at, counted_saturations(takes, sat_spans),
                     len(ignored))
    result = RunResult(cycles=n_cyc, edges=tuple(edges), status=status, channels=tuple(books))
    return ModelRun(result=result, counts=counts, strobes=stbs, ignored=ignored, takes=takes, sat_spans=sat_spans)


def _status(params: HardwareParams, stbs: list[int], n_cyc: int, busy_at: set[int], clamp_at: set[int],
            defer_at: set[int], saturations: int, ignored: int) -> Status:
    if stbs:
        since = min(n_cyc - 1 - stbs[-1], _COUNT_MAX)
        prev = stbs[-2] if len(stbs) > 1 else -1
        period = min(stbs[-1] - prev, _COUNT_MAX)
    else:
        since, period = min(n_cyc, _COUNT_MAX), 0
    return Status(
        strobes=len(stbs) & _COUNT_MAX,
        period=period,
        host_absent=since >= params.absence_cyc,
        overrun=bool(busy_at),
        clamped=bool(clamp_at),
        deferred=bool(defer_at),
        saturated=saturations > 0,
        overruns=min(len(busy_at), _EVENT_MAX),
        clamps=min(len(clamp_at), _EVENT_MAX),
        deferrals=min(len(defer_at), _EVENT_MAX),
        saturations=min(saturations, _EVENT_MAX),
        ignored=min(ignored, _EVENT_MAX),
    )


def run_model(params: HardwareParams, stim: Stimulus) -> RunResult:
    """Predict every output edge and the final status (see ``docs/timing.md``)."""
    return simulate(params, stim).result

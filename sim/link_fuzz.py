"""Fuzz traffic for the host link, and the checks its result must pass.

A simulated host streams a list of commanded segments, commands and fault settings
(FAULT and IGNORE frames) with sequence numbers, as the streamer does, but through a
hostile line: bits flipped, frames cut
short, repeated, lost, stray bytes between frames, and pauses longer than the board's
timeout in the middle of frames. After each burst the host learns the board's next
sequence number (the streamer reads it from the telemetry) and sends again from there.

The traffic is generated against :class:`~dvgate.sim.link_model.LinkModel`; the same
bytes, at the same cycles, can then be replayed into the gateware
(:func:`dvgate.sim.link_bench.run_link_bytes`) and the two compared. :func:`check`
states the reliability properties: no corrupted frame applied, every commanded
segment, command and fault setting applied exactly once and in order (so no velocity
lost or doubled, no fault set skipped or set twice), and every frame that arrived and
was not applied covered by a counted rejection. Pure Python: no Amaranth.
"""

from __future__ import annotations

import random
from bisect import bisect_right
from collections import Counter
from dataclasses import dataclass, field

from dvgate.linkspec import FAULT_SET_BITS, FrameType, LinkParams
from dvgate.params import STORM_PERIOD_BITS
from dvgate.sim.link_model import (
    ChannelFaults,
    LinkModel,
    Segment,
    asked,
    encode_command,
    encode_fault,
    encode_ignore,
    encode_segment,
    encode_telemetry_request,
)
from dvgate.sim.trace import Faults

MUTATIONS = ("clean", "flip", "truncate", "timeout", "repeat", "drop", "garbage", "line")


@dataclass(frozen=True)
class FuzzSettings:
    """How hostile the line is, and how fast the bytes come.

    Attributes
    ----------
    segments : int
        Commanded segments to deliver.
    weights : dict
        Relative weight of each mutation in :data:`MUTATIONS`.
    spacing : int
        Cycles from one byte to the next inside a burst (the highest rate: one byte time
        at the UART's baud rate, or 2 cycles when bytes are fed straight to the decoder).
    burst : int
        Frames sent per burst before the host re-reads the board's sequence number.
    telemetry : float
        Chance of a telemetry request before each frame.
    max_duration : int
        Longest commanded segment, cycles (the shortest is the link's minimum).
    faults : float
        Chance of a fault setting (a FAULT frame, or one time in four an IGNORE frame)
        among the commanded items, before each segment.
    """

    segments: int = 200
    weights: dict[str, float] = field(default_factory=lambda: {
        "clean": 6.0, "flip": 1.5, "truncate": 0.7, "timeout": 0.3, "repeat": 0.8, "drop": 0.4,
        "garbage": 0.6, "line": 0.3})
    spacing: int = 2
    burst: int = 8
    telemetry: float = 0.05
    max_duration: int = 80
    faults: float = 0.03


@dataclass
class Instance:
    """One transmission of a frame: its byte span on the line and what was done to it.

    ``mutation`` is one of :data:`MUTATIONS`, ``"repeated"`` for the second copy of a
    repeated frame, or ``"junk"`` for a run of stray bytes (not a frame).
    """

    first: int
    last: int
    frame: bytes
    mutation: str
    arrived: bool = True


@dataclass
class FuzzResult:
    """Traffic, the model after it, and tallies."""

    arrivals: list[tuple[int, int, int]]
    cycles: int
    model: LinkModel
    commanded: list[Item]
    instances: list[Instance]
    mutations: Counter = field(default_factory=Counter)
    bursts: int = 0

    @property
    def frames_sent(self) -> int:
        """Frame transmissions (stray byte runs not counted), lost ones included."""
        return sum(1 for i in self.instances if i.mutation != "junk")

    @property
    def frames_arrived(self) -> int:
        return sum(1 for i in self.instances if i.arrived and i.mutation != "junk")


def _random_segment(rng: random.Random, link: LinkParams, max_duration: int, last: bool) -> Segment:
    hw = link.hw
    duration = rng.randint(link.min_duration, max(link.min_duration, max_duration))
    pick = rng.random()
    rates = []
    for _ in range(link.n):
        if pick < 0.1:
            rates.append(rng.choice((hw.rate_min, hw.rate_max, 0, -1)))
        else:
            rates.append(rng.randint(hw.rate_min, hw.rate_max))
    return Segment(duration, tuple(rates), last)


#: A commanded item: a frame type and what it carries (a segment, a fault setting, the
#: cycles of an ignore window, or nothing for a command).
Item = tuple[FrameType, Segment | ChannelFaults | int | None]


def _random_setting(rng: random.Random, link: LinkParams) -> Item:
    """A FAULT frame's setting (random fields), or one time in four an IGNORE window."""
    if rng.random() < 0.25:
        return FrameType.IGNORE, rng.choice((1, rng.randint(1, 500), (1 << 32) - 1))
    fields = {name: rng.random() < 0.25 for name in FAULT_SET_BITS}
    storm = rng.choice((0, 0, rng.randint(1, 40), (1 << STORM_PERIOD_BITS) - 1))
    return FrameType.FAULT, ChannelFaults(rng.randrange(link.n), Faults(storm_period=storm, **fields))


def _commanded(rng: random.Random, link: LinkParams, settings: FuzzSettings) -> list[Item]:
    """Segments with a START after the first two, an ARM now and then after it, and fault
    settings now and then anywhere.

    No DISARM (it drops queued segments by design) and no ARM before the START (it would
    arm the outputs at the config's initial rates): the commanded velocity is then
    exactly the segments'. Fault settings act on the outputs and the rest pulses, never
    on the player.
    """
    items: list[Item] = []
    for index in range(settings.segments):
        if rng.random() < settings.faults:
            items.append(_random_setting(rng, link))
        items.append((FrameType.SEGMENT, _random_segment(rng, link, settings.max_duration, False)))
        if index == 1:
            items.append((FrameType.START, None))
        elif index > 1 and rng.random() < 0.02:
            items.append((FrameType.ARM, None))
    return items


def _encode(link: LinkParams, seq: int, item: Item) -> bytes:
    ftype, what = item
    if ftype == FrameType.SEGMENT:
        return encode_segment(seq, what, link)
    if ftype == FrameType.FAULT:
        return encode_fault(seq, what, link)
    if ftype == FrameType.IGNORE:
        return encode_ignore(seq, what)
    return encode_command(ftype, seq)


def generate(link: LinkParams, settings: FuzzSettings, seed: int, first: int = 2) -> FuzzResult:
    """Stream the commanded items to the model through a hostile line until all are applied.

    The first byte arrives at cycle ``first``.

    Raises
    ------
    RuntimeError
        If the board stops making progress (that would be a fault of the link).
    """
    rng = random.Random(seed)
    model = LinkModel(link)
    commanded = _commanded(rng, link, settings)
    arrivals: list[tuple[int, int, int]] = []
    instances: list[Instance] = []
    result = FuzzResult(arrivals, 0, model, commanded, instances)
    names, weights = zip(*settings.weights.items(), strict=True)
    t = first
    stalled = 0
    gap_long = link.timeout_cyc + 2

    def send(data: bytes, pause_at: int | None = None, bad_stop: int | None = None) -> tuple[int, int]:
        nonlocal t
        first = len(arrivals)
        for k, byte in enumerate(data):
            if k == pause_at:
                t += gap_long
            error = int(k == bad_stop)
            arrivals.append((t, byte, error))
            model.feed(byte, t, bool(error))
            t += settings.spacing
        return first, len(arrivals) - 1

    while model.counters.next_seq < len(commanded):
        result.bursts += 1
        base = model.counters.next_seq
        before = base
        for seq in range(base, min(base + settings.burst, len(commanded))):
            if rng.random() < settings.telemetry:
                request = encode_telemetry_request(rng.randrange(link.n))
                first, last = send(request)
                instances.append(Instance(first, last, request, "clean"))
            frame = _encode(link, seq, commanded[seq])
            mutation = rng.choices(names, weights)[0]
            result.mutations[mutation] += 1
            if mutation == "drop":
                instances.append(Instance(len(arrivals), len(arrivals) - 1, frame, mutation, arrived=False))
                continue
            if mutation == "garbage":
                junk = bytes(rng.randrange(256) for _ in range(rng.randint(1, 20)))
                first, last = send(junk)
                instances.append(Instance(first, last, junk, "junk"))
                mutation = "clean"
            data = frame
            pause = bad_stop = None
            if mutation == "line":
                bad_stop = rng.randrange(len(frame))
            elif mutation == "flip":
                buf = bytearray(frame)
                for _ in range(rng.randint(1, 3)):
                    pos = rng.randrange(len(buf) * 8)
                    buf[pos // 8] ^= 1 << (pos % 8)
                data = bytes(buf)
            elif mutation == "truncate":
                data = frame[: rng.randint(1, len(frame) - 1)]
            elif mutation == "timeout":
                pause = rng.randint(1, len(frame) - 1)
            first, last = send(data, pause, bad_stop)
            instances.append(Instance(first, last, frame, mutation))
            if mutation == "repeat":
                first, last = send(frame)
                instances.append(Instance(first, last, frame, "repeated"))
        # Let the last frame of the burst finish (or time out), then look at the board.
        t += gap_long if rng.random() < 0.3 else settings.spacing * 4
        model.finish(t)
        stalled = stalled + 1 if model.counters.next_seq == before else 0
        if stalled > 50:
            raise RuntimeError(f"the link made no progress for 50 bursts at seq {before}")
    # Let playback run out so every segment is played.
    total = sum(seg.duration for kind, seg in commanded if kind == FrameType.SEGMENT)
    t += total + link.timeout_cyc + 10 * (link.n + 4)
    model.finish(t)
    result.cycles = t
    return result


@dataclass
class Check:
    """The reliability properties, each with what broke it (empty when it holds)."""

    corrupted_applied: list[str]
    order: list[str]
    uncounted: list[str]
    velocity: list[str]

    @property
    def ok(self) -> bool:
        return not (self.corrupted_applied or self.order or self.uncounted or self.velocity)


def check(result: FuzzResult) -> Check:
    """Check a fuzz run's model against the properties of ``docs/reliability.md``."""
    model, link = result.model, result.model.link
    originals = {}
    for index, item in enumerate(result.commanded):
        originals[_encode(link, index, item)] = index
    requests = {encode_telemetry_request(ch) for ch in range(link.n)}
    corrupted, order, uncounted, velocity = [], [], [], []
    applied_seq = []
    applied_first = set()
    for a in model.applied:
        frame = a.frame
        raw = _reencode(frame.type, frame.payload)
        if raw not in originals and raw not in requests:
            corrupted.append(f"cycle {a.cycle}: applied a frame nobody sent: {raw.hex()}")
        if a.seq is not None:
            applied_seq.append(a.seq)
        applied_first.add(frame.first)
    if applied_seq != list(range(len(result.commanded))):
        order.append(f"applied sequence numbers {applied_seq[:20]}... are not 0..{len(result.commanded) - 1}")
    # Fault settings: each commanded one reaches the emulator's ports once, in order.
    want_faults = [what for kind, what in result.commanded if kind == FrameType.FAULT]
    got_faults = [ChannelFaults(c.channel, c.faults) for c in model.fault_changes]
    if got_faults != want_faults:
        order.append(f"{len(got_faults)} fault settings applied of {len(want_faults)} commanded, or not in order")
    want_ignores = [what for kind, what in result.commanded if kind == FrameType.IGNORE]
    if [length for _, length in model.ignore_windows] != want_ignores:
        order.append(f"{len(model.ignore_windows)} ignore windows applied of {len(want_ignores)} commanded")
    # Every frame that arrived and was not applied lies within a counted rejection.
    spans = [(a, b) for a, b in model.decoder.spans]
    spans += [(r.first, r.last) for r in model.rejections if r.by_link]
    merged = _merge(spans)
    starts = [a for a, _ in merged]
    for inst in result.instances:
        if not inst.arrived or inst.mutation == "junk" or inst.first in applied_first:
            continue
        k = bisect_right(starts, inst.last) - 1
        if k < 0 or merged[k][1] < inst.first:
            uncounted.append(f"{inst.mutation} frame at bytes {inst.first}..{inst.last} vanished uncounted")
    counted = sum(model.counters.rejected.values())
    if counted != len(model.rejections):
        uncounted.append(f"{len(model.rejections)} rejections but the counters hold {counted}")
    # Velocity: each segment played once, in order, for exactly its duration; with the
    # rest policy the integral of the live rates is then exactly what was commanded.
    segments = [seg for kind, seg in result.commanded if kind == FrameType.SEGMENT]
    player = model.player
    if [d for _, d in player.loads] != [seg.duration for seg in segments]:
        velocity.append(f"{len(player.loads)} segments played of {len(segments)}, or not in order")
    bounds = set(player.boundaries)
    for k, (c, d) in enumerate(player.loads):
        cut_short = k + 1 < len(player.loads) and player.loads[k + 1][0] < c + d
        if c + d not in bounds or cut_short:
            velocity.append(f"the segment loaded at cycle {c} did not last {d} cycles")
            break
    if link.underrun == "rest":
        want = asked(segments, link.n)
        got = _played_integral(model, result.cycles)
        if got != want:
            velocity.append(f"integral of the played rates {got} != commanded {want}")
    return Check(corrupted, order, uncounted, velocity)


def _reencode(ftype: int, payload: bytes) -> bytes:
    from dvgate.sim.link_model import encode_frame

    return encode_frame(ftype, payload)


def _merge(spans: list[tuple[int, int]]) -> list[tuple[int, int]]:
    """Overlapping or touching byte spans merged into disjoint ones, sorted."""
    out: list[tuple[int, int]] = []
    for a, b in sorted(spans):
        if out and a <= out[-1][1] + 1:
            out[-1] = (out[-1][0], max(out[-1][1], b))
        else:
            out.append((a, b))
    return out


def _played_integral(model: LinkModel, cycles: int) -> list[int]:
    """Sum over armed cycles of the live rates, from the player's commits.

    The outputs stay armed from the START on (the fuzz sends no DISARM), so this is the
    right-hand side of the conservation law of ``docs/timing.md``.
    """
    link = model.link
    player = model.player
    arm_at = [c for c, level in player.arm_changes if level]
    if not arm_at:
        return [0] * link.n
    start = arm_at[0] + 1  # the emulator registers its arm input once
    changes = [(c + 1, rates) for c, rates in player.commits]
    total = [0] * link.n
    live = list(link.hw.rates)
    prev = start
    for at, rates in changes:
        if at > prev:
            for ch in range(link.n):
                total[ch] += live[ch] * (at - prev)
            prev = at
        live = list(rates)
    for ch in range(link.n):
        total[ch] += live[ch] * max(0, cycles - prev)
    return total


__all__ = ["MUTATIONS", "Check", "FuzzResult", "FuzzSettings", "Instance", "check", "generate"]

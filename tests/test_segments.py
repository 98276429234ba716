# amaranth: UnusedElaboratable=no
"""The segment FIFO and player against its model, cycle by cycle; fitting programs to the link."""

import random

import pytest
from amaranth.hdl import Module
from amaranth.sim import Simulator
from conftest import small_params
from hypothesis import given, settings
from hypothesis import strategies as st

from dvgate.gateware.rates import RateRegisters
from dvgate.gateware.segments import SegmentPlayer
from dvgate.linkspec import LinkParams, PlayState
from dvgate.sim.link_model import PlayerModel, Segment, asked, fit_segments


def make_link(n: int = 2, **changes) -> LinkParams:
    names = ("x", "y", "z", "w")[:n]
    hw = small_params(names=names, init_rates=tuple(10 * (i + 1) for i in range(n)))
    base = dict(hw=hw, bit_cyc=4, timeout_cyc=90, fifo_depth=3, underrun="rest")
    base.update(changes)
    return LinkParams(**base)


def words(segment: Segment, link: LinkParams) -> list[int]:
    """A segment as FIFO words: duration with the last flag in bit 32, then each rate."""
    mask = (1 << link.hw.rate_bits) - 1
    return [segment.duration | (int(segment.last) << 32)] + [r & mask for r in segment.rates]


def run_both(link: LinkParams, events: dict[int, tuple], cycles: int):
    """Drive the player and its model with the same inputs; return both per-cycle traces.

    ``events[c]`` is ``("seg", Segment)`` (its words written from ``c``, committed after
    them), ``("junk", k)`` (``k`` words written then rolled back), ``("start",)``,
    ``("stop",)`` or ``("arm",)``. As the link does, a frame writes nothing, and is rolled
    back, when the FIFO had no room as it began.
    """
    m = Module()
    m.submodules.player = player = SegmentPlayer(link)
    m.submodules.regs = regs = RateRegisters(link.hw)
    m.d.comb += [regs.addr.eq(player.rate_addr), regs.data.eq(player.rate_data),
                 regs.we.eq(player.rate_we), regs.commit.eq(player.rate_commit)]
    # Per-cycle inputs for the gateware and the model.
    plan: dict[int, dict] = {}
    for at, event in sorted(events.items()):
        if event[0] in ("seg", "junk"):
            data = words(event[1], link) if event[0] == "seg" else list(range(event[1]))
            for k, word in enumerate(data):
                plan.setdefault(at + k, {})["w"] = word
            if data:
                plan[at]["first"] = len(data)
            plan.setdefault(at + len(data), {})["end"] = event
        else:
            plan.setdefault(at, {})[event[0]] = True
    model = PlayerModel(link)
    hw_trace, model_trace = [], []

    async def bench(ctx):
        for cycle in range(cycles):
            row = plan.get(cycle, {})
            end = row.get("end")
            ctx.set(player.w_en, (1 << len(player.w_en)) - 1 if "w" in row else 0)  # every lane at once
            ctx.set(player.w_next, "w" in row)
            ctx.set(player.w_data, row.get("w", 0))
            ctx.set(player.w_commit, end is not None and end[0] == "seg")
            ctx.set(player.w_rollback, end is not None and end[0] == "junk")
            ctx.set(player.start, row.get("start", False))
            ctx.set(player.stop, row.get("stop", False))
            ctx.set(player.arm_on, row.get("arm", False))
            if row.get("first") and not model.room:
                # No room when the frame began: the link writes nothing and rolls back.
                for k in range(row["first"]):
                    plan.get(cycle + k, {}).pop("w", None)
                plan[cycle + row["first"]]["end"] = ("junk", 0)
                row = plan.get(cycle, {})
                end = row.get("end")
                ctx.set(player.w_en, 0)
                ctx.set(player.w_next, 0)
            rates = tuple(ctx.get(regs.rates[i]) for i in range(link.n))
            hw_trace.append((ctx.get(player.play), ctx.get(player.arm), rates, ctx.get(player.level),
                             ctx.get(player.underruns), ctx.get(player.played), ctx.get(player.room)))
            model_trace.append((int(model.state), int(model.arm), tuple(model.live), model.level,
                                model.underruns, model.played, int(model.room)))
            model.step(commit=end is not None and end[0] == "seg",
                       segment=end[1] if end is not None and end[0] == "seg" else None,
                       start=row.get("start", False), stop=row.get("stop", False), arm_on=row.get("arm", False))
            await ctx.tick()

    sim = Simulator(m)
    sim.add_clock(1e-6)
    sim.add_testbench(bench)
    sim.run()
    return hw_trace, model_trace, model


def first_difference(a, b):
    for cycle, (x, y) in enumerate(zip(a, b, strict=True)):
        if x != y:
            return cycle, x, y
    return None


@pytest.mark.parametrize("policy", ["rest", "hold"])
def test_preloaded_program_plays_on_exact_boundaries(policy):
    link = make_link(underrun=policy)
    segs = [Segment(20, (100, -100)), Segment(9, (-3, 7)), Segment(8, (1, 2), last=True)]
    events = {2: ("seg", segs[0]), 10: ("seg", segs[1]), 18: ("seg", segs[2]), 40: ("start",)}
    hw_trace, model_trace, model = run_both(link, events, 120)
    assert first_difference(hw_trace, model_trace) is None
    # START at 40: armed from 41, the first commit at 41 makes the rates live from 42.
    assert model.arm_changes == [(41, True)]
    starts = [c + 1 for c, _ in model.commits]
    assert starts == [42, 62, 71, 79]  # 42 + 20, + 9, + 8 (then zero: the program's end)
    assert model.commits[-1][1] == (0, 0) and model.underruns == 0
    assert model.state == PlayState.IDLE


@pytest.mark.parametrize("policy", ["rest", "hold"])
def test_underrun_rests_or_holds_and_resumes(policy):
    link = make_link(underrun=policy)
    segs = [Segment(10, (100, -100)), Segment(10, (-3, 7))]
    events = {2: ("seg", segs[0]), 15: ("start",), 60: ("seg", segs[1])}
    hw_trace, model_trace, model = run_both(link, events, 120)
    assert first_difference(hw_trace, model_trace) is None
    assert model.underruns == 2  # after each segment: nothing staged at the boundary
    live_during_gap = hw_trace[40][2]
    assert live_during_gap == ((0, 0) if policy == "rest" else (100, -100))
    assert hw_trace[40][0] == PlayState.STARVED


def test_min_duration_segments_back_to_back_never_underrun():
    link = make_link(n=4, fifo_depth=4)
    segs = [Segment(link.min_duration, tuple(k + i for i in range(4))) for k in range(8)]
    events = {}
    at = 1
    for seg in segs[:4]:
        events[at] = ("seg", seg)
        at += 6
    events[at] = ("start",)
    for seg in segs[4:]:
        at += 12
        events[at] = ("seg", seg)
    hw_trace, model_trace, model = run_both(link, events, at + 80)
    assert first_difference(hw_trace, model_trace) is None
    loads = [c for c, _ in model.loads]
    assert [b - a for a, b in zip(loads, loads[1:], strict=False)] == [link.min_duration] * 7
    assert model.underruns == 1  # only after the last one


def test_rolled_back_words_never_play_and_stop_flushes():
    link = make_link(fifo_depth=2, underrun="hold")
    a, b, c = Segment(12, (5, 5)), Segment(12, (6, 6)), Segment(12, (7, 7))
    events = {1: ("junk", 2), 5: ("seg", a), 9: ("junk", 3), 14: ("seg", b), 20: ("start",),
              25: ("seg", c), 29: ("stop",), 40: ("seg", c), 45: ("arm",), 47: ("start",)}
    hw_trace, model_trace, model = run_both(link, events, 110)
    assert first_difference(hw_trace, model_trace) is None
    # a plays from 22; the stop at 29 cuts it and drops b and the first c; the second c plays.
    assert [r for _, r in model.commits] == [(5, 5), (7, 7)]
    assert model.played == 2


@settings(max_examples=30, deadline=None)
@given(st.data())
def test_random_schedules_match_the_model(data):
    policy = data.draw(st.sampled_from(["rest", "hold"]))
    n = data.draw(st.integers(1, 3))
    link = make_link(n=n, underrun=policy, fifo_depth=data.draw(st.integers(2, 4)))
    rng = random.Random(data.draw(st.integers(0, 2**32 - 1)))
    events, at = {}, 1
    while at < 260:
        kind = rng.choices(["seg", "junk", "start", "stop", "arm", "last"], [8, 1, 2, 0.4, 0.5, 0.7])[0]
        if kind in ("seg", "last"):
            seg = Segment(rng.randint(link.min_duration, 40),
                          tuple(rng.randint(link.hw.rate_min, link.hw.rate_max) for _ in range(n)), kind == "last")
            events[at] = ("seg", seg)
            at += n + 2 + rng.randint(0, 20)
        elif kind == "junk":
            events[at] = ("junk", rng.randint(1, n + 1))
            at += n + 3
        else:
            events[at] = (kind,)
            at += rng.randint(1, 15)
    hw_trace, model_trace, _ = run_both(link, events, 300)
    assert first_difference(hw_trace, model_trace) is None


def test_fifo_wraps_around():
    link = make_link(n=1, fifo_depth=2)
    segs = [Segment(8, (k,)) for k in range(1, 9)]
    events = {1: ("seg", segs[0]), 4: ("start",)}
    at = 6
    for seg in segs[1:]:
        events[at] = ("seg", seg)
        at += 8
    hw_trace, model_trace, model = run_both(link, events, at + 30)
    assert first_difference(hw_trace, model_trace) is None
    assert [r for _, r in model.commits if r != (0,)] == [(k,) for k in range(1, 9)]


# -- programs into segments ---------------------------------------------------------------

@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.integers(1, 60), st.integers(-2000, 2000), st.integers(-2000, 2000)),
                min_size=1, max_size=12))
def test_fit_segments_keeps_the_exact_integral(pairs):
    link = make_link()
    total = sum(d for d, _, _ in pairs)
    program = [(d, (a, b)) for d, a, b in pairs]
    if total < 3 * link.min_duration + 1 and any(d < link.min_duration for d, _ in program):
        with pytest.raises(ValueError, match="too short for the link"):
            fit_segments(program, link)
        return
    segments, refits = fit_segments(program, link)
    assert sum(s.duration for s in segments) == total
    assert all(s.duration >= link.min_duration for s in segments)
    assert segments[-1].last and not any(s.last for s in segments[:-1])
    want = [sum(d * r[ch] for d, r in program) for ch in range(2)]
    assert asked(segments, 2) == want  # exact, channel by channel
    if all(d >= link.min_duration for d, _ in program):
        assert refits == 0 and [(s.duration, s.rates) for s in segments] == program


def test_fit_segments_refits_a_short_tail():
    link = make_link()
    segments, refits = fit_segments([(1000, (5, -5)), (3, (100, 100))], link)
    assert refits == 1
    assert asked(segments, 2) == [5000 + 300, -5000 + 300]
    assert sum(s.duration for s in segments) == 1003

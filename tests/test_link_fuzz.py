# amaranth: UnusedElaboratable=no
"""Reliability of the host link under a hostile line (docs/reliability.md).

Fuzz traffic (``dvgate.sim.link_fuzz``): flipped bits, truncated, paused, repeated and
lost frames, stray bytes, and frames back to back at the highest rate. The gateware is
held equal to the pure-Python model on every run here (so the model's big runs in
``benchmarks/link_fuzz.py`` speak for the gateware), and the properties are checked:
no corrupted frame applied, every commanded segment, command and fault setting applied
exactly once and in order, every frame that arrived and was not applied counted.
"""

import random

import pytest
from conftest import small_params
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st
from test_link import assert_replies

from dvgate.gateware.faults import pack_faults
from dvgate.linkspec import BITS_PER_BYTE, FrameType, LinkParams, Reason
from dvgate.sim.link_bench import run_link_bytes, run_linked
from dvgate.sim.link_fuzz import MUTATIONS, FuzzSettings, check, generate
from dvgate.sim.link_model import LinkModel, WireByte, encode_segment, rx_cycle

HW = small_params(names=("x", "y"), init_rates=(64, 10))


def make_link(**changes) -> LinkParams:
    base = dict(hw=HW, bit_cyc=4, timeout_cyc=90, fifo_depth=4, underrun="rest")
    base.update(changes)
    return LinkParams(**base)


def live_changes(model: LinkModel, cycles: int) -> list[tuple[int, tuple[int, ...]]]:
    out, live = [], list(model.link.hw.rates)
    for cycle, rates in model.player.commits:
        if list(rates) != live and cycle + 1 < cycles:
            out.append((cycle + 1, rates))
            live = list(rates)
    return out


def assert_gateware_equals_model(run, model: LinkModel, cycles: int) -> None:
    assert list(run.rates[1:]) == live_changes(model, cycles)
    assert list(run.arm[1:]) == [(c, int(v)) for c, v in model.player.arm_changes if c < cycles]
    assert list(run.faults) == [(c.cycle, c.channel, pack_faults(c.faults)) for c in model.fault_changes]
    assert list(run.ignores) == model.ignore_windows
    status = run.status
    assert status["rejected"] == model.counters.rejected
    assert (status["next_seq"], status["accepted"]) == (model.counters.next_seq, model.counters.accepted)
    assert (status["played"], status["underruns"], status["level"]) == (
        model.player.played, model.player.underruns, model.player.level)


# No shrinking: each example simulates thousands of cycles; a failure prints its inputs.
@settings(max_examples=6, deadline=None, suppress_health_check=[HealthCheck.too_slow],
          phases=[Phase.explicit, Phase.generate])
@given(seed=st.integers(0, 2**32 - 1), policy=st.sampled_from(["rest", "hold"]),
       weights=st.fixed_dictionaries({m: st.floats(0.0, 3.0) for m in MUTATIONS}),
       burst=st.integers(1, 10))
def test_fuzzed_gateware_equals_model_and_keeps_every_property(seed, policy, weights, burst):
    link = make_link(underrun=policy)
    weights = {**weights, "clean": weights["clean"] + 1.0}  # progress needs some clean frames
    result = generate(link, FuzzSettings(segments=20, weights=weights, burst=burst, faults=0.15), seed)
    model = result.model
    outcome = check(result)
    assert outcome.ok, outcome
    run = run_link_bytes(link, result.arrivals, result.cycles)
    # Frame by frame: the same rejections (cycle and reason) and applications.
    assert list(run.rejections) == [(r.cycle, r.reason) for r in model.rejections]
    assert list(run.applied) == [a.cycle for a in model.applied]
    assert_gateware_equals_model(run, model, result.cycles)
    # Every reply holds the link's fields at its request, the fault set in force among them.
    assert_replies(link, run.replies, model)


@settings(max_examples=6, deadline=None, phases=[Phase.explicit, Phase.generate])
@given(st.lists(st.binary(min_size=1, max_size=40) | st.sampled_from([b"\x7e", b"\x7d", b"\x7e\x05\x01"]),
                min_size=1, max_size=30),
       st.integers(0, 2**32 - 1))
def test_random_bytes_between_good_frames(chunks, seed):
    """Garbage, then a good segment and START: the garbage is counted, the frames applied."""
    link = make_link()
    rng = random.Random(seed)
    arrivals, t = [], 3
    for chunk in chunks:
        for byte in chunk:
            arrivals.append((t, byte, int(rng.random() < 0.05)))
            t += 2
        t += rng.choice((0, 2, link.timeout_cyc + 1))
    t += link.timeout_cyc + 1
    from dvgate.sim.link_model import Segment, encode_command

    model = LinkModel(link)
    for cycle, byte, error in arrivals:
        model.feed(byte, cycle, bool(error))
    model.finish(t)
    seq = model.counters.next_seq
    for frame in (encode_segment(seq, Segment(30, (5, -5)), link), encode_command(FrameType.START, seq + 1)):
        for byte in frame:
            arrivals.append((t, byte, 0))
            model.feed(byte, t)
            t += 2
    cycles = t + 100
    model.finish(cycles)
    assert model.counters.next_seq == seq + 2 and model.player.played >= 1
    run = run_link_bytes(link, arrivals, cycles)
    assert list(run.rejections) == [(r.cycle, r.reason) for r in model.rejections]
    assert_gateware_equals_model(run, model, cycles)


def test_full_rate_frames_through_the_uart():
    """Back-to-back bytes at the baud rate's limit, through the real UART receiver."""
    link = make_link(timeout_cyc=4 * BITS_PER_BYTE * 4)
    byte_cyc = link.byte_cyc
    offset = rx_cycle(0, link.bit_cyc)
    # No "line" damage: a byte with a bad stop bit cannot be put on this wire.
    weights = {**FuzzSettings().weights, "line": 0.0}
    result = generate(link, FuzzSettings(segments=12, spacing=byte_cyc, burst=6, telemetry=0.0,
                                         max_duration=400, weights=weights, faults=0.1), seed=11, first=offset + 5)
    assert result.mutations["line"] == 0 and any(kind == FrameType.FAULT for kind, _ in result.commanded)
    assert check(result).ok
    wire = [WireByte(value, cycle - offset) for cycle, value, _ in result.arrivals]
    assert all(b.start - a.start >= byte_cyc for a, b in zip(wire, wire[1:], strict=False))
    assert sum(1 for a, b in zip(wire, wire[1:], strict=False) if b.start - a.start == byte_cyc) > 0.8 * len(wire)
    run = run_linked(link, wire, result.cycles)
    assert_gateware_equals_model(run, result.model, result.cycles)


@pytest.mark.parametrize("policy", ["rest", "hold"])
def test_model_fuzz_many_frames(policy):
    """The pure-Python link on many more frames than the gateware runs above."""
    link = make_link(underrun=policy)
    sent = settings_applied = 0
    counted = {r: 0 for r in Reason}
    for seed in range(4):
        result = generate(link, FuzzSettings(segments=600), seed=1000 + seed)
        outcome = check(result)
        assert outcome.ok, outcome
        sent += result.frames_sent
        settings_applied += len(result.model.fault_changes) + len(result.model.ignore_windows)
        for reason, count in result.model.counters.rejected.items():
            counted[reason] += count
    assert sent > 8000
    assert settings_applied > 40  # fault settings were in the traffic, each applied once (check above)
    # The line was hostile: every kind of damage the decoder can see was seen.
    for reason in (Reason.CRC, Reason.TRUNCATED, Reason.FORMAT, Reason.NOISE, Reason.LINE, Reason.SEQUENCE):
        assert counted[reason] > 0, reason

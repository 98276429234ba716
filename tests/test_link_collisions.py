# amaranth: UnusedElaboratable=no
"""The link's block RAMs never use a read that collides with a write on the same cycle.

Those memories carry ``NO_RW_CHECK`` (synthesis leaves such a read's result unspecified,
as block RAM gives it). Here every such read yields the complement of the word instead
(``POISON_COLLISIONS``), and the link's scenarios must come out exactly as before.
"""

import pytest
import test_link
import test_link_fuzz
import test_pulse_counts
import test_segments

import dvgate.gateware.ram as ram
from dvgate.sim.link_bench import run_link_bytes
from dvgate.sim.link_fuzz import MUTATIONS, FuzzSettings, check, generate


@pytest.fixture(autouse=True)
def poisoned(monkeypatch):
    monkeypatch.setattr(ram, "POISON_COLLISIONS", True)


def test_poisoning_is_in_force():
    # Control: a read that does collide shows the complement, so a use of one would show.
    from amaranth.hdl import Module
    from amaranth.lib import memory
    from amaranth.sim import Simulator

    m = Module()
    m.submodules.mem = mem = memory.Memory(shape=8, depth=4, init=[0x11], attrs=ram.NO_RW_CHECK)
    wr, rd = mem.write_port(), ram.sync_read(m, mem)
    data = ram.read_data(m, rd, wr)
    seen = []

    async def bench(ctx):
        ctx.set(wr.en, 1)
        ctx.set(wr.data, 0x22)
        await ctx.tick()
        seen.append(ctx.get(data))

    sim = Simulator(m)
    sim.add_clock(1e-6)
    sim.add_testbench(bench)
    sim.run()
    assert seen == [0xEE]  # not 0x11 (the old word) nor 0x22 (the new)


def test_command_layer_and_replies():
    test_link.test_command_layer_rejects_bad_fields_and_sequence_and_counts_them()
    test_link.test_fifo_full_and_busy_are_rejected_and_retried()
    test_link.test_disarm_drops_queued_segments_and_stops()


def test_linked_top_and_its_telemetry():
    test_link.test_linked_top_outputs_equal_the_model("rest", True)


def test_player_and_pulse_counters():
    test_segments.test_preloaded_program_plays_on_exact_boundaries("rest")
    test_segments.test_underrun_rests_or_holds_and_resumes("hold")
    test_pulse_counts.test_snapshot_bytes_equal_the_counts_at_the_request(3, 3, 0.6)


@pytest.mark.parametrize("seed", [11, 12])
def test_fuzzed_traffic(seed):
    link = test_link_fuzz.make_link(underrun="rest")
    weights = {m: 1.0 for m in MUTATIONS}
    result = generate(link, FuzzSettings(segments=12, weights=weights, burst=4, faults=0.15), seed)
    assert check(result).ok
    run = run_link_bytes(link, result.arrivals, result.cycles)
    assert list(run.rejections) == [(r.cycle, r.reason) for r in result.model.rejections]
    test_link_fuzz.assert_gateware_equals_model(run, result.model, result.cycles)
    test_link.assert_replies(link, run.replies, result.model)

"""The compiled engine (CXXRTL + generated harness) against the model and the Python simulation.

The engine must return exactly the :class:`RunResult` of the Amaranth testbench and of
the reference model, fast path or not; builds are cached; bad stimulus files and
missing or failing compilers give clear errors; and over a million strobes the counts a
computer reads stay within one pulse weight of the integrated rate.
"""

from __future__ import annotations

import math
import os
import random
import re
import struct
import subprocess
from pathlib import Path

import numpy as np
import pytest
from conftest import small_params
from satkit import assert_covers_the_rule, saturating_stimulus

from dvgate.config import load_config, parse_config
from dvgate.errors import UserError
from dvgate.params import HardwareParams
from dvgate.sim import compiled
from dvgate.sim.books import conservation_errors
from dvgate.sim.engines import choose, get_engine
from dvgate.sim.model import armed_intervals, run_model, simulate
from dvgate.sim.stimulus import integral, periodic_strobe_edges, stimulus_for
from dvgate.sim.testbench import run_amaranth
from dvgate.sim.trace import RateChange, Stimulus
from dvgate.simulate import compare_results

# The repository's copy (the tests run from the top folder, as the README says).
EXAMPLE = Path(__file__).resolve().parents[1] / "dvgate" / "examples" / "bench.toml"


@pytest.fixture(scope="module", autouse=True)
def cxx() -> str:
    path = compiled.find_compiler()
    if path is None:
        message = "no C++ compiler (g++, clang++ or $CXX); this check runs in CI (DVGATE_REQUIRE_TOOLS=1)"
        if os.environ.get("DVGATE_REQUIRE_TOOLS") == "1":
            pytest.fail(message)
        pytest.skip(message)
    return path


# Parameter sets: few, because each one is a C++ build; together they cover every scheme,
# both orders, both strobe edges, both polarities, 1 to 8 channels, clamps, deferrals,
# saturation and overruns.
BURST = small_params(names=("a", "b", "c"), rest=2, clamp=3, backlog=12, owed_bits=5, active_low=True,
                     edge_rising=False, init_rates=(150, -90, 30))
BINARY = small_params(names=("p", "q"), scheme="binary", order="grouped", rest=0, backlog=2, init_rates=(40, -70))
TERNARY = small_params(scheme="ternary", rest=0, backlog=3, width_cyc=1, gap_cyc=1, min_width_cyc=1,
                       init_rates=(-100,))
EIGHT = small_params(names=tuple(f"c{i}" for i in range(8)), order="grouped", rest=1, backlog=20,
                     init_rates=tuple(((i * 37) % 23 - 11) * 9 for i in range(8)))
PARAMS = {"burst": BURST, "binary": BINARY, "ternary": TERNARY, "eight": EIGHT}


def check_same(params: HardwareParams, stim: Stimulus, *, python: bool = False, check_fast: bool = False) -> None:
    """Compiled engine == model (and == the Amaranth simulation when asked), books balanced."""
    got = compiled.run_compiled(params, stim, check_fast=check_fast)
    want = run_model(params, stim)
    problems = compare_results(got, want, params.names)
    problems += [f"compiled: {p}" for p in conservation_errors(params, stim, got)]
    if python:
        problems += [f"python: {p}" for p in compare_results(run_amaranth(params, stim), got, params.names)]
    assert not problems, "compiled engine (first) and model (second) differ:\n" + "\n".join(problems)


def random_stimulus(params: HardwareParams, rng: random.Random, cycles: int) -> Stimulus:
    """Jittered strobes with glitches, rate changes through the port, arming and disarming."""
    edges, t = [], rng.randint(0, 20)
    while t < cycles:
        width = rng.choice([1, params.min_width_cyc - 1, params.min_width_cyc, params.min_width_cyc + 2])
        width = max(1, width)
        edges += [t, t + width]
        t += width + rng.randint(1, 60) + (rng.random() < 0.1) * rng.randint(100, 400)
    edges = [e for e in edges if e < cycles]
    changes, c = [], rng.randint(params.n + 1, 80)
    while c < cycles:
        for ch in rng.sample(range(params.n), rng.randint(1, params.n)):
            changes.append(RateChange(c, ch, rng.randint(params.rate_min // 4, params.rate_max // 4)))
        c += params.n + 1 + rng.randint(0, 150)
    arm, level, a = [(0, True)], True, rng.randint(50, 400)
    while a < cycles and rng.random() < 0.7:
        level = not level
        arm.append((a, level))
        a += rng.randint(5, 400)
    return Stimulus(cycles=cycles, strobe_edges=tuple(edges), rate_changes=tuple(changes), arm_changes=tuple(arm))


# --- the core cases ---------------------------------------------------------------------


@pytest.mark.parametrize("name", list(PARAMS))
def test_periodic_strobe_with_rate_changes(name):
    params = PARAMS[name]
    changes = tuple(RateChange(200 + 3 * i, i % params.n, (-1) ** i * 37 * (i + 1)) for i in range(min(params.n, 4)))
    stim = Stimulus(cycles=700, strobe_edges=periodic_strobe_edges(700, 37, 3, first=3), rate_changes=changes)
    check_same(params, stim, python=name != "eight")


def test_glitches_jitter_overrun_clamp_defer_saturate():
    # BURST: active-low strobe, active-low outputs, a small owed register and backlog.
    rng = random.Random(11)  # fixed seed: the same jittered strobe every run
    edges, t = [], 5
    while t < 1500:
        width = rng.choice([1, 2, 3, 5])  # 1 is a glitch (the filter takes 2)
        edges += [t, t + width]
        t += 9 + rng.randint(-3, 30)
    stim = Stimulus(cycles=1500, strobe_edges=tuple(edges),
                    rate_changes=(RateChange(400, 0, 2047), RateChange(401, 1, -2048), RateChange(900, 0, 3)))
    got = compiled.run_compiled(BURST, stim)
    assert got.status.overrun and got.status.clamped and got.status.deferred and got.status.saturated
    check_same(BURST, stim, python=True)


def test_disarm_and_rearm():
    stim = Stimulus(cycles=500, strobe_edges=periodic_strobe_edges(500, 23, 2, first=4),
                    arm_changes=((0, False), (50, True), (130, False), (200, True), (333, False), (420, True)))
    for params in (BURST, BINARY):
        check_same(params, stim, python=True)


def test_latency_is_the_documented_number_on_every_channel():
    # timing.md: from the pin's active edge at e, the first output edge at e + M + 2.
    params = EIGHT
    stim = Stimulus(cycles=80, strobe_edges=(20, 23))
    got = compiled.run_compiled(params, stim)
    firsts = {min(e.rise for e in got.edges if e.channel == ch) for ch in range(params.n)}
    assert firsts == {20 + params.min_width_cyc + 2}
    check_same(params, stim)


def test_example_config_one_second_against_the_model():
    config = load_config(EXAMPLE)
    stim = stimulus_for(config, 1.0)  # 12 million cycles, 999 strobes
    check_same(config.hw, stim)


# --- random stimuli, and the fast path checked against cycle-by-cycle simulation ------


@pytest.mark.parametrize("name", ["burst", "binary", "ternary"])
def test_random_stimuli(name):
    params = PARAMS[name]
    rng = random.Random(f"random stimuli {name}")  # a fixed seed per scheme: the same runs every time
    for case in range(25):
        stim = random_stimulus(params, rng, rng.randint(200, 4000))
        # Every other case: the harness simulates each span it would skip and compares registers.
        check_same(params, stim, check_fast=case % 2 == 0)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_saturation_marks_through_quiet_spans(seed):
    # Owed amounts saturate before taken, ignored and disarmed strobes and after the last
    # one; the fast path must keep the saturation marks through every span it skips.
    rng = random.Random(seed)  # fixed seeds whose runs cover the rule (checked): the same runs every time
    stim = saturating_stimulus(BURST, rng, 3000)
    assert_covers_the_rule(simulate(BURST, stim))
    check_same(BURST, stim, check_fast=True)
    fast = compiled.count_compiled(BURST, stim)
    assert fast.skipped > 0  # quiet spans were skipped, so the marks were carried across them


def test_saturation_counter_stops_at_its_limit():
    # TERNARY has M = 1: a pin that toggles every cycle from 2 gives a strobe taken every
    # other cycle, at 4, 6, 8... At -2048 per tick the owed amount (16 bits) reaches its
    # bottom by cycle 17 and every later update saturates (a take hands at most one pulse of
    # the 8 a tick brings), so each take from 18 on counts: more than 65535 of them by N.
    n_cyc = 18 + 2 * 65536 + 1
    stim = Stimulus(cycles=n_cyc, strobe_edges=tuple(range(2, n_cyc)), rate_changes=(RateChange(1, 0, -2048),))
    got = compiled.run_compiled(TERNARY, stim)
    assert got.status.strobes > 65536 and got.status.saturated and got.status.saturations == 65535
    assert got.channels[0].owed == TERNARY.owed_min
    check_same(TERNARY, stim)


def test_fast_path_skips_and_agrees_with_plain_stepping():
    config = load_config(EXAMPLE)
    stim = stimulus_for(config, 0.2)
    fast = compiled.count_compiled(config.hw, stim)
    slow = compiled.count_compiled(config.hw, stim, fast=False)
    assert fast.skipped > 0.9 * stim.cycles and slow.skipped == 0 and slow.stepped == stim.cycles
    assert (fast.result, fast.counts) == (slow.result, slow.counts)
    checked = compiled.run_compiled(config.hw, stim, check_fast=True)
    assert checked == compiled.run_compiled(config.hw, stim) == run_model(config.hw, stim)


def test_counts_and_samples_match_the_edges():
    rng = random.Random(5)
    stim = random_stimulus(BURST, rng, 3000)
    full = compiled.run_compiled(BURST, stim)
    samples = [1, 17, 999, 1000, 2500, 3000]
    counted = compiled.count_compiled(BURST, stim, samples)
    assert counted.result.status == full.status and counted.result.channels == full.channels
    assert counted.counts == tuple(full.counts(ch) for ch in range(BURST.n))
    for cycle in samples:
        want = tuple(tuple(sum(1 for e in full.edges if e.channel == ch and e.line == line and e.rise <= cycle)
                           for line in (0, 1)) for ch in range(BURST.n))
        assert counted.samples[cycle] == want


def test_sample_arrays_hold_the_samples_in_order():
    stim = Stimulus(cycles=400, strobe_edges=periodic_strobe_edges(400, 61, 3, first=5))
    counted = compiled.count_compiled(BINARY, stim, [300, 7, 120])
    assert counted.sample_cycles.tolist() == [7, 120, 300]
    assert counted.sample_counts.shape == (3, BINARY.n, 2)
    assert counted.sample_counts[-1].sum() > 0  # the run pulses, so the check below means something
    assert {c: tuple(map(tuple, row.tolist())) for c, row in zip([7, 120, 300], counted.sample_counts,
                                                                  strict=True)} == counted.samples


@pytest.mark.parametrize("name", ["burst", "binary", "ternary"])
def test_edge_window_keeps_exactly_the_pulses_that_overlap_it(name):
    params = PARAMS[name]
    rng = random.Random(f"edge window {name}")  # a fixed seed: the same runs every time
    for case in range(6):
        stim = random_stimulus(params, rng, rng.randint(300, 3000))
        full = compiled.run_compiled(params, stim)
        assert full.edges, "the stimulus makes no pulses"
        pick = full.edges[rng.randrange(len(full.edges))]
        windows = [(0, stim.cycles + 1), (stim.cycles, stim.cycles + 50), (pick.rise, pick.rise + 1),
                   (pick.rise - 1, pick.rise), (pick.fall or pick.rise, (pick.fall or pick.rise) + 1)]
        windows += [(a, a + rng.randint(1, 300)) for a in (rng.randint(0, stim.cycles) for _ in range(4))]
        for start, stop in windows:
            if start < 0:
                continue
            want = tuple(e for e in full.edges if e.rise < stop and (e.fall is None or e.fall > start))
            got = compiled.window_compiled(params, stim, start, stop, check_fast=case % 2 == 0)
            assert got == want, f"case {case}, window {start}..{stop}"


def test_edge_window_run_stops_after_the_window():
    # A window early in a long run costs only the run up to it (plus the last pulse's end).
    stim = Stimulus(cycles=2_000_000, strobe_edges=periodic_strobe_edges(2_000_000, 301, 3, first=3))
    full = compiled.run_compiled(BINARY, stim)
    start, stop = 1000, 1400
    result, _ = compiled._run(BINARY, stim, window=(start, stop), summary=False, fast=True, check_fast=False,
                              progress=False, vcd_path=None)
    want = tuple(e for e in full.edges if e.rise < stop and (e.fall is None or e.fall > start))
    assert want and result.edges == want
    last_fall = max(e.fall for e in want)
    assert stop <= result.cycles <= max(stop, last_fall) + 1
    with pytest.raises(ValueError, match="edge window 5..5"):
        compiled.window_compiled(BINARY, stim, 5, 5)


def test_progress_bar_does_not_change_the_result():
    stim = Stimulus(cycles=200_000, strobe_edges=periodic_strobe_edges(200_000, 301, 3, first=3))
    assert compiled.run_compiled(BINARY, stim, progress=True) == run_model(BINARY, stim)


def test_vcd(tmp_path):
    stim = Stimulus(cycles=120, strobe_edges=(10, 14, 60, 64))
    vcd = tmp_path / "run.vcd"
    got = compiled.run_compiled(BINARY, stim, vcd_path=vcd)
    assert got == run_model(BINARY, stim)
    text = vcd.read_text()
    assert "$enddefinitions" in text and "$var" in text


# --- builds, caching, errors ---------------------------------------------------------


def test_second_build_comes_from_the_cache(monkeypatch):
    first = compiled.build(TERNARY)
    stamp = first.stat().st_mtime_ns
    compiled._builds.clear()  # forget the in-process memo: the disk cache must serve it

    def no_compiling(*args, **kwargs):
        raise AssertionError(f"compiled again: {args[0]}")

    monkeypatch.setattr(compiled, "_compile", no_compiling)
    again = compiled.build(TERNARY)
    assert again == first and again.stat().st_mtime_ns == stamp


def test_cache_dir_follows_the_environment(monkeypatch, tmp_path):
    monkeypatch.setenv("DVGATE_CACHE", str(tmp_path / "c"))
    assert compiled.cache_dir() == tmp_path / "c"
    monkeypatch.delenv("DVGATE_CACHE")
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "x"))
    assert compiled.cache_dir() == tmp_path / "x" / "dvgate"


def test_missing_compiler_is_a_clear_error_and_the_default_falls_back(monkeypatch):
    monkeypatch.setattr(compiled, "find_compiler", lambda: None)
    with pytest.raises(UserError, match="no C\\+\\+ compiler found"):
        compiled.run_compiled(TERNARY, Stimulus(cycles=10))
    with pytest.raises(UserError, match="--engine compiled: no C\\+\\+ compiler"):
        get_engine("compiled")
    name, why = choose()
    assert name == "python" and "falling back to the python engine" in why
    run, description = get_engine(None)
    assert run is run_amaranth and description.startswith("python") and "no C++ compiler" in description


def test_engine_choice_with_a_compiler():
    assert choose()[0] == "compiled"
    run, description = get_engine(None)
    assert run is compiled.run_compiled and description.startswith("compiled (CXXRTL")
    assert get_engine("python")[0] is run_amaranth
    with pytest.raises(UserError, match="engine = 'verilog': allowed: python, compiled"):
        get_engine("verilog")


def test_compile_error_is_a_clear_error(monkeypatch, tmp_path):
    monkeypatch.setenv("DVGATE_CACHE", str(tmp_path))
    monkeypatch.setattr(compiled, "CXXFLAGS", (*compiled.CXXFLAGS, "--no-such-flag-for-dvgate"))
    compiled._builds.clear()
    with pytest.raises(UserError, match=r"the C\+\+ build of .* failed .*full log: "):
        compiled.build(TERNARY)
    compiled._builds.clear()


def _stim_file(path: Path, records: list[tuple[int, int, int]], *, channels: int = 1, cycles: int = 100,
               header_records: int | None = None, magic: bytes = compiled.STIM_MAGIC, cut: int = 0) -> Path:
    count = len(records) if header_records is None else header_records
    data = struct.pack("<8sIIQQ", magic, channels, 0, cycles, count)
    data += b"".join(struct.pack("<QIIq", c, k, 0, v) for c, k, v in records)
    path.write_bytes(data[:len(data) - cut])
    return path


@pytest.mark.parametrize("records, extra, message", [
    ([(0, 1, 1), (5, 0, 1)], {"magic": b"NOTDVGAT"}, "header: not a dvgate stimulus file"),
    ([(0, 1, 1)], {"channels": 2}, "header: 2 channels, but the design has 1"),
    ([(0, 1, 1), (5, 0, 1)], {"cut": 3}, "record 1 of 2: cut short"),
    ([(0, 1, 1), (9, 0, 1), (5, 0, 0)], {}, r"record 2 \(cycle 5, strobe\): comes after cycle 9"),
    ([(0, 1, 1), (5, 200, 1)], {}, r"record 1 \(cycle 5, \?\): unknown kind 200"),
    ([(0, 1, 1), (5, 3, 1 << 40)], {}, r"record 1 \(cycle 5, rate_data\): value 1099511627776 does not fit"),
    ([(0, 1, 1), (5, 1, 2)], {}, r"record 1 \(cycle 5, arm\): value 2 does not fit"),
    ([(0, 1, 1), (100, 0, 1)], {}, r"record 1 \(cycle 100, strobe\): past the run"),
    ([(0, 255, 0)], {}, r"record 0 \(cycle 0, sample\): a sample must be at cycle 1 to 100"),
    ([(0, 1, 1), (5, 254, 5)], {}, r"record 1 \(cycle 5, window\): the window ends at 5, not after its start"),
    ([(0, 254, 9), (5, 254, 20)], {}, r"record 1 \(cycle 5, window\): a second window"),
    ([(0, 1, 1)], {"header_records": 0}, "more bytes after record 0"),
])
def test_malformed_stimulus_names_the_record(tmp_path, records, extra, message):
    # Kinds: 0 strobe, 1 arm, 3 rate_data (the emulator's input ports in order), 255 a sample.
    assert [name for name, _, _ in compiled.input_ports(TERNARY)][:4] == ["strobe", "arm", "rate_addr", "rate_data"]
    path = _stim_file(tmp_path / "bad.bin", records, **extra)
    done = compiled.run_file(TERNARY, path, tmp_path)
    assert done.returncode == compiled.EXIT_BAD_STIMULUS
    assert re.search(message, done.stderr), done.stderr
    assert not (tmp_path / "result.bin").exists()


def test_harness_error_becomes_a_user_error(tmp_path):
    path = _stim_file(tmp_path / "bad.bin", [(0, 1, 1), (5, 1, 7)])
    binary = compiled.build(TERNARY)
    with pytest.raises(UserError, match=r"compiled engine: stimulus file .*record 1 \(cycle 5, arm\)"):
        compiled._execute([str(binary), str(path), str(tmp_path / "e"), str(tmp_path / "r")], 100, False)


def test_a_harness_crash_is_an_error_not_a_result(tmp_path):
    with pytest.raises(UserError, match="harness failed"):
        compiled._execute(["sh", "-c", "echo boom >&2; exit 7"], 10, False)


def test_rate_changes_too_tight_for_the_port_are_refused():
    stim = Stimulus(cycles=50, rate_changes=(RateChange(10, 0, 1), RateChange(10, 1, 2), RateChange(11, 0, 3),
                                            RateChange(11, 1, 4)))
    with pytest.raises(ValueError, match="rate changes at cycle 11"):
        compiled.run_compiled(BINARY, stim)


# --- long-run fidelity ----------------------------------------------------------------

#: A computation cycle of 2 s: the computer reads its counters every 2 s (common practice, no source).
COMPUTATION_CYCLE_S = 2.0


def fidelity_setup() -> tuple:
    """Two accelerometer channels, 1 MHz clock, burst scheme, a strobe every 320 cycles (3125 Hz)."""
    raw = {"clock": "1 MHz",
           "strobe": {"min_width": "1 cycles", "period": "320 cycles", "absence_timeout": "10 ms"},
           "pulses": {"scheme": "burst", "rest": 1, "width": "1 cycles", "gap": "1 cycles"},
           "rate": {"clamp": 8, "backlog": 32},
           "defaults": {"weight": "0.01 m/s", "range": "16 g"},
           "channels": [{"name": "x"}, {"name": "z"}]}
    config = parse_config(raw, "<fidelity test>")
    hw = config.hw
    period, strobes, first = 320, 1_000_000, 100
    cycles = first + strobes * period
    edges = periodic_strobe_edges(cycles, period, 2, first=first)
    # A varying rate program in m/s^2 (invented): two slow swings on x, gravity plus a swing on z,
    # changed every 500 strobes on both channels at once.
    changes = []
    for c in range(first + 250 * period + 7, cycles, 500 * period):
        t = c / hw.clock_hz
        ax = 60 * math.sin(2 * math.pi * t / 37.0) + 15 * math.sin(2 * math.pi * t / 5.3)
        az = -9.80665 + 70 * math.sin(2 * math.pi * t / 91.0 + 1)
        changes += [RateChange(c, 0, config.rate_to_fixed(0, ax)), RateChange(c, 1, config.rate_to_fixed(1, az))]
    stim = Stimulus(cycles=cycles, strobe_edges=edges, rate_changes=tuple(changes))
    return config, stim, period, first


@pytest.mark.slow
def test_million_strobes_counts_stay_within_one_pulse_weight():
    config, stim, period, first = fidelity_setup()
    hw = config.hw
    assert len(stim.strobe_edges) // 2 == 1_000_000
    # The computer reads its counters once per computation cycle, in step with its strobe:
    # just before the first strobe it sends after each 2 s boundary.
    every = round(COMPUTATION_CYCLE_S * hw.clock_hz)
    reads = sorted({first + math.ceil((b - first) / period) * period for b in range(every, stim.cycles, every)})
    reads = [r for r in reads if r < stim.cycles - period]
    run = compiled.count_compiled(hw, stim, reads)
    assert run.result.status.overruns == 0 and run.result.status.clamps == 0  # every burst ends in its period
    armed = armed_intervals(stim)
    one = 1 << hw.frac_bits
    worst = 0.0
    for read in reads:
        last_strobe = read - period + hw.min_width_cyc + 1  # stb of the strobe before the read (timing.md)
        for ch in range(hw.n):
            pos, neg = run.samples[read][ch]
            commanded = integral(hw, stim, ch, armed, upto=last_strobe)  # fixed point, exact
            error = abs(commanded - (pos - neg) * one)
            worst = max(worst, error / one)
            # First-order error feedback keeps the running error within one quantum
            # (Schreier and Temes, Understanding Delta-Sigma Data Converters).
            assert error <= one, f"read at cycle {read}, channel {hw.names[ch]}: off by {error / one:.6f} pulses"
    assert len(reads) >= 150 and 0 < worst <= 1
    model = simulate(hw, stim, record=False)
    assert run.counts == tuple(model.counts)
    assert run.result.status == model.result.status and run.result.channels == model.result.channels
    assert not conservation_errors(hw, stim, run.result, list(run.counts))


def test_stimulus_file_round_trip(tmp_path):
    stim = Stimulus(cycles=50, strobe_edges=(3, 6, 20), rate_changes=(RateChange(10, 1, -5),),
                    arm_changes=((0, True), (30, False)))
    path = tmp_path / "s.bin"
    compiled.write_stimulus(path, BINARY, stim, samples=[7, 50])
    raw = path.read_bytes()
    magic, channels, flags, cycles, count = struct.unpack_from("<8sIIQQ", raw)
    assert (magic, channels, flags, cycles) == (b"DVGSTIM1", 2, 0, 50)
    recs = np.frombuffer(raw, dtype=compiled._RECORD, offset=32)
    assert len(recs) == count
    names = [name for name, _, _ in compiled.input_ports(BINARY)]
    kinds = {(int(r["cycle"]), "sample" if r["kind"] == compiled.SAMPLE_KIND else names[r["kind"]], int(r["value"]))
             for r in recs}
    assert {(3, "strobe", 1), (6, "strobe", 0), (20, "strobe", 1), (9, "rate_addr", 1), (9, "rate_data", -5),
            (9, "rate_we", 1), (9, "rate_commit", 1), (30, "arm", 0), (7, "sample", 0), (50, "sample", 0)} <= kinds
    assert list(recs["cycle"]) == sorted(recs["cycle"])


def test_harness_binary_runs_standalone(tmp_path):
    # The harness is a plain program: a stimulus file in, two result files out.
    stim = Stimulus(cycles=60, strobe_edges=(5, 8))
    compiled.write_stimulus(tmp_path / "s.bin", TERNARY, stim)
    done = subprocess.run([str(compiled.build(TERNARY)), str(tmp_path / "s.bin"), str(tmp_path / "e.bin"),
                           str(tmp_path / "r.bin")], capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    assert (tmp_path / "r.bin").read_bytes()[:8] == compiled.RESULT_MAGIC


@pytest.mark.parametrize("block", [1, 5, 1 << 20])
def test_stimulus_file_written_in_spans_is_one_stable_sort(tmp_path, monkeypatch, block):
    # The records are written a span of cycles at a time; the file is the same as one
    # stable sort by cycle of the plan, the pin's edges, the samples and the window.
    from dvgate.sim.testbench import PLAN_PORTS, input_writes
    from dvgate.sim.trace import Cycles, RateChanges

    edges = periodic_strobe_edges(900, 37, 3, first=3)
    changes = [RateChange(c, ch, (c * 7 + ch) % 200 - 100) for c in range(40, 880, 25) for ch in range(2)]
    stim = Stimulus(cycles=880, strobe_edges=Cycles(edges), rate_changes=RateChanges.of(tuple(changes)),
                    arm_changes=((0, True), (500, False), (501, True)))
    samples, window = [880, 3, 3, 400, 0], (100, 300)
    monkeypatch.setattr(compiled, "RECORD_BLOCK", block)
    recs = compiled.stimulus_records(BINARY, stim, samples, window)
    compiled.write_stimulus(tmp_path / "s.bin", BINARY, stim, samples=samples, window=window)
    raw = (tmp_path / "s.bin").read_bytes()
    assert struct.unpack_from("<Q", raw, 24)[0] == len(recs) and raw[32:] == recs.tobytes()
    # One sort of everything, as the records are meant: plan, then pin, samples, window at a cycle.
    writes = input_writes(BINARY, stim, strobe=False)
    kinds = {name: kind for kind, (name, _, _) in enumerate(compiled.input_ports(BINARY))}
    rows = [(c, kinds[PLAN_PORTS[p]], v) for c, p, v in zip(writes.cycle.tolist(), writes.port.tolist(),
                                                             writes.value.tolist(), strict=True)]
    rows += [(e, kinds["strobe"], (i + 1) % 2) for i, e in enumerate(edges) if e < stim.cycles]
    rows += [(s, compiled.SAMPLE_KIND, 0) for s in sorted(samples)] + [(100, compiled.WINDOW_KIND, 300)]
    rows.sort(key=lambda r: r[0])  # stable
    assert [(int(r["cycle"]), int(r["kind"]), int(r["value"])) for r in recs] == rows
    assert run_compiled_counts_equal(stim, [s for s in samples if s >= 1])  # the harness takes samples from 1


def run_compiled_counts_equal(stim: Stimulus, samples: list[int]) -> bool:
    """The compiled engine on the compact stimulus counts what the model does on the tuple one."""
    plain = Stimulus(cycles=stim.cycles, strobe_edges=tuple(stim.strobe_edges), rate_changes=tuple(stim.rate_changes),
                     arm_changes=stim.arm_changes)
    counted = compiled.count_compiled(BINARY, stim, samples)
    model = simulate(BINARY, plain, record=False)
    return counted.counts == tuple(model.counts) and counted.result.channels == model.result.channels

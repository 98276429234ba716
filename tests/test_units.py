import math

import pytest

from dvgate.units import STANDARD_GRAVITY, QuantityError, format_si, parse_quantity


def test_standard_gravity():
    # Standard gravity 9.80665 m/s^2 (3rd CGPM, 1901).
    assert STANDARD_GRAVITY == 9.80665
    assert parse_quantity("1 g", "acceleration") == (9.80665, "g")
    assert parse_quantity("16 g", "acceleration")[0] == pytest.approx(156.9064, abs=1e-12)
    assert parse_quantity("1 mg", "acceleration")[0] == pytest.approx(9.80665e-3, rel=1e-15)


@pytest.mark.parametrize("text, kind, value", [
    ("500 ns", "time", 500e-9), ("1 us", "time", 1e-6), ("2.5ms", "time", 2.5e-3), ("12 MHz", "frequency", 12e6),
    ("0.01 m/s", "velocity", 0.01), ("1 cm/s", "velocity", 0.01), ("180 deg", "angle", math.pi),
    ("-3e-1 rad/s", "angular_rate", -0.3),
])
def test_parse(text, kind, value):
    assert parse_quantity(text, kind)[0] == pytest.approx(value, rel=1e-12)


@pytest.mark.parametrize("text, needle", [
    (3, "bare number"), ("3", "<number> <unit>"), ("3 furlongs", "unknown unit 'furlongs'"), ("nan s", "<number>"),
    ("1e999 s", "finite"), (True, "expected text"),
])
def test_parse_refuses(text, needle):
    with pytest.raises(QuantityError, match=needle):
        parse_quantity(text, "time")


def test_cycles_as_extra_unit():
    assert parse_quantity("6 cycles", "time", extra_units=("cycles",)) == (6.0, "cycles")


def test_format_si():
    assert format_si(12e6, "Hz") == "12 MHz"
    assert format_si(750e-9, "s") == "750 ns"
    assert format_si(0, "s") == "0 s"

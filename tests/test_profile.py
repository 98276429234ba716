"""Profiles: CSV import, its refusals, and exact integrals of the piecewise-linear form."""

import math

import numpy as np
import pytest
from motionkit import fast_config
from scipy.integrate import cumulative_trapezoid

from dvgate.config import parse_config
from dvgate.errors import UserError
from dvgate.sim.profile import Profile, read_csv, running_sum
from dvgate.units import STANDARD_GRAVITY

CHANNELS = fast_config().channels


def write(tmp_path, text, name="p.csv"):
    path = tmp_path / name
    path.write_text(text)
    return path


def test_reads_units_and_comments(tmp_path):
    path = write(tmp_path, "# a comment\n\ntime [ms], z [g], x (m/s^2), y [mg]\n0, 1, 0, 0\n500, 1, 2.5, 1000\n"
                           "# trailing comment\n1000, 0.5, 0, -1000\n")
    p = read_csv(path, CHANNELS)
    assert p.names == ("x", "y", "z")
    assert p.units == ("m/s^2",) * 3
    np.testing.assert_allclose(p.time, [0.0, 0.5, 1.0])
    # 1 g and 1000 mg are standard gravity (3rd CGPM, 1901).
    np.testing.assert_allclose(p.values[:, 2], [STANDARD_GRAVITY, STANDARD_GRAVITY, STANDARD_GRAVITY / 2])
    np.testing.assert_allclose(p.values[:, 1], [0.0, STANDARD_GRAVITY, -STANDARD_GRAVITY])
    np.testing.assert_allclose(p.values[:, 0], [0.0, 2.5, 0.0])
    assert list(p.lines) == [4, 5, 7]


def test_gyro_channel_takes_angular_rate(tmp_path):
    gyro = {"name": "gx", "weight": "1e-5 rad", "range": "100 deg/s", "rate": "0 deg/s"}
    cfg = parse_config({"channels": [gyro]}, "g.toml")
    p = read_csv(write(tmp_path, "t [s], gx [deg/s]\n0, 10\n1, 10\n"), cfg.channels)
    assert p.units == ("rad/s",)
    assert p.values[0, 0] == pytest.approx(math.radians(10))
    with pytest.raises(UserError, match=r"column 'gx': unit 'm/s\^2' is not an angular rate"):
        read_csv(write(tmp_path, "t [s], gx [m/s^2]\n0, 10\n1, 10\n"), cfg.channels)


BAD = [
    ("time [s], x [m/s^2], y [m/s^2], z [m/s^2]\n0, 1, 2, 3\n1, nan, 2, 3\n",
     r"p\.csv: line 3, column 'x': 'nan' is not a finite number"),
    ("time [s], x [m/s^2], y [m/s^2], z [m/s^2]\n0, 1, 2, 3\n1, inf, 2, 3\n", r"line 3, column 'x'.*finite"),
    ("time [s], x [m/s^2], y [m/s^2], z [m/s^2]\n0, 1, , 3\n1, 1, 2, 3\n",
     r"p\.csv: line 2, column 'y': empty cell"),
    ("time [s], x [m/s^2], y [m/s^2], z [m/s^2]\n0, 1, 2, 3\n2, 1, 2, 3\n1, 1, 2, 3\n",
     r"p\.csv: line 4, column 'time': time goes backwards: 1 after 2 on line 3"),
    ("time [s], x [m/s^2], y [m/s^2], z [m/s^2]\n0, 1, 2, 3\n0, 1, 2, 3\n", r"line 3, column 'time': time repeats"),
    ("time [s], x [m/s^2], y [m/s^2]\n0, 1, 2\n1, 1, 2\n", r"p\.csv: line 1: missing column\(s\) 'z'"),
    ("time [s], x [m/s^2], y [m/s^2], z [m/s^2], w [m/s^2]\n0, 1, 2, 3, 4\n1, 1, 2, 3, 4\n",
     r"p\.csv: line 1, column 5: unknown column 'w'"),
    ("time [s], x [m/s^2], yy [m/s^2], z [m/s^2]\n0, 1, 2, 3\n1, 1, 2, 3\n", r"unknown column 'yy'.*did you mean 'y'"),
    ("time [s], x [m/s], y [m/s^2], z [m/s^2]\n0, 1, 2, 3\n1, 1, 2, 3\n",
     r"p\.csv: line 1, column 'x': unit 'm/s' is not an acceleration; allowed: m/s\^2, m/s2, g, mg"),
    ("time [h], x [m/s^2], y [m/s^2], z [m/s^2]\n0, 1, 2, 3\n1, 1, 2, 3\n", r"column 'time': unit 'h' is not a time"),
    ("time [s], x, y [m/s^2], z [m/s^2]\n0, 1, 2, 3\n1, 1, 2, 3\n", r"line 1, column 'x': no unit"),
    ("x [m/s^2], y [m/s^2], z [m/s^2]\n1, 2, 3\n1, 2, 3\n", r"line 1: no time column"),
    ("time [s], x [m/s^2], x [m/s^2], z [m/s^2]\n0, 1, 2, 3\n1, 1, 2, 3\n", r"'x' appears twice"),
    ("time [s], x [m/s^2], y [m/s^2], z [m/s^2]\n0, 1, 2, 3\n1, 1, 2\n", r"line 3: 3 cells, but the header"),
    ("time [s], x [m/s^2], y [m/s^2], z [m/s^2]\n0, 1, 2, 3\n1, 1, two, 3\n", r"line 3, column 'y': 'two' is not"),
    ("time [s], x [m/s^2], y [m/s^2], z [m/s^2]\n0, 1, 2, 3\n", r"at least two samples"),
    ("time [s], x [m/s^2], y [m/s^2], 3z [m/s^2]\n0, 1, 2, 3\n1, 1, 2, 3\n",
     r"column 4: header cell '3z \[m/s\^2\]' is not 'name \[unit\]'"),
    ("# only a comment\n", r"empty"),
]


@pytest.mark.parametrize(("text", "message"), BAD)
def test_bad_csv(tmp_path, text, message):
    with pytest.raises(UserError, match=message):
        read_csv(write(tmp_path, text), CHANNELS)


def test_missing_file(tmp_path):
    with pytest.raises(UserError, match="no such file"):
        read_csv(tmp_path / "absent.csv", CHANNELS)


def test_profile_checks_its_shape():
    with pytest.raises(ValueError, match="decrease"):
        Profile([0, 2, 1], [0, 0, 0], ("x",), ("m/s^2",))
    with pytest.raises(ValueError, match="at most twice"):
        Profile([0, 1, 1, 1, 2], [0] * 5, ("x",), ("m/s^2",))
    with pytest.raises(ValueError, match="finite"):
        Profile([0, 1], [0, math.nan], ("x",), ("m/s^2",))
    with pytest.raises(ValueError, match="two samples"):
        Profile([0], [0], ("x",), ("m/s^2",))


def test_interval_integrals_of_a_sine():
    t = np.linspace(0.0, 10.0, 2001)
    p = Profile(t, np.sin(t), ("x",), ("m/s^2",))
    bounds = np.sort(np.concatenate(([0.0, 10.0], np.random.default_rng(3).uniform(0, 10, 57))))
    got = p.interval_integrals(bounds)[:, 0]
    # The analytic integral of sin; the linear interpolation errs by about dt^2/12 per unit.
    np.testing.assert_allclose(got, np.cos(bounds[:-1]) - np.cos(bounds[1:]), atol=1e-5)
    # On the sample grid the integral is exactly the trapezoid rule (scipy.integrate).
    np.testing.assert_allclose(p.integral(t)[:, 0], cumulative_trapezoid(np.sin(t), t, initial=0.0), atol=1e-12)


def test_steps_and_values_at_a_step():
    p = Profile([0, 1, 1, 2], [0, 0, 5, 5], ("x",), ("m/s^2",))
    np.testing.assert_allclose(p.interval_integrals(np.array([0, 0.5, 1, 1.5, 2]))[:, 0], [0, 0, 2.5, 2.5])
    np.testing.assert_allclose(p.at([0.5, 1.0, 1.5])[:, 0], [0, 5, 5])
    np.testing.assert_allclose(p.integral([2.0])[:, 0], [5.0])


def test_running_sum_stays_accurate():
    # A million equal terms: a plain running sum drifts; math.fsum gives the exact total.
    parts = np.full((1_000_000, 1), 0.0098)
    exact = math.fsum(parts[:, 0])
    assert abs(running_sum(parts)[-1, 0] - exact) < 1e-11
    assert abs(np.cumsum(parts[:, 0])[-1] - exact) > 1e-9  # why the careful sum is needed

"""WGS 84 normal gravity against the published check values."""

import math

import numpy as np
import pytest

from dvgate.sim.gravity import (
    EARTH_RATE,
    GAMMA_EQUATOR,
    GAMMA_POLE,
    SEMI_MAJOR_AXIS,
    SEMI_MINOR_AXIS,
    earth_rate_components,
    normal_gravity,
)


def test_equator_and_poles():
    # NIMA TR8350.2, 3rd ed., table 3.4: gamma_e = 9.7803253359, gamma_p = 9.8321849378 m/s^2.
    assert normal_gravity(0.0) == pytest.approx(9.7803253359, abs=1e-10)
    assert normal_gravity(90.0) == pytest.approx(9.8321849378, abs=1e-9)
    assert normal_gravity(-90.0) == pytest.approx(9.8321849378, abs=1e-9)


def test_45_degrees_against_the_other_closed_form():
    # NIMA TR8350.2, 3rd ed., ch. 4: Somigliana's formula written with the semi-axes,
    # gamma = (a gamma_e cos^2 + b gamma_p sin^2) / sqrt(a^2 cos^2 + b^2 sin^2), must agree
    # with the form in k and e^2 that the module uses.
    c2, s2 = math.cos(math.radians(45)) ** 2, math.sin(math.radians(45)) ** 2
    a, b = SEMI_MAJOR_AXIS, SEMI_MINOR_AXIS
    other = (a * GAMMA_EQUATOR * c2 + b * GAMMA_POLE * s2) / math.sqrt(a * a * c2 + b * b * s2)
    assert normal_gravity(45.0) == pytest.approx(other, abs=1e-9)
    # The formula's value at 45 degrees with TR8350.2's constants (eq. 4-1, worked by hand).
    assert normal_gravity(45.0) == pytest.approx(9.8061977694, abs=1e-9)


def test_free_air_correction():
    # Free-air gradient of about 0.3086 mGal/m, that is 3.086e-6 s^-2 (common practice, no source).
    drop = normal_gravity(45.0, 0.0) - normal_gravity(45.0, 1000.0)
    assert drop == pytest.approx(3.086e-3, rel=0.01)
    # TR8350.2 eq. 4-3 is a series in h: at zero height it changes nothing.
    assert normal_gravity(30.0, 0.0) == normal_gravity(30.0)


def test_arrays_and_range():
    values = normal_gravity(np.array([0.0, 90.0]), np.array([0.0, 0.0]))
    assert values.shape == (2,)
    assert values[1] > values[0]
    # the scalar path and the array path compute the same formula
    assert normal_gravity(np.array(33.0), np.array(1500.0)) == pytest.approx(normal_gravity(33.0, 1500.0), rel=1e-15)
    with pytest.raises(ValueError, match="latitude"):
        normal_gravity(91.0)


def test_earth_rate_on_a_bench():
    # TR8350.2 table 3.1: omega = 7292115e-11 rad/s; split into north and up by the latitude.
    north, up = earth_rate_components(30.0)
    assert math.hypot(north, up) == pytest.approx(EARTH_RATE)
    assert up == pytest.approx(7292115e-11 * 0.5)

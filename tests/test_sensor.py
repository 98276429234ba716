"""The sensor error model: each term's effect against its definition, and its refusals."""

import numpy as np
import pytest
from motionkit import fast_config

from dvgate.errors import UserError
from dvgate.sim.model import simulate
from dvgate.sim.profile import Profile
from dvgate.sim.program import make_program
from dvgate.sim.sensor import SensorSettings, apply_sensor, sensor_model
from dvgate.units import STANDARD_GRAVITY

G = STANDARD_GRAVITY  # 9.80665 m/s^2 (3rd CGPM, 1901)
NAMES = ("x", "y", "z")
UNITS = ("m/s^2",) * 3


def static(seconds, up=(0.0, 0.0, G)):
    return Profile([0.0, seconds], [up, up], NAMES, UNITS, source="static")


def velocity_gain(profile, cfg):
    """Velocity the program commands over the profile, m/s per channel (exact integers / 2**F)."""
    program = make_program(profile, cfg)
    return program.velocity(program.total_ticks)[0]


def test_off_by_default():
    model = sensor_model(fast_config())
    assert not model.active
    profile = static(1.0)
    out, effect = apply_sensor(profile, model)
    assert out is profile
    assert not effect.noise_dv.any()


def test_one_mg_bias_adds_standard_gravity_milli_per_second():
    # 1 mg of bias is 9.80665e-3 m/s^2 (standard gravity, 3rd CGPM): over 10 s at rest it
    # adds 9.80665e-2 m/s on that channel only.
    cfg = fast_config(sensor={"bias": {"x": "1 mg"}})
    profile, _ = apply_sensor(static(10.0, (0.0, 0.0, 0.0)), sensor_model(cfg))
    gain = velocity_gain(profile, cfg)
    lsb = 1000 * 0.01 / 2 ** 36  # one LSB x the ticks of one 1 ms segment, in m/s
    assert gain[0] == pytest.approx(9.80665e-3 * 10.0, abs=lsb)
    assert gain[1] == 0.0 and gain[2] == 0.0
    same = fast_config(sensor={"bias": "1000 ug"})  # micro-g, the trade's unit
    assert sensor_model(same).bias[0] == pytest.approx(9.80665e-3)


def test_hundred_ppm_scale_factor_over_a_static_1g_run():
    # A 100 ppm scale-factor error (a precision figure of the trade, common practice, no
    # source) changes the velocity of a 1 g, 1000 s static run by 0.980665 m/s: 98 whole
    # pulses at 1 cm/s per pulse, counted through the reference model.
    # Long segments and a slow strobe: the same integral, far fewer events to simulate.
    quick = {"program": {"segment": "1 s"},
             "strobe": {"min_width": "3 us", "absence_timeout": "500 ms", "period": "100 ms"}}
    base = fast_config(**quick)
    erring = fast_config(**quick, sensor={"scale_factor": "100 ppm"})
    plain = static(1000.0)
    scaled, _ = apply_sensor(plain, sensor_model(erring))
    diff = velocity_gain(scaled, erring) - velocity_gain(plain, base)
    assert diff[2] == pytest.approx(0.980665, abs=1e-6)

    from dvgate.run import plan_run

    totals, counts = [], []
    for profile, cfg in ((plain, base), (scaled, erring)):
        plan = plan_run(make_program(profile, cfg), cfg)
        run = simulate(cfg.hw, plan.stimulus, record=False)
        counts.append(run.counts[2][0] - run.counts[2][1])
        totals.append(counts[-1] + run.result.channels[2].owed / 2 ** cfg.hw.frac_bits)
    # Emitted plus owed (the model's books) is the commanded velocity: 1 g x 1000 s is
    # 980,665 pulses, and the error adds 98.0665 of them.
    assert totals[0] == pytest.approx(980665.0, abs=1e-3)
    assert totals[1] - totals[0] == pytest.approx(98.0665, abs=1e-3)
    # The whole pulses emitted differ by 98, plus one where the 0.0665 tips the fraction
    # still owed at the end of the base run over a whole pulse.
    carried = totals[0] - counts[0]
    assert counts[1] - counts[0] == 98 + int(carried + 0.0665 >= 1.0)


def test_misalignment_and_second_order():
    angles = [["0 urad", "100 urad", "0 urad"], ["0 urad", "0 urad", "0 urad"], ["-50 urad", "0 urad", "0 urad"]]
    cfg = fast_config(sensor={"misalignment": angles, "second_order": {"y": "10 ug/g^2"}})
    model = sensor_model(cfg)
    out, _ = apply_sensor(static(1.0, (G, 2 * G, 0.0)), model)
    # Small angles: channel x senses 100 urad of the y axis; z senses -50 urad of x.
    np.testing.assert_allclose(out.values[0], [G + 100e-6 * 2 * G, 2 * G + 10e-6 * G * 4, -50e-6 * G], rtol=1e-12)
    with pytest.raises(UserError, match=r"sensor\.misalignment.*diagonal must be zero"):
        sensor_model(fast_config(sensor={"misalignment": [["1 urad", "0 urad", "0 urad"], ["0 urad"] * 3,
                                                          ["0 urad"] * 3]}))


def test_velocity_random_walk_is_seeded_and_scaled():
    # A velocity random walk N (m/s per root hour) adds N / 60 x sqrt(dt) m/s of standard
    # deviation per step dt (definition of a random-walk coefficient, from memory).
    cfg = fast_config(sensor={"vrw": {"z": "0.6 m/s/sqrt(h)"}, "noise_step": "1 s", "seed": 7})
    profile = static(4000.0)
    out, effect = apply_sensor(profile, sensor_model(cfg))
    again, _ = apply_sensor(profile, sensor_model(cfg))
    assert np.array_equal(out.values, again.values)
    steps = out.interval_integrals(np.arange(0.0, 4001.0, 1.0)) - G * np.array([0.0, 0.0, 1.0])
    assert not steps[:, :2].any()
    assert np.std(steps[:, 2]) == pytest.approx(0.01, rel=0.05)
    assert effect.noise_dv[2] == pytest.approx(steps[:, 2].sum())
    reseeded = fast_config(sensor={"vrw": "0.6 m/s/sqrt(h)", "noise_step": "1 s", "seed": 8})
    other, _ = apply_sensor(profile, sensor_model(reseeded))
    assert not np.array_equal(other.values[:, 2], out.values[:, 2])


def test_noise_keeps_profile_steps():
    t = np.array([0.0, 0.5, 0.5, 1.0])
    z = np.array([0.0, 0.0, 5.0, 5.0])
    profile = Profile(t, np.column_stack([0 * z, 0 * z, z]), NAMES, UNITS)
    cfg = fast_config(sensor={"vrw": "1e-9 m/s/sqrt(h)", "noise_step": "100 ms"})
    out, _ = apply_sensor(profile, sensor_model(cfg))
    assert out.integral([1.0])[0, 2] == pytest.approx(2.5, abs=1e-9)
    assert np.count_nonzero(out.time == 0.5) == 2


BAD = [
    ({"bais": "1 mg"}, r"unknown key 'sensor\.bais'; did you mean 'sensor\.bias'\?"),
    ({"bias": "1 furlong"}, r"sensor\.bias.*unknown unit 'furlong'"),
    ({"bias": 5}, r"sensor\.bias.*bare number is ambiguous"),
    ({"scale_factor": {"q": "1 ppm"}}, r"sensor\.scale_factor\.q: the config has no channel 'q'"),
    ({"vrw": "-1 m/s/sqrt(h)"}, r"sensor\.vrw.*at least 0"),
    ({"misalignment": [["0 urad"]]}, r"3 x 3 matrix"),
    ({"misalignment": [["0 urad", "1 rad", "0 urad"], ["0 urad"] * 3, ["0 urad"] * 3]}, r"small angles only"),
    ({"axes": ["x", "x", "y"]}, r"three different channel names"),
]


@pytest.mark.parametrize(("section", "message"), BAD)
def test_bad_sensor_sections(section, message):
    with pytest.raises(UserError, match=message):
        sensor_model(fast_config(sensor=section))


def test_gyro_channels_are_refused_by_name():
    channels = [{"name": "x"}, {"name": "gz", "weight": "1e-5 rad", "range": "1 rad/s", "rate": "0 rad/s"}]
    with pytest.raises(UserError, match=r"sensor\.bias\.gz: 'gz' is not an accelerometer"):
        sensor_model(fast_config(channels=channels, sensor={"bias": {"gz": "1 mg"}}))
    # one value for all applies to the accelerometers only
    model = sensor_model(fast_config(channels=channels, sensor={"bias": "1 mg"}))
    assert model.bias.tolist() == [pytest.approx(9.80665e-3), 0.0]


def test_settings_defaults():
    assert SensorSettings().seed == 1

"""Built-in scenarios: their profiles, their refusals, and the physics they must obey end to end."""

import math
from pathlib import Path

import numpy as np
import pytest
from motionkit import fast_config

from dvgate.config import parse_config
from dvgate.errors import UserError
from dvgate.run import run_pipeline
from dvgate.sim.gravity import normal_gravity
from dvgate.sim.model import run_model
from dvgate.sim.scenarios import load_scenario, parse_scenario, scenario_profile

EXAMPLES = Path(__file__).resolve().parent.parent / "dvgate" / "examples"
CFG = fast_config()
WEIGHT = 0.01  # m/s per pulse in the fast config


def profile_of(raw, cfg=CFG, source="s.toml"):
    return scenario_profile(parse_scenario(raw, source), cfg.channels, source)


@pytest.mark.parametrize("name", sorted(p.name for p in EXAMPLES.glob("scenario_*.toml")))
def test_every_example_loads(name):
    profile = load_scenario(EXAMPLES / name, CFG.channels)
    assert profile.duration > 1.0
    assert profile.names == ("x", "y", "z")
    assert np.all(np.abs(profile.values) <= 16 * 9.80665)


def test_demo_is_marked_invented():
    profile = load_scenario(EXAMPLES / "scenario_demo.toml", CFG.channels)
    assert any("invented" in note for note in profile.notes)
    names = [p.name for p in profile.phases]
    assert names[0] == "bench: +z up" and names[-4:] == ["pad", "boost", "coast", "descent"]
    z = profile.values[:, 2]
    g = normal_gravity(47.5, 420.0)

    def during(phase):
        ph = next(p for p in profile.phases if p.name == phase)
        inside = (profile.time > ph.start) & (profile.time < ph.stop)
        return z[inside]

    assert np.allclose(during("pad"), g)
    assert during("boost").max() > 5 * g  # thrust over mass
    assert during("coast").max() < 0.0  # drag decelerates: the sensor reads it negative
    assert during("descent")[-1] == pytest.approx(g, rel=0.01)  # steady under the parachute


def test_static_reads_normal_gravity_and_earth_rate():
    # WGS 84 normal gravity on the up axis (NIMA TR8350.2, 3rd ed., eq. 4-1 and 4-3).
    profile = profile_of({"static": {"latitude": "30 deg", "height": "200 m", "up": "-y", "duration": "2 s"}})
    np.testing.assert_allclose(profile.values[0], [0.0, -normal_gravity(30.0, 200.0), 0.0])
    gyro = parse_config({"channels": [{"name": n, "weight": "1e-6 rad", "range": "1 rad/s", "rate": "0 rad/s"}
                                      for n in ("gx", "gy", "gz")]}, "g.toml")
    rates = profile_of({"static": {"latitude": "30 deg", "up": "+z", "north": "+x"}}, gyro).values[0]
    # Earth's rate (TR8350.2 table 3.1) splits into cos(lat) north and sin(lat) up.
    np.testing.assert_allclose(rates, [7292115e-11 * math.cos(math.radians(30)), 0.0, 7292115e-11 * 0.5])


def test_tumble_profile_dwells_and_turns():
    profile = profile_of({"tumble": {"positions": ["+z", "-z", "+x"], "dwell": ["1 s", "2 s", "3 s"],
                                     "transition": "0.5 s"}})
    g = normal_gravity(45.0)
    assert profile.duration == pytest.approx(7.0)
    assert [p.name for p in profile.phases] == ["+z up", "turn", "-z up", "turn", "+x up"]
    np.testing.assert_allclose(profile.at([0.5, 2.5, 6.0]), [[0, 0, g], [0, 0, -g], [g, 0, 0]], atol=1e-12)
    # During a turn the specific force keeps its magnitude.
    turning = profile.at(np.linspace(1.0, 1.5, 11))
    np.testing.assert_allclose(np.linalg.norm(turning, axis=1), g)


def test_centrifuge_profile():
    profile = profile_of({"centrifuge": {"rate": "30 rpm", "radius": "2 m", "radial": "-y", "spin_axis": "+z"}})
    omega = math.pi  # 30 rpm
    steady = next(p for p in profile.phases if p.name == "steady")
    mid = profile.at([(steady.start + steady.stop) / 2])[0]
    np.testing.assert_allclose(mid, [0.0, -omega ** 2 * 2.0, normal_gravity(45.0)])


BAD = [
    ({"tumble": {"dwel": "1 s"}}, r"s\.toml: unknown key 'tumble\.dwel'; did you mean 'tumble\.dwell'\?"),
    ({"tumbel": {}}, r"unknown key 'tumbel'; did you mean 'tumble'\?"),
    ({"flight": {"bench": {"positons": []}}}, r"unknown key 'flight\.bench\.positons'; did you mean "
                                              r"'flight\.bench\.positions'\?"),
    ({"static": {}, "tumble": {}}, r"exactly one of .*found \[static\], \[tumble\]"),
    ({"title": "nothing"}, r"exactly one of .*found none"),
    ({"static": {"up": "z"}}, r"static\.up = 'z': 'z' is not a body axis"),
    ({"static": {"up": "+z", "north": "-z"}}, r"north = '-z' must be perpendicular"),
    ({"static": {"latitude": "95 deg"}}, r"static\.latitude.*-90 deg to 90 deg"),
    ({"static": {"latitude": 45}}, r"static\.latitude = 45: a bare number is ambiguous"),
    ({"static": {"duration": "10 parsecs"}}, r"static\.duration = '10 parsecs': unknown unit 'parsecs'"),
    ({"tumble": {"positions": ["+z"]}}, r"tumble\.positions"),
    ({"tumble": {"positions": ["+z", "-z"], "dwell": ["1 s"]}}, r"1 times for 2 positions"),
    ({"burn": {"burn_time": "60 s"}}, r"the burn uses 60 kg, more than the initial mass of 50 kg"),
    ({"burn": {"thrust": "-5 N"}}, r"burn\.thrust = '-5 N': must be greater than zero"),
    ({"centrifuge": {"radial": "+z"}}, r"radial = '\+z' must be perpendicular to spin_axis"),
    ({"flight": {"thrust": "100 N"}}, r"does not lift 15 kg off the pad"),
    ({"static": {}, "map": {"x": "fq"}}, r"map\.x = 'fq': write a body quantity"),
]


@pytest.mark.parametrize(("raw", "message"), BAD)
def test_bad_scenarios(raw, message):
    with pytest.raises(UserError, match=message):
        profile_of(raw)


def test_map_errors():
    with pytest.raises(UserError, match=r"map\.q: the config has no channel 'q'"):
        profile_of({"static": {}, "map": {"q": "+fx"}})
    with pytest.raises(UserError, match=r"map\.x = 'wx': channel 'x' is an accelerometer"):
        profile_of({"static": {}, "map": {"x": "wx"}})
    four = fast_config(channels=[{"name": n} for n in ("a", "b", "c", "d")])
    with pytest.raises(UserError, match=r"channel 'd' gets no body quantity.*map\.d = \"\+fx\""):
        profile_of({"static": {}}, four)
    mapped = profile_of({"static": {"up": "+z"}, "map": {"a": "-fz", "d": "0"}}, four)
    assert mapped.values[0, 0] == pytest.approx(-normal_gravity(45.0))
    assert mapped.values[0, 3] == 0.0


def test_unreadable_scenario(tmp_path):
    (tmp_path / "s.toml").write_text("[static\n")
    with pytest.raises(UserError, match="not valid TOML"):
        load_scenario(tmp_path / "s.toml", CFG.channels)


# -- physics, end to end through the reference model -----------------------------------


def test_constant_thrust_burn_matches_tsiolkovsky():
    out = run_pipeline(EXAMPLES / "scenario_burn.toml", CFG, engine=run_model)
    burn = parse_scenario({"burn": {}}, "b").burn  # the example uses the default values
    # Tsiolkovsky's rocket equation: dv = ve ln(m0 / m1), ve = thrust / mass flow.
    dv = burn.exhaust_velocity * math.log(burn.initial_mass / burn.final_mass)
    assert dv == pytest.approx(2000.0 * math.log(50.0 / 30.0))
    net = out.host.counts[-1]
    assert abs(net[2] * WEIGHT - dv) <= WEIGHT
    assert net[0] == 0 and net[1] == 0
    assert not out.books


def test_centrifuge_count_rate_is_w2r_over_weight():
    out = run_pipeline(EXAMPLES / "scenario_centrifuge.toml", CFG, engine=run_model)
    steady = next(p for p in out.truth.phases if p.name == "steady")
    period = CFG.strobe_period_cyc
    # Counts at the strobes taken inside the steady stretch (one period in from each end).
    takes = out.plan.takes
    inside = takes[(takes >= out.plan.origin + (steady.start * CFG.clock_hz) + period)
                   & (takes <= out.plan.origin + steady.stop * CFG.clock_hz - period)]
    counts = out.samples.at(inside[[0, -1]]).net[:, 0]
    seconds = (inside[-1] - inside[0]) / CFG.clock_hz
    rate = (counts[1] - counts[0]) / seconds
    # Centripetal acceleration a = w^2 r, the principle of IEEE Std 836 centrifuge tests:
    # 60 rpm at 1.5 m gives (2 pi)^2 x 1.5 m/s^2, in pulses per second at 1 cm/s per pulse.
    want = (2 * math.pi) ** 2 * 1.5 / WEIGHT
    assert want == pytest.approx(5921.76, abs=0.01)
    assert abs(rate - want) <= 1.0 / seconds  # within one pulse over the window


def test_static_tumble_cancels_over_six_positions():
    out = run_pipeline(EXAMPLES / "scenario_tumble.toml", CFG, engine=run_model)
    dwells = [p for p in out.truth.phases if p.name.endswith("up")]
    assert len(dwells) == 6
    period = CFG.strobe_period_cyc
    takes = out.plan.takes
    origin = out.plan.origin
    span = None
    per_dwell = []
    for dwell in dwells:
        # The same number of strobes in every dwell, starting two strobes in.
        inside = takes[takes >= origin + dwell.start * CFG.clock_hz + 2 * period]
        count = int((dwell.stop - dwell.start) * CFG.clock_hz // period) - 3
        span = count if span is None else min(span, count)
        ends = inside[[0, span]]
        per_dwell.append(np.diff(out.samples.at(ends).net, axis=0)[0])
    per_dwell = np.array(per_dwell)
    g = normal_gravity(45.0, 0.0)
    # Each dwell reads +/- normal gravity on its up axis (TR8350.2) over its window...
    window = span * period / CFG.clock_hz
    assert np.abs(np.abs(per_dwell).max(axis=1) - g * window / WEIGHT).max() <= 1.0
    # ...and over the six positions the counts of every axis sum to zero, within one
    # pulse weight per dwell.
    assert np.all(np.abs(per_dwell.sum(axis=0)) <= len(dwells))

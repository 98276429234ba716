"""Built-in motion scenarios, each described by a small TOML file.

A scenario file holds exactly one scenario table, whose name is its kind:

- ``[static]``: at rest on a bench at a latitude and height (WGS 84 normal gravity);
- ``[tumble]``: a multi-position tumble on the bench (six positions or more, dwell and
  transition times);
- ``[centrifuge]``: spin-up, a steady angular rate at a radius, spin-down;
- ``[burn]``: a constant-thrust burn in free space (thrust, initial mass, mass flow);
- ``[flight]``: a bench tumble, then a vertical flight: boost, coast and descent under a
  parachute (the shipped demo, an invented sounding rocket, uses it).

Each scenario produces the body's motion: specific force ``fx, fy, fz`` (m/s^2) and
angular rate ``wx, wy, wz`` (rad/s), which a ``[map]`` table (or the config's channel
order) turns into a :class:`~dvgate.sim.profile.Profile` for the config's channels.
"""

from __future__ import annotations

import math
import re
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from dvgate.config import Channel, format_errors, read_toml
from dvgate.errors import UserError
from dvgate.sim import quantities as q
from dvgate.sim.gravity import earth_rate_components, normal_gravity
from dvgate.sim.profile import RATE_UNITS, Phase, Profile

#: Density of air at sea level, kg/m^3, and its scale height, m (a standard-atmosphere
#: figure, common practice, no source; used by the invented flight demo only).
SEA_LEVEL_DENSITY = 1.225
SCALE_HEIGHT = 8500.0

_AXES = {"x": 0, "y": 1, "z": 2}
_AXIS = re.compile(r"^([+-])([xyz])$")
_QUANTITY = re.compile(r"^([+-]?)([fw])([xyz])$")

Time = q.field("time", minimum=0.0)
PositiveTime = q.field("time", positive=True)
Angle = q.field("angle")
Length = q.field("length")
PositiveLength = q.field("length", positive=True)
Mass = q.field("mass", positive=True)
Force = q.field("force", positive=True)
MassFlow = q.field("mass_flow", positive=True)
Area = q.field("area", minimum=0.0)
AngularRate = q.field("angular_rate")


def axis_vector(text: str) -> np.ndarray:
    """``"+x"``, ``"-z"``... as a unit vector of the body frame."""
    match = _AXIS.match(text)
    if not match:
        raise ValueError(f"{text!r} is not a body axis; write '+x', '-x', '+y', '-y', '+z' or '-z'")
    out = np.zeros(3)
    out[_AXES[match.group(2)]] = 1.0 if match.group(1) == "+" else -1.0
    return out


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, str_strip_whitespace=True, validate_default=True)


def _check_axis(value: str) -> str:
    axis_vector(value)
    return value


class Site(_Strict):
    """Where the bench stands: geodetic latitude and height above the WGS 84 ellipsoid."""

    latitude: Angle = Field(default="45 deg")
    height: Length = Field(default="0 m")

    @field_validator("latitude")
    @classmethod
    def _latitude(cls, value: float) -> float:
        if abs(value) > math.pi / 2 + 1e-12:
            raise ValueError("a latitude lies within -90 deg to 90 deg")
        return value

    @field_validator("height")
    @classmethod
    def _height(cls, value: float) -> float:
        if not -11e3 <= value <= 50e3:
            raise ValueError("the free-air series holds from -11 km to 50 km")
        return value

    @property
    def gravity(self) -> float:
        return float(normal_gravity(math.degrees(self.latitude), self.height))


class StaticScenario(Site):
    """At rest on a bench: the up axis reads normal gravity; gyros read Earth's rate if ``north`` is set."""

    duration: PositiveTime = Field(default="10 s")
    up: str = "+z"
    north: str | None = None

    @field_validator("up", "north")
    @classmethod
    def _axes(cls, value: str | None) -> str | None:
        return value if value is None else _check_axis(value)

    @model_validator(mode="after")
    def _perpendicular(self) -> StaticScenario:
        if self.north is not None and abs(axis_vector(self.north) @ axis_vector(self.up)) > 0:
            raise ValueError(f"north = {self.north!r} must be perpendicular to up = {self.up!r}")
        return self


class TumbleScenario(Site):
    """A multi-position tumble: dwell in each position, turn smoothly to the next."""

    positions: list[str] = Field(default=["+z", "-z", "+x", "-x", "+y", "-y"], min_length=2)
    dwell: PositiveTime | list[PositiveTime] = Field(default="10 s")
    transition: PositiveTime = Field(default="2 s")

    @field_validator("positions")
    @classmethod
    def _positions(cls, value: list[str]) -> list[str]:
        for text in value:
            _check_axis(text)
        return value

    @model_validator(mode="after")
    def _dwells(self) -> TumbleScenario:
        if isinstance(self.dwell, list) and len(self.dwell) != len(self.positions):
            raise ValueError(f"dwell: {len(self.dwell)} times for {len(self.positions)} positions; "
                             "give one time, or one per position")
        return self

    @property
    def dwells(self) -> list[float]:
        return list(self.dwell) if isinstance(self.dwell, list) else [self.dwell] * len(self.positions)


class CentrifugeScenario(Site):
    """A centrifuge turning about a vertical axis; the sensor at ``radius`` from the centre."""

    rate: AngularRate = Field(default="60 rpm")
    radius: PositiveLength = Field(default="1 m")
    rest: Time = Field(default="1 s")
    spin_up: PositiveTime = Field(default="5 s")
    hold: PositiveTime = Field(default="20 s")
    spin_down: PositiveTime = Field(default="5 s")
    radial: str = "+x"
    spin_axis: str = "+z"

    @field_validator("radial", "spin_axis")
    @classmethod
    def _axes(cls, value: str) -> str:
        return _check_axis(value)

    @model_validator(mode="after")
    def _perpendicular(self) -> CentrifugeScenario:
        if abs(axis_vector(self.radial) @ axis_vector(self.spin_axis)) > 0:
            raise ValueError(f"radial = {self.radial!r} must be perpendicular to spin_axis = {self.spin_axis!r}")
        if self.rate <= 0:
            raise ValueError("rate must be greater than zero")
        return self


class BurnScenario(_Strict):
    """A constant-thrust burn in free space (no gravity, no drag): Tsiolkovsky's case."""

    thrust: Force = Field(default="2000 N")
    initial_mass: Mass = Field(default="50 kg")
    mass_flow: MassFlow = Field(default="1 kg/s")
    burn_time: PositiveTime = Field(default="20 s")
    before: Time = Field(default="1 s")
    after: Time = Field(default="2 s")
    axis: str = "+z"

    @field_validator("axis")
    @classmethod
    def _axes(cls, value: str) -> str:
        return _check_axis(value)

    @model_validator(mode="after")
    def _mass_left(self) -> BurnScenario:
        if self.final_mass <= 0:
            raise ValueError(f"the burn uses {self.mass_flow * self.burn_time:g} kg, more than the initial "
                             f"mass of {self.initial_mass:g} kg; shorten burn_time or lower mass_flow")
        return self

    @property
    def final_mass(self) -> float:
        return self.initial_mass - self.mass_flow * self.burn_time

    @property
    def exhaust_velocity(self) -> float:
        """Effective exhaust velocity ``ve = thrust / mass flow``, m/s."""
        return self.thrust / self.mass_flow


class BenchTumble(_Strict):
    """The tumble on the bench before a flight (no site: the flight's site is used)."""

    positions: list[str] = Field(default=["+z", "-z", "+x", "-x", "+y", "-y"], min_length=2)
    dwell: PositiveTime = Field(default="3 s")
    transition: PositiveTime = Field(default="1 s")

    @field_validator("positions")
    @classmethod
    def _positions(cls, value: list[str]) -> list[str]:
        for text in value:
            _check_axis(text)
        return value


class FlightScenario(Site):
    """A bench tumble, then a vertical flight (boost, coast, descent under a parachute)."""

    bench: BenchTumble | None = None
    pad: Time = Field(default="2 s")
    axis: str = "+z"
    thrust: Force = Field(default="1500 N")
    thrust_rise: PositiveTime = Field(default="100 ms")
    burn_time: PositiveTime = Field(default="2.5 s")
    initial_mass: Mass = Field(default="15 kg")
    mass_flow: MassFlow = Field(default="1.2 kg/s")
    drag_area: Area = Field(default="0.004 m^2")
    parachute_area: Area = Field(default="1.2 m^2")
    parachute_opening: PositiveTime = Field(default="1 s")
    descent: PositiveTime = Field(default="15 s")

    @field_validator("axis")
    @classmethod
    def _axes(cls, value: str) -> str:
        return _check_axis(value)

    @model_validator(mode="after")
    def _feasible(self) -> FlightScenario:
        burnt = self.initial_mass - self.mass_flow * self.burn_time
        if burnt <= 0:
            raise ValueError(f"the burn uses {self.mass_flow * self.burn_time:g} kg, more than the initial "
                             f"mass of {self.initial_mass:g} kg")
        if self.thrust <= self.initial_mass * self.gravity:
            raise ValueError(f"thrust {self.thrust:g} N does not lift {self.initial_mass:g} kg off the pad")
        return self


KINDS = ("static", "tumble", "centrifuge", "burn", "flight")


class ScenarioFile(_Strict):
    """A scenario file as written: common keys and exactly one scenario table."""

    title: str = ""
    note: str = ""
    invented: bool = False
    step: PositiveTime = Field(default="10 ms")
    map: dict[str, str] = {}
    static: StaticScenario | None = None
    tumble: TumbleScenario | None = None
    centrifuge: CentrifugeScenario | None = None
    burn: BurnScenario | None = None
    flight: FlightScenario | None = None

    @field_validator("map")
    @classmethod
    def _map(cls, value: dict[str, str]) -> dict[str, str]:
        for name, text in value.items():
            if text != "0" and not _QUANTITY.match(text):
                raise ValueError(f"map.{name} = {text!r}: write a body quantity such as '+fx', '-fz', 'wy', "
                                 "or '0'")
        return value

    @model_validator(mode="after")
    def _one_kind(self) -> ScenarioFile:
        given = [kind for kind in KINDS if getattr(self, kind) is not None]
        if len(given) != 1:
            found = ", ".join(f"[{k}]" for k in given) or "none"
            raise ValueError(f"a scenario file holds exactly one of [{'], ['.join(KINDS)}]; found {found}")
        return self

    @property
    def kind(self) -> str:
        return next(kind for kind in KINDS if getattr(self, kind) is not None)


@dataclass(frozen=True)
class Motion:
    """The body's motion: time, specific force (m/s^2) and angular rate (rad/s) on x, y, z."""

    time: np.ndarray
    force: np.ndarray
    rate: np.ndarray
    phases: tuple[Phase, ...]


class _Builder:
    """Appends stretches of motion; a shared time at a join makes a step."""

    def __init__(self) -> None:
        self.t: list[np.ndarray] = []
        self.f: list[np.ndarray] = []
        self.w: list[np.ndarray] = []
        self.phases: list[Phase] = []
        self.now = 0.0

    def add(self, name: str, duration: float, times: np.ndarray, force: np.ndarray, rate: np.ndarray) -> None:
        """Append samples at ``now + times`` (times from 0 to ``duration``)."""
        self.t.append(self.now + times)
        self.f.append(np.broadcast_to(force, (len(times), 3)))
        self.w.append(np.broadcast_to(rate, (len(times), 3)))
        if name and self.phases and self.phases[-1].name == name:
            last = self.phases.pop()
            self.phases.append(Phase(name, last.start, self.now + duration))
        elif name:
            self.phases.append(Phase(name, self.now, self.now + duration))
        self.now += duration

    def hold(self, name: str, duration: float, force: np.ndarray, rate: np.ndarray | None = None) -> None:
        """Constant motion for ``duration``."""
        if duration > 0:
            self.add(name, duration, np.array([0.0, duration]), force, np.zeros(3) if rate is None else rate)

    def motion(self) -> Motion:
        t = np.concatenate(self.t)
        f = np.concatenate(self.f)
        w = np.concatenate(self.w)
        # A join where both sides give the same value at the same time is no step.
        keep = np.ones(len(t), dtype=bool)
        same = (np.diff(t) == 0) & np.all(f[1:] == f[:-1], axis=1) & np.all(w[1:] == w[:-1], axis=1)
        keep[1:][same] = False
        return Motion(t[keep], f[keep], w[keep], tuple(self.phases))


def _grid(duration: float, step: float) -> np.ndarray:
    count = max(1, math.ceil(duration / step - 1e-9))
    return np.linspace(0.0, duration, count + 1)


def _rotate(u: np.ndarray, axis: np.ndarray, angles: np.ndarray) -> np.ndarray:
    """Rotate ``u`` about unit ``axis`` by each angle (Rodrigues), shape (k, 3)."""
    c, s = np.cos(angles)[:, None], np.sin(angles)[:, None]
    return u * c + np.cross(axis, u) * s + axis * (axis @ u) * (1.0 - c)


def _turn(builder: _Builder, name: str, start: np.ndarray, stop: np.ndarray, duration: float, gravity: float,
          step: float) -> None:
    """Turn smoothly (raised-cosine angle) so that the up direction goes from ``start`` to ``stop``."""
    cross = np.cross(start, stop)
    angle = math.atan2(float(np.linalg.norm(cross)), float(start @ stop))
    if angle == 0.0:
        builder.hold(name, duration, gravity * start)
        return
    if np.linalg.norm(cross) < 1e-12:  # opposite: turn about the next body axis
        axis = np.roll(np.abs(start), 1)
    else:
        axis = cross / np.linalg.norm(cross)
    tau = _grid(duration, step)
    x = tau / duration
    up = _rotate(start, axis, angle * (1.0 - np.cos(np.pi * x)) / 2.0)
    up[-1] = stop  # exact at the end of the turn
    speed = angle * np.pi / (2.0 * duration) * np.sin(np.pi * x)
    # The world's up vector turns in the body frame opposite to the body's rotation.
    builder.add(name, duration, tau, gravity * up, -speed[:, None] * axis)


def _tumble(builder: _Builder, positions: list[str], dwells: list[float], transition: float, gravity: float,
            step: float, prefix: str = "") -> None:
    ups = [axis_vector(p) for p in positions]
    for index, (text, up, dwell) in enumerate(zip(positions, ups, dwells, strict=True)):
        if index:
            _turn(builder, f"{prefix}turn", ups[index - 1], up, transition, gravity, step)
        builder.hold(f"{prefix}{text} up", dwell, gravity * up)


def _static(s: StaticScenario, step: float) -> Motion:
    del step
    b = _Builder()
    rate = np.zeros(3)
    if s.north is not None:
        north, up = earth_rate_components(math.degrees(s.latitude))
        rate = north * axis_vector(s.north) + up * axis_vector(s.up)
    b.hold(f"static, {s.up} up", s.duration, s.gravity * axis_vector(s.up), rate)
    return b.motion()


def _tumble_motion(s: TumbleScenario, step: float) -> Motion:
    b = _Builder()
    _tumble(b, s.positions, s.dwells, s.transition, s.gravity, step)
    return b.motion()


def _centrifuge(s: CentrifugeScenario, step: float) -> Motion:
    b = _Builder()
    centre, spin = axis_vector(s.radial), axis_vector(s.spin_axis)
    tangent = np.cross(centre, spin)  # direction of the arm's motion
    up = s.gravity * spin
    b.hold("rest", s.rest, up)
    for name, duration, sign in (("spin-up", s.spin_up, 1.0), ("spin-down", s.spin_down, -1.0)):
        if name == "spin-down":
            b.hold("steady", s.hold, s.rate ** 2 * s.radius * centre + up, s.rate * spin)
        tau = _grid(duration, step)
        alpha = sign * s.rate / duration
        omega = (tau / duration if sign > 0 else 1.0 - tau / duration) * s.rate
        force = (omega ** 2 * s.radius)[:, None] * centre + alpha * s.radius * tangent + up
        b.add(name, duration, tau, force, omega[:, None] * spin)
    b.hold("rest", s.rest, up)
    return b.motion()


def _burn(s: BurnScenario, step: float) -> Motion:
    b = _Builder()
    axis = axis_vector(s.axis)
    zero = np.zeros(3)
    b.hold("before", s.before, zero)
    tau = _grid(s.burn_time, step)
    accel = s.thrust / (s.initial_mass - s.mass_flow * tau)
    b.add("burn", s.burn_time, tau, accel[:, None] * axis, zero)
    b.hold("after", s.after, zero)
    return b.motion()


def _density(height: np.ndarray | float) -> np.ndarray | float:
    return SEA_LEVEL_DENSITY * np.exp(-np.asarray(height) / SCALE_HEIGHT)


def _flight(s: FlightScenario, step: float) -> Motion:
    b = _Builder()
    axis = axis_vector(s.axis)
    g0 = s.gravity
    if s.bench is not None:
        bench = s.bench
        _tumble(b, bench.positions, [bench.dwell] * len(bench.positions), bench.transition, g0, step, "bench: ")
        _turn(b, "to the pad", axis_vector(bench.positions[-1]), axis, bench.transition, g0, step)
    b.hold("pad", s.pad, g0 * axis)

    def gravity(h: float) -> float:
        return float(normal_gravity(math.degrees(s.latitude), min(max(h, -11e3), 50e3)))

    def accel(t: float, h: float, v: float, cd_area: float, powered: bool) -> tuple[float, float, bool]:
        """Kinematic acceleration and specific force along the axis; and whether still on the pad."""
        m = s.initial_mass - s.mass_flow * min(t, s.burn_time) if powered else burnt
        thrust = s.thrust * min(1.0, t / s.thrust_rise) if powered and t <= s.burn_time else 0.0
        drag = -0.5 * float(_density(h)) * v * abs(v) * cd_area
        force = (thrust + drag) / m
        if h <= 0.0 and v <= 0.0 and force < gravity(h):
            return 0.0, gravity(h), True  # the pad holds it up
        return force - gravity(h), force, False

    burnt = s.initial_mass - s.mass_flow * s.burn_time
    # Explicit fixed-step integration (midpoint) at a tenth of the sample step; the
    # profile keeps every tenth point. Boost, then coast until the velocity turns.
    dt = step / 10.0
    h = v = t = 0.0
    times, forces = [0.0], [accel(0.0, 0.0, 0.0, s.drag_area, True)[1]]

    def advance(t: float, h: float, v: float, area: float, powered: bool) -> tuple[float, float]:
        a1, _, held = accel(t, h, v, area, powered)
        if held:
            return h, v
        hm, vm = h + v * dt / 2, v + a1 * dt / 2
        a2, _, _ = accel(t + dt / 2, hm, vm, area, powered)
        return h + vm * dt, v + a2 * dt

    n_boost = max(1, round(s.burn_time / dt))
    for i in range(1, n_boost + 1):
        h, v = advance(t, h, v, s.drag_area, True)
        t = s.burn_time * i / n_boost
        if i % 10 == 0 or i == n_boost:
            times.append(t)
            forces.append(accel(t, h, v, s.drag_area, True)[1])
    b.add("boost", s.burn_time, np.array(times), np.array(forces)[:, None] * axis, np.zeros(3))
    # Burn-out: the thrust stops at once (a step in the profile).
    times, forces = [0.0], [accel(0.0, h, v, s.drag_area, False)[1]]
    tc = 0.0
    i = 0
    while v > 0.0 and tc < 600.0:
        h, v = advance(tc, h, v, s.drag_area, False)
        tc += dt
        i += 1
        if i % 10 == 0 or v <= 0.0:
            times.append(tc)
            forces.append(accel(tc, h, v, s.drag_area, False)[1])
    b.add("coast", tc, np.array(times), np.array(forces)[:, None] * axis, np.zeros(3))
    # Descent: the parachute opens over `parachute_opening`, its drag area growing linearly.
    times, forces = [0.0], [accel(0.0, h, v, s.drag_area, False)[1]]
    n_down = max(1, round(s.descent / dt))
    for i in range(1, n_down + 1):
        td = s.descent * (i - 1) / n_down
        area = s.drag_area + (s.parachute_area - s.drag_area) * min(1.0, td / s.parachute_opening)
        h, v = advance(td, h, v, area, False)
        if i % 10 == 0 or i == n_down:
            td = s.descent * i / n_down
            area = s.drag_area + (s.parachute_area - s.drag_area) * min(1.0, td / s.parachute_opening)
            times.append(td)
            forces.append(accel(td, h, v, area, False)[1])
    b.add("descent", s.descent, np.array(times), np.array(forces)[:, None] * axis, np.zeros(3))
    return b.motion()


_BUILDERS = {"static": _static, "tumble": _tumble_motion, "centrifuge": _centrifuge, "burn": _burn,
             "flight": _flight}


def scenario_motion(scenario: ScenarioFile) -> Motion:
    """The body's motion for a validated scenario."""
    kind = scenario.kind
    return _BUILDERS[kind](getattr(scenario, kind), scenario.step)


def _channel_map(scenario: ScenarioFile, channels: Sequence[Channel], source: str) -> list[tuple[float, str, int]]:
    """For each channel: sign, body quantity ('f' or 'w') and axis index (sign 0: zero)."""
    names = {c.name for c in channels}
    for key in scenario.map:
        if key not in names:
            raise UserError(f"{source}: map.{key}: the config has no channel {key!r}; its channels are "
                            f"{', '.join(c.name for c in channels)}")
    out = []
    order = {"m/s": 0, "rad": 0}
    for ch in channels:
        quantity = "f" if ch.unit == "m/s" else "w"
        text = scenario.map.get(ch.name)
        if text is None:
            index = order[ch.unit]
            order[ch.unit] += 1
            if index > 2:
                raise UserError(f"{source}: channel {ch.name!r} gets no body quantity (the scenario gives three "
                                f"axes of each kind); add it to the scenario's [map], e.g. "
                                f"map.{ch.name} = \"+{quantity}x\" or \"0\"")
            out.append((1.0, quantity, index))
            continue
        if text == "0":
            out.append((0.0, quantity, 0))
            continue
        sign, kind, axis = _QUANTITY.match(text).groups()  # type: ignore[union-attr]
        if kind != quantity:
            what = "an accelerometer (specific force: fx, fy, fz)" if quantity == "f" else \
                "a gyro (angular rate: wx, wy, wz)"
            raise UserError(f"{source}: map.{ch.name} = {text!r}: channel {ch.name!r} is {what}")
        out.append((-1.0 if sign == "-" else 1.0, kind, _AXES[axis]))
    return out


def scenario_profile(scenario: ScenarioFile, channels: Sequence[Channel], source: str = "<scenario>") -> Profile:
    """The profile a validated scenario gives the config's channels."""
    motion = scenario_motion(scenario)
    mapping = _channel_map(scenario, channels, source)
    values = np.empty((len(motion.time), len(channels)))
    for i, (sign, kind, axis) in enumerate(mapping):
        values[:, i] = sign * (motion.force if kind == "f" else motion.rate)[:, axis]
    notes = []
    if scenario.invented:
        notes.append("invented scenario: the numbers describe no real vehicle or flight")
    if scenario.note:
        notes.append(scenario.note)
    title = scenario.title or f"{scenario.kind} scenario"
    return Profile(motion.time, values, tuple(c.name for c in channels), tuple(RATE_UNITS[c.unit] for c in channels),
                   source, None, motion.phases, title, tuple(notes))


def parse_scenario(raw: dict[str, Any], source: str = "<scenario>") -> ScenarioFile:
    """Validate a scenario given as a dict (as read from TOML)."""
    try:
        return ScenarioFile.model_validate(raw)
    except ValidationError as error:
        raise UserError(format_errors(error, source, model=ScenarioFile)) from None


def load_scenario(path: str | Path, channels: Sequence[Channel]) -> Profile:
    """Read a scenario file and build its profile for the config's channels.

    Raises
    ------
    UserError
        For an unreadable file, an unknown key (with a "did you mean"), a bad value, or a
        channel the scenario cannot drive.
    """
    source = str(path)
    return scenario_profile(parse_scenario(read_toml(path), source), channels, source)


__all__ = [
    "BurnScenario", "CentrifugeScenario", "FlightScenario", "Motion", "ScenarioFile", "StaticScenario",
    "TumbleScenario", "axis_vector", "load_scenario", "parse_scenario", "scenario_motion", "scenario_profile",
]

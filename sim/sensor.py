"""The accelerometer's own errors, applied to a profile before it is quantized.

The model follows the form of the accelerometer model equation of IEEE Std 1293
(pendulous accelerometers; the equation's form as recalled, from memory): the
indicated output, in input units, is

    E / K1 = K0 + a_i + K2 a_i^2 + (cross-axis terms) + noise

with ``K1`` the scale factor, ``K0`` the bias, ``K2`` the second-order coefficient and
the cross-axis sensitivity to small misalignment angles of the input axis. Here, for a
triad of accelerometer channels with true specific force ``f``:

    a   = (I + D) f                       (D: small-angle misalignment, off-diagonal)
    out = (1 + s) (b + a + K2 a^2) + n    (per channel)

where ``s`` is the scale-factor error, ``b`` the bias, and ``n`` velocity random walk:
white noise whose integral grows as ``N sqrt(t)``, realised as a constant acceleration
over each noise step with a seeded generator. Everything is off by default; the
report records what was applied.

Config, ``[sensor]`` section (units of the trade)::

    seed = 1
    bias = "50 ug"                      # or a table per channel: { x = "1 mg", z = "-20 ug" }
    scale_factor = "100 ppm"            # or per channel
    second_order = "10 ug/g^2"          # or per channel
    vrw = "0.01 m/s/sqrt(h)"            # velocity random walk, or per channel
    misalignment = [["0 urad", "20 urad", "-5 urad"], [...], [...]]   # row: channel, column: axis
    axes = ["x", "y", "z"]              # the triad the matrix refers to (default: first three)
    noise_step = "1 ms"                 # the noise is constant over each step
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, field_validator

from dvgate.config import Config, section
from dvgate.errors import UserError
from dvgate.sim import quantities as q
from dvgate.sim.profile import Profile

Bias = q.field("small_acceleration")
Ratio = q.field("ratio")
SecondOrder = q.field("second_order")
RandomWalk = q.field("velocity_random_walk", minimum=0.0)
Angle = q.field("angle")
Step = q.field("time", positive=True)


class SensorSettings(BaseModel):
    """The ``[sensor]`` section of the emulator config (all terms zero by default)."""

    model_config = ConfigDict(extra="forbid", frozen=True, str_strip_whitespace=True, validate_default=True)

    seed: int = 1
    bias: Bias | dict[str, Bias] = Field(default="0 ug")
    scale_factor: Ratio | dict[str, Ratio] = Field(default="0 ppm")
    second_order: SecondOrder | dict[str, SecondOrder] = Field(default="0 ug/g^2")
    vrw: RandomWalk | dict[str, RandomWalk] = Field(default="0 m/s/sqrt(h)")
    misalignment: list[list[Angle]] | None = None
    axes: list[str] | None = None
    noise_step: Step = Field(default="1 ms")

    @field_validator("misalignment")
    @classmethod
    def _matrix(cls, value: list[list[float]] | None) -> list[list[float]] | None:
        if value is None:
            return value
        if len(value) != 3 or any(len(row) != 3 for row in value):
            raise ValueError("a 3 x 3 matrix of small angles: three rows of three, such as "
                             "[[\"0 urad\", \"20 urad\", \"-5 urad\"], [...], [...]]")
        if any(value[i][i] != 0 for i in range(3)):
            raise ValueError("the diagonal must be zero (an error along the input axis is a scale-factor error)")
        if any(abs(x) > 0.01 for row in value for x in row):
            raise ValueError("small angles only: each within 10 mrad")
        return value

    @field_validator("axes")
    @classmethod
    def _axes(cls, value: list[str] | None) -> list[str] | None:
        if value is not None and (len(value) != 3 or len(set(value)) != 3):
            raise ValueError("three different channel names")
        return value


@dataclass(frozen=True)
class SensorModel:
    """The sensor errors resolved per channel (SI), ready to apply.

    Attributes
    ----------
    bias : ndarray, shape (channels,)
        m/s^2.
    scale : ndarray, shape (channels,)
        Scale-factor error, as a fraction.
    second_order : ndarray, shape (channels,)
        Per (m/s^2).
    vrw : ndarray, shape (channels,)
        Velocity random walk, m/s per root second.
    misalignment : ndarray, shape (channels, channels)
        Small angles (rad), zero diagonal; row = channel, column = the channel whose
        axis leaks into it.
    seed : int
        Seed of the noise generator.
    noise_step : float
        Seconds over which one noise value holds.
    names : tuple of str
        Channel names.
    """

    bias: np.ndarray
    scale: np.ndarray
    second_order: np.ndarray
    vrw: np.ndarray
    misalignment: np.ndarray
    seed: int
    noise_step: float
    names: tuple[str, ...]

    @property
    def active(self) -> bool:
        """True when any error term is non-zero."""
        return bool(np.any(self.bias) or np.any(self.scale) or np.any(self.second_order) or np.any(self.vrw)
                    or np.any(self.misalignment))

    def describe(self) -> dict[str, Any]:
        """The model in the trade's units, for the report."""
        g = 9.80665
        return {
            "equation": "out = (1 + s)(b + a + K2 a^2) + n, a = (I + D) f  (IEEE Std 1293 model form)",
            "seed": self.seed,
            "noise_step_s": self.noise_step,
            "channels": {
                name: {
                    "bias_ug": float(self.bias[i] / g * 1e6),
                    "scale_factor_ppm": float(self.scale[i] * 1e6),
                    "second_order_ug_per_g2": float(self.second_order[i] * g / 1e-6),
                    "vrw_m_s_per_sqrt_h": float(self.vrw[i] * 60.0),
                    "misalignment_urad": {self.names[j]: float(self.misalignment[i, j] * 1e6)
                                          for j in range(len(self.names)) if self.misalignment[i, j]},
                }
                for i, name in enumerate(self.names)
            },
        }


@dataclass(frozen=True)
class SensorEffect:
    """What the sensor model did to a run, for the report.

    Attributes
    ----------
    model : SensorModel
        The terms applied.
    noise_dv : ndarray, shape (channels,)
        Velocity the random walk added over the run (m/s), per channel.
    """

    model: SensorModel
    noise_dv: np.ndarray


def sensor_model(config: Config) -> SensorModel:
    """Resolve the config's ``[sensor]`` section against its channels.

    Raises
    ------
    UserError
        A channel named in a table that the config lacks or that is not an
        accelerometer, or misalignment without three accelerometer channels.
    """
    settings = section(config, "sensor", SensorSettings)
    names = tuple(c.name for c in config.channels)
    accel = [i for i, c in enumerate(config.channels) if c.unit == "m/s"]
    n = len(names)

    def per_channel(key: str, value: float | dict[str, float]) -> np.ndarray:
        out = np.zeros(n)
        if isinstance(value, dict):
            for name, x in value.items():
                if name not in names:
                    raise UserError(f"{config.source}: sensor.{key}.{name}: the config has no channel {name!r}; "
                                    f"its channels are {', '.join(names)}")
                index = names.index(name)
                if index not in accel and x != 0:
                    raise UserError(f"{config.source}: sensor.{key}.{name}: {name!r} is not an accelerometer "
                                    "channel; the sensor model applies to accelerometers only")
                out[index] = x
        else:
            out[accel] = value
        return out

    matrix = np.zeros((n, n))
    if settings.misalignment is not None and any(any(row) for row in settings.misalignment):
        axes = settings.axes or [names[i] for i in accel[:3]]
        if len(axes) != 3:
            raise UserError(f"{config.source}: sensor.misalignment needs three accelerometer channels; the config "
                            f"has {len(accel)}")
        index = []
        for name in axes:
            if name not in names or names.index(name) not in accel:
                raise UserError(f"{config.source}: sensor.axes: {name!r} is not an accelerometer channel of the "
                                "config")
            index.append(names.index(name))
        for r, row in enumerate(settings.misalignment):
            for c, angle in enumerate(row):
                matrix[index[r], index[c]] = angle
    return SensorModel(
        bias=per_channel("bias", settings.bias), scale=per_channel("scale_factor", settings.scale_factor),
        second_order=per_channel("second_order", settings.second_order), vrw=per_channel("vrw", settings.vrw),
        misalignment=matrix, seed=settings.seed, noise_step=settings.noise_step, names=names,
    )


def apply_sensor(profile: Profile, model: SensorModel) -> tuple[Profile, SensorEffect]:
    """The profile as the erring sensor would report it (unchanged when the model is off)."""
    if profile.names != model.names:
        raise ValueError(f"profile channels {profile.names} differ from the model's {model.names}")
    if not model.active:
        return profile, SensorEffect(model, np.zeros(len(model.names)))
    f = profile.values
    a = f + f @ model.misalignment.T
    out = (1.0 + model.scale) * (model.bias + a + model.second_order * a * a)
    # Gyro channels pass unchanged (every term is zero for them).
    noisy = model.vrw > 0
    if not np.any(noisy):
        return profile.with_values(profile.time, out, note="sensor error model applied"), \
            SensorEffect(model, np.zeros(len(model.names)))
    erring = profile.with_values(profile.time, out)
    time, values, index = _split_at_steps(erring, model.noise_step)
    count = int(index.max()) + 1
    widths = np.minimum(profile.start + (np.arange(count) + 1) * model.noise_step, profile.stop) - \
        (profile.start + np.arange(count) * model.noise_step)
    rng = np.random.default_rng(model.seed)
    # Velocity increments of a random walk: N(0, N^2 dt); as a constant acceleration over dt.
    dv = rng.standard_normal((count, len(model.names))) * model.vrw * np.sqrt(widths)[:, None]
    accel = dv / widths[:, None]
    values = values + accel[index] * noisy
    effect = SensorEffect(model, (dv * noisy).sum(axis=0))
    return profile.with_values(time, values, note="sensor error model applied"), effect


def _split_at_steps(profile: Profile, step: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Samples with a step at every noise-step boundary, and each sample's noise index.

    Returns the new times, the values there (linear between the original samples) and,
    for each sample, the index of the noise step it belongs to: at a boundary the
    first of the two samples ends the step before, the second starts the next.
    """
    time, values, start, stop = profile.time, profile.values, profile.start, profile.stop
    count = max(1, math.ceil((stop - start) / step - 1e-9))
    grid = start + np.arange(1, count) * step
    grid = grid[grid < stop]
    fresh = grid[~np.isin(grid, time)]
    # Each fresh boundary gets two samples; an existing sample time at a boundary that is
    # not yet a step is doubled.
    single = np.isin(time, grid) & ~_is_step(time)
    t_all = np.concatenate((time, time[single], fresh, fresh))
    v_fresh = profile.at(fresh) if len(fresh) else np.zeros((0, values.shape[1]))
    v_all = np.concatenate((values, values[single], v_fresh, v_fresh))
    # stable sort: among equal times the original order holds (left sample first)
    order = np.argsort(t_all, kind="stable")
    t_all, v_all = t_all[order], v_all[order]
    edges = np.concatenate(([start], grid))
    index = np.searchsorted(edges, t_all, side="right") - 1
    first_of_pair = np.concatenate((np.diff(t_all) == 0, [False]))
    at_boundary = np.isin(t_all, grid)
    index = np.where(first_of_pair & at_boundary, index - 1, index)
    return t_all, v_all, np.clip(index, 0, None)


def _is_step(time: np.ndarray) -> np.ndarray:
    same = np.diff(time) == 0
    return np.concatenate((same, [False])) | np.concatenate(([False], same))


__all__ = ["SensorEffect", "SensorModel", "SensorSettings", "apply_sensor", "sensor_model"]

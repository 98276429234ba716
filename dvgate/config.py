"""One TOML file describes an emulator; this module validates it into typed objects.

``load_config`` reads and checks a file, ``parse_config`` a dict. Every bad value gives
one line naming the field, the value and what is allowed; an unknown key gets a
"did you mean" suggestion. :class:`Config` turns physical units into the integers the
gateware and the model use (:class:`dvgate.params.HardwareParams`).
"""

from __future__ import annotations

import dataclasses
import difflib
import math
import re
import tomllib
from dataclasses import dataclass
from functools import cached_property
from pathlib import Path
from typing import Annotated, Any, Literal, TypeVar

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    PlainValidator,
    ValidationError,
    field_validator,
    model_validator,
)

from dvgate.errors import UserError
from dvgate.params import HardwareParams, shared_min_width, shared_owed_bits_min, shared_pulse_min
from dvgate.units import STANDARD_GRAVITY, QuantityError, parse_quantity

M = TypeVar("M", bound=BaseModel)

#: Channel names used when the config gives only a count.
AXIS_NAMES = ("x", "y", "z")
MAX_CHANNELS = 16
CYCLE_UNITS = ("cycles", "cycle")


@dataclass(frozen=True)
class Quantity:
    """A value read from text: SI value (or cycles), the unit written, the text itself."""

    value: float
    unit: str
    text: str

    @property
    def in_cycles(self) -> bool:
        return self.unit in CYCLE_UNITS


def _quantity(kind: str, *, cycles: bool = False) -> Any:
    extra = CYCLE_UNITS if cycles else ()

    def check(raw: Any) -> Quantity:
        if isinstance(raw, Quantity):
            return raw
        try:
            value, unit = parse_quantity(raw, kind, extra_units=extra)
        except QuantityError as error:
            raise ValueError(str(error)) from None
        if unit in CYCLE_UNITS and (value != int(value) or value < 0):
            raise ValueError("a count of cycles must be a whole number, 0 or more")
        return Quantity(value, unit, str(raw))

    return Annotated[Quantity, PlainValidator(check)]


Duration = _quantity("time", cycles=True)
Frequency = _quantity("frequency")
Weight = Annotated[Quantity, PlainValidator(lambda raw: _weight(raw))]
Rate = Annotated[Quantity, PlainValidator(lambda raw: _rate(raw))]


def _weight(raw: Any) -> Quantity:
    """A pulse weight: m/s per pulse (accelerometer) or rad per pulse (gyro)."""
    if isinstance(raw, Quantity):
        return raw
    for kind in ("velocity", "angle"):
        try:
            value, unit = parse_quantity(raw, kind)
        except QuantityError:
            continue
        if value <= 0:
            raise ValueError("a pulse weight must be greater than zero")
        return Quantity(value, unit, str(raw))
    raise ValueError("expected a velocity per pulse ('0.01 m/s', 'cm/s', 'mm/s') "
                     "or an angle per pulse ('1e-5 rad', 'mrad', 'urad', 'deg')")


def _rate(raw: Any) -> Quantity:
    """A rate: acceleration (m/s^2, g, mg) or angular rate (rad/s, deg/s)."""
    if isinstance(raw, Quantity):
        return raw
    for kind in ("acceleration", "angular_rate"):
        try:
            value, unit = parse_quantity(raw, kind)
        except QuantityError:
            continue
        return Quantity(value, unit, str(raw))
    raise ValueError("expected an acceleration ('1 g', '9.8 m/s^2', 'mg') "
                     "or an angular rate ('0.1 rad/s', 'deg/s')")


def rate_kind(weight: Quantity) -> str:
    """The kind of rate a channel with this pulse weight takes."""
    return "acceleration" if weight.unit in ("m/s", "cm/s", "mm/s") else "angular_rate"


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, str_strip_whitespace=True, validate_default=True)


class StrobeConfig(_Strict):
    """The computer's strobe as the emulator receives it."""

    edge: Literal["rising", "falling"] = "rising"
    min_width: Duration = Field(default="500 ns")
    absence_timeout: Duration = Field(default="10 ms")
    period: Duration = Field(default="1 ms")


class PulseConfig(_Strict):
    """Scheme and shape of the output pulses."""

    scheme: Literal["binary", "ternary", "burst"] = "burst"
    rest: int = Field(default=3, ge=0, le=255)
    width: Duration = Field(default="1 us")
    gap: Duration = Field(default="1 us")
    order: Literal["interleaved", "grouped"] = "interleaved"
    polarity: Literal["active_high", "active_low"] = "active_high"


class RateConfig(_Strict):
    """Fixed-point format of the rate and the limits on hand-over and backlog."""

    frac_bits: int = Field(default=36, ge=8, le=56)
    clamp: int = Field(default=64, ge=1, le=65535)
    backlog: int = Field(default=256, ge=1, le=65535)
    owed_bits: int = Field(default=24, ge=4, le=40)
    datapath: Literal["per_channel", "shared"] = "per_channel"


class ChannelDefaults(_Strict):
    """Values every channel takes unless it sets its own."""

    weight: Weight = Field(default="0.01 m/s")
    range: Rate = Field(default="16 g")
    rate: Rate | None = None  # zero, in the channel's own kind of rate


class ChannelConfig(_Strict):
    """One pulse-pair output."""

    name: str

    @field_validator("name")
    @classmethod
    def _name(cls, value: str) -> str:
        if not re.fullmatch(r"[a-z][a-z0-9_]{0,15}", value):
            raise ValueError("a channel name is 1 to 16 lowercase letters, digits or '_', "
                             "starting with a letter (it names the Verilog ports)")
        return value
    weight: Weight | None = None
    range: Rate | None = None
    rate: Rate | None = None


class ConfigModel(_Strict):
    """The whole file, as written."""

    clock: Frequency = Field(default="12 MHz")
    strobe: StrobeConfig = StrobeConfig()
    pulses: PulseConfig = PulseConfig()
    rate: RateConfig = RateConfig()
    defaults: ChannelDefaults = ChannelDefaults()
    channels: int | list[ChannelConfig] = 3
    # Sections that other parts of dvgate validate with their own models (``section``).
    host: dict[str, Any] = {}
    sensor: dict[str, Any] = {}
    faults: dict[str, Any] = {}
    board: dict[str, Any] = {}
    link: dict[str, Any] = {}
    program: dict[str, Any] = {}

    @model_validator(mode="after")
    def _channel_count(self) -> ConfigModel:
        count = self.channels if isinstance(self.channels, int) else len(self.channels)
        if not 1 <= count <= MAX_CHANNELS:
            raise ValueError(f"{count} channels; allowed: 1 to {MAX_CHANNELS}")
        if isinstance(self.channels, list):
            names = [c.name for c in self.channels]
            dup = sorted({n for n in names if names.count(n) > 1})
            if dup:
                raise ValueError(f"channels: name {dup[0]!r} is used twice; names must differ")
        return self


@dataclass(frozen=True)
class Channel:
    """A channel with every value resolved, in SI units.

    Attributes
    ----------
    name : str
        Port prefix and label.
    weight : float
        Pulse weight, m/s or rad per pulse.
    unit : str
        ``"m/s"`` or ``"rad"``: what one pulse is worth.
    range : float
        Full-scale rate magnitude, m/s^2 or rad/s.
    rate : float
        Initial rate, m/s^2 or rad/s.
    """

    name: str
    weight: float
    unit: str
    range: float
    rate: float

    @property
    def rate_unit(self) -> str:
        return "m/s^2" if self.unit == "m/s" else "rad/s"


class Config:
    """A validated emulator config with its derived integers.

    Parameters
    ----------
    model : ConfigModel
        The validated file.
    source : str
        Where it came from, for messages.
    """

    def __init__(self, model: ConfigModel, source: str = "<config>") -> None:
        self.model = model
        self.source = source
        self.clock_hz = model.clock.value
        if not 1e3 <= self.clock_hz <= 500e6:
            _fail("clock", model.clock.text, "1 kHz to 500 MHz")
        self.channels = self._resolve_channels()
        self.hw = self._hardware_params()

    # -- conversions: the one place each is computed ---------------------------------

    def cycles(self, field: str, quantity: Quantity, *, minimum: int = 1) -> int:
        """Convert a duration to whole clock cycles, refusing one that rounds below ``minimum``."""
        if quantity.in_cycles:
            cyc = int(quantity.value)
        else:
            cyc = round(quantity.value * self.clock_hz)
        if cyc < minimum:
            period_ns = 1e9 / self.clock_hz
            _fail(field, quantity.text,
                  f"at least {minimum} cycle(s) ({minimum * period_ns:.4g} ns at this clock)")
        return cyc

    def rate_scale(self, channel: int) -> float:
        """Fixed-point units per SI rate unit (m/s^2 or rad/s): ``2**F / (weight * clock)``."""
        return (1 << self.model.rate.frac_bits) / (self.channels[channel].weight * self.clock_hz)

    def rate_to_fixed(self, channel: int, rate: float) -> int:
        """An SI rate as the rate register's integer, rounded to nearest."""
        return round(rate * self.rate_scale(channel))

    def fixed_to_rate(self, channel: int, fixed: int) -> float:
        """The rate register's integer as an SI rate."""
        return fixed / self.rate_scale(channel)

    # -- building ---------------------------------------------------------------------

    def _resolve_channels(self) -> tuple[Channel, ...]:
        model = self.model
        if isinstance(model.channels, int):
            names = list(AXIS_NAMES[: model.channels]) if model.channels <= 3 else [
                f"ch{i}" for i in range(model.channels)]
            entries = [ChannelConfig(name=name) for name in names]
        else:
            entries = model.channels
        out = []
        for index, entry in enumerate(entries):
            weight = entry.weight or model.defaults.weight
            range_ = entry.range or model.defaults.range
            rate = entry.rate or model.defaults.rate
            where = f"channels[{index}]" if isinstance(model.channels, list) else "defaults"
            kind = rate_kind(weight)
            for field, q in (("range", range_), ("rate", rate)):
                if q is None:
                    continue
                is_accel = q.unit in ("m/s^2", "m/s2", "g", "mg")
                if is_accel != (kind == "acceleration"):
                    wanted = "an acceleration (m/s^2, g, mg)" if kind == "acceleration" else \
                        "an angular rate (rad/s, deg/s)"
                    _fail(f"{where}.{field}" if entry.__getattribute__(field) else f"defaults.{field}",
                          q.text, f"{wanted}, to match the pulse weight {weight.text!r}")
            if range_.value <= 0:
                _fail(f"{where}.range", range_.text, "a full scale greater than zero")
            rate_value = rate.value if rate is not None else 0.0
            if abs(rate_value) > range_.value:
                _fail(f"{where}.rate" if entry.rate else "defaults.rate", rate.text,
                      f"a rate within the full scale of +/-{range_.text}")
            out.append(Channel(entry.name, weight.value, "m/s" if kind == "acceleration" else "rad",
                               range_.value, rate_value))
        return tuple(out)

    def _hardware_params(self) -> HardwareParams:
        m = self.model
        frac = m.rate.frac_bits
        full = [ch.range * self.rate_scale(i) for i, ch in enumerate(self.channels)]
        worst = max(full)
        if worst / (1 << frac) >= 1.0:
            ch = self.channels[full.index(worst)]
            _fail("clock", m.clock.text, f"a clock faster than the full-scale pulse rate of channel "
                  f"{ch.name!r} ({ch.range / ch.weight:.6g} pulses/s)")
        rate_bits = math.ceil(worst).bit_length() + 1
        rest = m.pulses.rest if m.pulses.scheme == "burst" else 0
        per_strobe = 2 * rest + m.rate.clamp if m.pulses.scheme == "burst" else 1
        if m.rate.backlog < per_strobe:
            _fail("rate.backlog", str(m.rate.backlog),
                  f"at least {per_strobe} (what one strobe may hand over: 2 x rest + clamp)")
        if m.rate.owed_bits < m.rate.clamp.bit_length() + 2:
            _fail("rate.owed_bits", str(m.rate.owed_bits),
                  f"at least {m.rate.clamp.bit_length() + 2} for a clamp of {m.rate.clamp}")
        params = HardwareParams(
            clock_hz=self.clock_hz,
            names=tuple(ch.name for ch in self.channels),
            edge_rising=m.strobe.edge == "rising",
            min_width_cyc=self.cycles("strobe.min_width", m.strobe.min_width),
            absence_cyc=self.cycles("strobe.absence_timeout", m.strobe.absence_timeout),
            scheme=m.pulses.scheme,
            rest=rest,
            width_cyc=self.cycles("pulses.width", m.pulses.width),
            gap_cyc=self.cycles("pulses.gap", m.pulses.gap),
            order=m.pulses.order,
            active_low=m.pulses.polarity == "active_low",
            frac_bits=frac,
            rate_bits=rate_bits,
            owed_bits=m.rate.owed_bits,
            clamp=m.rate.clamp,
            backlog=m.rate.backlog,
            init_rates=tuple(self.rate_to_fixed(i, ch.rate) for i, ch in enumerate(self.channels)),
        )
        if m.rate.datapath == "shared":
            self._check_shared(params)
            params = dataclasses.replace(params, datapath="shared")
        period = self.cycles("strobe.period", m.strobe.period)
        if period <= params.min_width_cyc:
            _fail("strobe.period", m.strobe.period.text,
                  f"longer than the strobe's minimum width ({params.min_width_cyc} cycles)")
        return params

    def _check_shared(self, params: HardwareParams) -> None:
        """The shared datapath's limits, as messages about the config's own fields."""
        m = self.model
        if m.link:
            _fail("rate.datapath", "shared", "'per_channel' with a [link] section: the host link writes "
                  "rates, and the shared datapath keeps every channel at its config rate")
        need = shared_min_width(params.n)
        if params.min_width_cyc < need:
            _fail("strobe.min_width", m.strobe.min_width.text,
                  f"at least {need} cycles ({need * 1e9 / self.clock_hz:.4g} ns at this clock) with "
                  f"rate.datapath = 'shared' and {params.n} channel(s): every channel is visited while "
                  "the glitch filter holds the strobe")
        period = shared_pulse_min(params.n)
        if params.pulse_period_cyc < period:
            _fail("pulses.gap", m.pulses.gap.text,
                  f"a pulse width + gap of at least {period} cycles ({period * 1e9 / self.clock_hz:.4g} ns at this "
                  f"clock; now {params.pulse_period_cyc}) with rate.datapath = 'shared' and {params.n} channel(s): "
                  "the emitters' counts are folded once between two pulses")
        least = shared_owed_bits_min(params.n, params.clamp)
        if params.owed_bits < least:
            _fail("rate.owed_bits", str(params.owed_bits), f"at least {least} with rate.datapath = 'shared'")

    @cached_property
    def strobe_period_cyc(self) -> int:
        """The computer's nominal strobe period in cycles."""
        return self.cycles("strobe.period", self.model.strobe.period)

    @cached_property
    def strobe_width_cyc(self) -> int:
        """Width of the strobes ``dvgate sim`` drives: the filter's minimum plus half again."""
        return min(self.hw.min_width_cyc + max(1, self.hw.min_width_cyc // 2), self.strobe_period_cyc - 1)


def section(config: Config, name: str, model: type[M]) -> M:
    """Validate the config's ``[name]`` table with ``model``, with the same messages.

    Parts of dvgate that own a section (host model, board, link...) call this, so every
    section reports a bad value the same way.
    """
    raw = getattr(config.model, name)
    try:
        return model.model_validate(raw)
    except ValidationError as error:
        raise UserError(format_errors(error, config.source, model=model, prefix=name)) from None


def _fail(field: str, value: str, allowed: str) -> None:
    raise UserError(f"{field} = {value!r}: allowed: {allowed}")


def format_errors(error: ValidationError, source: str, *,
                   model: type[BaseModel] | None = None, prefix: str = "") -> str:
    """One line per problem: field, value, what is allowed (or what was meant)."""
    lines = []
    items = error.errors()
    as_list = any(len(i["loc"]) > 1 and str(i["loc"][1]).startswith("list[") for i in items)
    for item in items:
        loc = item["loc"]
        if as_list and loc[:2] == ("channels", "int"):
            continue  # the list form was meant; the count form's complaint is noise
        field = _field_name(((prefix,) if prefix else ()) + tuple(loc)) or "channels"
        value = item.get("input")
        if item["type"] == "extra_forbidden":
            known = _known_keys(item["loc"][:-1], model or ConfigModel)
            guess = difflib.get_close_matches(str(item["loc"][-1]), known, n=1)
            hint = f"; did you mean {guess[0]!r}?" if guess else f"; known keys here: {', '.join(known)}"
            prefix = field.rsplit(".", 1)[0] + "." if "." in field else ""
            guess_text = f"; did you mean {prefix + guess[0]!r}?" if guess else hint
            lines.append(f"{source}: unknown key {field!r}{guess_text}")
            continue
        message = item["msg"].removeprefix("Value error, ")
        shown = "" if isinstance(value, dict) else f" = {value!r}"
        lines.append(f"{source}: {field}{shown}: {message}")
    return "\n".join(dict.fromkeys(lines))


def _field_name(loc: tuple[Any, ...]) -> str:
    """``('channels', 'list[ChannelConfig]', 1, 'weight')`` as ``channels[1].weight``."""
    text = ""
    for part in loc:
        if isinstance(part, int):
            text += f"[{part}]"
        elif not str(part).startswith(("function-", "int", "list[")):
            text += f".{part}" if text else str(part)
    return text


def _known_keys(loc: tuple[Any, ...], model: type[BaseModel]) -> list[str]:
    for part in loc:
        if isinstance(part, int) or str(part).startswith(("list[", "int")):
            continue
        annotation = model.model_fields[str(part)].annotation
        candidates = getattr(annotation, "__args__", (annotation,))
        for candidate in candidates:
            inner = getattr(candidate, "__args__", (candidate,))[0]
            if isinstance(inner, type) and issubclass(inner, BaseModel):
                model = inner
                break
            if isinstance(candidate, type) and issubclass(candidate, BaseModel):
                model = candidate
                break
    return list(model.model_fields)


def parse_config(raw: dict[str, Any], source: str = "<config>") -> Config:
    """Validate a config given as a dict (as read from TOML).

    Raises
    ------
    UserError
        With one line per problem.
    """
    try:
        model = ConfigModel.model_validate(raw)
    except ValidationError as error:
        raise UserError(format_errors(error, source)) from None
    try:
        return Config(model, source)
    except UserError as error:
        raise UserError(f"{source}: {error}") from None


def apply_overrides(raw: dict[str, Any], *, channels: int | None = None,
                    weight: str | None = None) -> dict[str, Any]:
    """Retune a config without editing its file: channel count and pulse weight.

    A count replaces a list of channels by the first ``channels`` of it (or defaults when
    there are fewer); a weight applies to every channel.
    """
    raw = {key: (dict(value) if isinstance(value, dict) else value) for key, value in raw.items()}
    if channels is not None:
        if not isinstance(channels, int) or not 1 <= channels <= MAX_CHANNELS:
            raise UserError(f"--channels = {channels!r}: allowed: 1 to {MAX_CHANNELS}")
        current = raw.get("channels", 3)
        if isinstance(current, list) and channels <= len(current):
            raw["channels"] = current[:channels]
        else:
            raw["channels"] = channels
    if weight is not None:
        raw.setdefault("defaults", {})
        raw["defaults"]["weight"] = weight
        if isinstance(raw.get("channels"), list):
            raw["channels"] = [{**entry, "weight": weight} if isinstance(entry, dict) else entry
                               for entry in raw["channels"]]
    return raw


def read_toml(path: str | Path) -> dict[str, Any]:
    """Read a TOML file, turning every failure into a :class:`UserError`."""
    path = Path(path)
    try:
        with path.open("rb") as handle:
            return tomllib.load(handle)
    except FileNotFoundError:
        raise UserError(f"{path}: no such file") from None
    except IsADirectoryError:
        raise UserError(f"{path}: is a folder, not a config file") from None
    except tomllib.TOMLDecodeError as error:
        raise UserError(f"{path}: not valid TOML: {error}") from None
    except UnicodeDecodeError:
        raise UserError(f"{path}: not a text file") from None


def load_config(path: str | Path, *, channels: int | None = None, weight: str | None = None) -> Config:
    """Read, retune and validate a config file."""
    raw = apply_overrides(read_toml(path), channels=channels, weight=weight)
    return parse_config(raw, str(path))


__all__ = [
    "STANDARD_GRAVITY", "Channel", "Config", "ConfigModel", "Quantity", "apply_overrides", "format_errors",
    "load_config", "parse_config", "read_toml",
]

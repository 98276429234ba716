"""Pulse programs: a profile turned into the gateware's rate program.

A :class:`Program` is a list of segments, each lasting a whole number of clock ticks
with one fixed-point rate per channel (pulses per tick times ``2**frac_bits``, the rate
register's integer). :func:`make_program` builds it from a
:class:`~dvgate.sim.profile.Profile` with first-order error feedback: each segment's
rate is the rounded value of the profile's integral over the segment *plus the residual
that earlier segments left*, so the residual never grows. At every segment boundary the
program's integral (exact, in integers) equals the profile's integral within half a
least significant bit of rate times the ticks of one segment, however long the run
(first-order error-feedback quantization keeps the running error within one quantum:
delta-sigma textbooks, e.g. Schreier and Temes, *Understanding Delta-Sigma Data
Converters*).

Config, ``[program]`` section::

    segment = "1 ms"        # segment length (s, ms, us, ns or cycles)
    over_range = "error"    # or "clamp": clip beyond full scale and report it
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Literal

import numpy as np
from pydantic import BaseModel, ConfigDict, Field

from dvgate.config import Config, Duration, section
from dvgate.errors import UserError
from dvgate.sim.profile import Profile
from dvgate.sim.trace import RateChanges
from dvgate.units import STANDARD_GRAVITY

#: Version of the saved program format (``.npz``).
PROGRAM_FORMAT = 1


class ProgramSettings(BaseModel):
    """The ``[program]`` section of the emulator config."""

    model_config = ConfigDict(extra="forbid", frozen=True, str_strip_whitespace=True, validate_default=True)

    segment: Duration = Field(default="1 ms")
    over_range: Literal["error", "clamp"] = "error"


def program_settings(config: Config) -> ProgramSettings:
    """The config's ``[program]`` section, validated (defaults when absent)."""
    return section(config, "program", ProgramSettings)


@dataclass(frozen=True)
class OverRange:
    """Samples of one channel beyond full scale, clipped (``over_range = "clamp"``).

    Attributes
    ----------
    channel : str
        Channel name.
    samples : int
        Profile samples clipped.
    first, last : float
        Profile times (s) of the first and last clipped sample.
    peak : float
        The largest magnitude asked for, SI.
    limit : float
        The full scale it was clipped to, SI.
    """

    channel: str
    samples: int
    first: float
    last: float
    peak: float
    limit: float


@dataclass(frozen=True, eq=False)
class Program:
    """Rate segments on exact tick boundaries, one fixed-point rate per channel.

    Attributes
    ----------
    ticks : ndarray of int64, shape (m,)
        Length of each segment in clock ticks (at least 1). Consecutive segments never
        carry the same rates on every channel (they are merged).
    rates : ndarray of int64, shape (m, channels)
        Rate register value of each channel during each segment: pulses per tick times
        ``2**frac_bits`` (``Config.rate_to_fixed`` scale).
    names : tuple of str
        Channel names, in the config's order.
    frac_bits : int
        Fraction bits of the rate.
    clock_hz : float
        The clock the ticks count.
    weights : tuple of float
        Pulse weight of each channel (m/s or rad per pulse).
    segment_ticks : int
        Nominal segment length before merging.
    start_time : float
        Profile time (s) of tick 0.
    worst_error : float
        Largest difference between the program's and the profile's integral at any
        segment boundary, in LSB x segment ticks (at most 0.5 unless rates were clipped).
    over_range : tuple of OverRange
        Clipped profile stretches (empty unless ``over_range = "clamp"``).
    register_clips : int
        Segments whose rate had to be clipped to the rate register's width (the residual
        catches up in later segments).
    """

    ticks: np.ndarray
    rates: np.ndarray
    names: tuple[str, ...]
    frac_bits: int
    clock_hz: float
    weights: tuple[float, ...]
    segment_ticks: int
    start_time: float = 0.0
    worst_error: float = 0.0
    over_range: tuple[OverRange, ...] = ()
    register_clips: int = 0
    _sums: np.ndarray = field(init=False, repr=False)

    def __post_init__(self) -> None:
        ticks = np.asarray(self.ticks, dtype=np.int64)
        rates = np.asarray(self.rates, dtype=np.int64).reshape(len(ticks), len(self.names))
        if len(ticks) == 0 or np.any(ticks < 1):
            raise ValueError("a program has at least one segment, each at least one tick long")
        object.__setattr__(self, "ticks", ticks)
        object.__setattr__(self, "rates", rates)
        object.__setattr__(self, "_sums", _running_sums(ticks, rates))

    @property
    def n(self) -> int:
        """Number of channels."""
        return len(self.names)

    @property
    def starts(self) -> np.ndarray:
        """Tick at which each segment starts, plus the end (shape (m+1,))."""
        return np.concatenate(([0], np.cumsum(self.ticks)))

    @property
    def total_ticks(self) -> int:
        return int(self.ticks.sum())

    @property
    def seconds(self) -> float:
        return self.total_ticks / self.clock_hz

    def segments(self) -> Iterator[tuple[int, tuple[int, ...]]]:
        """Each segment as ``(ticks, (rate per channel))``, in order: what a host link loads."""
        for ticks, row in zip(self.ticks.tolist(), self.rates.tolist(), strict=True):
            yield ticks, tuple(row)

    def integral(self, ticks: np.ndarray | list[int] | int) -> np.ndarray:
        """Exact sum of the rate over ticks ``0 .. t-1`` for each ``t``, shape (k, channels).

        Python integers (object array), fixed point: divide by ``2**frac_bits`` for
        pulses. Past the end the rate is zero.
        """
        t = np.atleast_1d(np.asarray(ticks, dtype=np.int64))
        if np.any(t < 0):
            raise ValueError("ticks start at 0")
        starts = self.starts
        seg = np.searchsorted(starts, t, side="right") - 1
        past = seg >= len(self.ticks)
        seg_c = np.minimum(seg, len(self.ticks) - 1)
        into = t - starts[seg_c]
        if self._sums.dtype == object:
            out = self._sums[seg_c] + self.rates[seg_c].astype(object) * into.astype(object)[:, None]
        else:  # within the bound _running_sums checked: exact in int64
            out = (self._sums[seg_c] + self.rates[seg_c] * into[:, None]).astype(object)
        if np.any(past):
            out[past] = self._sums[-1]
        return out

    def pulses(self, ticks: np.ndarray | list[int] | int) -> np.ndarray:
        """The program's integral in pulses (float), shape (k, channels)."""
        exact = self.integral(ticks)
        return (exact / (1 << self.frac_bits)).astype(float)

    def velocity(self, ticks: np.ndarray | list[int] | int) -> np.ndarray:
        """The program's integral in SI units (m/s or rad), shape (k, channels)."""
        return self.pulses(ticks) * np.asarray(self.weights)

    def rate_changes(self, origin: int, initial: tuple[int, ...] | None = None) -> RateChanges:
        """The program as the model's rate changes: tick ``t`` is cycle ``origin + t``.

        A change is listed only where a channel's rate differs from the one before it
        (``initial``, the rates at reset, for the first segment); after the last
        segment every channel returns to zero. In order of cycle, then channel.

        Returns
        -------
        RateChanges
            Read as a tuple of :class:`~dvgate.sim.trace.RateChange` (and equal to one),
            held as arrays: a long program has millions of changes.
        """
        if origin < 1:
            raise ValueError("rate changes start at cycle 1")
        rows = np.vstack([self.rates, np.zeros((1, self.n), dtype=np.int64)])
        changed = np.empty(rows.shape, dtype=bool)
        changed[0] = True if initial is None else rows[0] != np.asarray(initial, dtype=object)
        np.not_equal(rows[1:], rows[:-1], out=changed[1:])
        segment, channel = np.nonzero(changed)  # row by row: by cycle, then channel
        return RateChanges(origin + self.starts[segment], channel, rows[segment, channel])


def _running_sums(ticks: np.ndarray, rates: np.ndarray) -> np.ndarray:
    """Exact running integral at each segment start, shape (m + 1, channels).

    In int64 when no partial sum can reach 2**62 (bounded by the largest rate magnitude
    times the whole length, in Python integers), else in Python integers (an object array, as large programs of wide
    rates need; a Python integer per entry costs several times the memory).
    """
    sums = np.zeros((len(ticks) + 1, rates.shape[1]), dtype=np.int64)
    largest = max(int(rates.max(initial=0)), -int(rates.min(initial=0)))
    if largest * int(ticks.sum()) < 1 << 62:
        # In place: a long program's rates are tens of megabytes; no temporary copies.
        np.multiply(rates, ticks[:, None], out=sums[1:])
        np.cumsum(sums[1:], axis=0, out=sums[1:])
        return sums
    sums = sums.astype(object)
    sums[1:] = np.cumsum(rates.astype(object) * ticks.astype(object)[:, None], axis=0)
    return sums


def _limit_message(profile: Profile, config: Config, ch: int, index: int) -> str:
    channel = config.channels[ch]
    value = profile.values[index, ch]
    unit = profile.units[ch]
    where = f"t = {profile.time[index]:.9g} s"
    if profile.lines is not None:
        where = f"line {int(profile.lines[index])}, column {channel.name!r} ({where})"
    else:
        where = f"{where}, channel {channel.name!r}"
    in_g = f" ({value / STANDARD_GRAVITY:+.6g} g)" if unit == "m/s^2" else ""
    scale = f"{channel.range:.6g} {unit}" + (f" ({channel.range / STANDARD_GRAVITY:.6g} g)" if unit == "m/s^2" else "")
    return (f"{profile.source}: {where}: {value:+.6g} {unit}{in_g} is beyond the full scale of +/-{scale}; "
            f"allowed: within full scale, or set [program] over_range = \"clamp\" in the config")


def _check_range(profile: Profile, config: Config, mode: str) -> tuple[np.ndarray, tuple[OverRange, ...]]:
    """Refuse or clip samples beyond each channel's full scale."""
    limits = np.array([c.range for c in config.channels])
    over = np.abs(profile.values) > limits
    if not over.any():
        return profile.values, ()
    if mode == "error":
        rows, cols = np.nonzero(over)
        first = int(np.argmin(rows))
        raise UserError(_limit_message(profile, config, int(cols[first]), int(rows[first])))
    report = []
    for ch in np.flatnonzero(over.any(axis=0)):
        idx = np.flatnonzero(over[:, ch])
        report.append(OverRange(config.channels[ch].name, len(idx), float(profile.time[idx[0]]),
                                float(profile.time[idx[-1]]), float(np.abs(profile.values[idx, ch]).max()),
                                float(limits[ch])))
    return np.clip(profile.values, -limits, limits), tuple(report)


def make_program(profile: Profile, config: Config, settings: ProgramSettings | None = None) -> Program:
    """Convert a profile into a rate program for the config's emulator.

    Parameters
    ----------
    profile : Profile
        Values for the config's channels, in their order.
    config : Config
        The emulator: clock, fraction bits, pulse weights, full scales, rate width.
    settings : ProgramSettings, optional
        Segment length and over-range policy; the config's ``[program]`` section when
        not given.

    Raises
    ------
    UserError
        A value beyond full scale with ``over_range = "error"`` (the message names the
        time, the channel, and the line and column for a CSV profile); channels that do
        not match the config.
    """
    settings = settings or program_settings(config)
    names = tuple(c.name for c in config.channels)
    if profile.names != names:
        raise UserError(f"{profile.source}: the profile's channels {profile.names} are not the config's {names}")
    hw = config.hw
    seg = config.cycles("program.segment", settings.segment)
    values, clipped = _check_range(profile, config, settings.over_range)
    source = Profile(profile.time, values, profile.names, profile.units, profile.source)
    total = round(profile.duration * config.clock_hz)
    if total < 1:
        raise UserError(f"{profile.source}: the profile lasts {profile.duration:.3g} s, less than one clock tick")
    count = math.ceil(total / seg)
    lengths = np.full(count, seg, dtype=np.int64)
    lengths[-1] = total - seg * (count - 1)
    bounds = profile.start + np.concatenate(([0], np.cumsum(lengths))) / config.clock_hz
    bounds = np.minimum(bounds, profile.stop)
    # Each segment's integral in fixed-point units (LSB x ticks): SI integral / weight x 2**F.
    scale = np.array([math.ldexp(1.0 / c.weight, hw.frac_bits) for c in config.channels])

    def wanted(a: int, b: int) -> np.ndarray:
        """Segments ``a .. b - 1``: each integral comes from its own bounds alone, so in pieces it is the same."""
        return source.interval_integrals(bounds[a:b + 1]) * scale

    rates, worst = _quantize(wanted, lengths)
    clips = 0
    if np.any(rates < hw.rate_min) or np.any(rates > hw.rate_max):
        rates, worst, clips = _quantize_clipped_all(wanted, lengths, hw.rate_min, hw.rate_max)
    # Merge neighbours with equal rates on every channel: fewer changes, same integral.
    keep = np.concatenate(([True], np.any(rates[1:] != rates[:-1], axis=1)))
    starts = np.flatnonzero(keep)
    merged_ticks = np.add.reduceat(lengths, starts)
    return Program(merged_ticks, rates[starts], names, hw.frac_bits, config.clock_hz,
                   tuple(c.weight for c in config.channels), seg, profile.start, worst, clipped, clips)


#: Segments quantized at a time: a long profile's working arrays stay small.
SEGMENT_CHUNK = 1 << 16


def _quantize(wanted: Callable[[int, int], np.ndarray], lengths: np.ndarray,
              chunk: int | None = None) -> tuple[np.ndarray, float]:
    """Rates with the residual carried, and the largest residual (LSB x segment ticks).

    For segments of equal length ``n``, carrying the residual gives
    ``rate_j = round(S_{j+1} / n) - round(S_j / n)`` with ``S_j`` the wanted integral up
    to segment ``j``; ``S_j / n`` is split into an integer part (summed exactly) and a
    fraction part (summed in floats, small), so no precision is lost on long runs.
    ``wanted(a, b)`` gives the wanted integrals of segments ``a .. b - 1``; they are
    taken ``chunk`` segments at a time, the running sum carried from one to the next
    (the same additions in the same order as one sum over all).
    """
    chunk = chunk or SEGMENT_CHUNK
    count = len(lengths)
    n = int(lengths[0])
    full = count - 1 if lengths[-1] != n else count
    rates: np.ndarray | None = None
    run = rounded = None  # the running fraction sum and its rounding before the chunk
    worst = np.float64(0.0)
    for a in range(0, count, chunk):
        b = min(a + chunk, count)
        want = wanted(a, b)
        if rates is None:
            rates = np.empty((count, want.shape[1]), dtype=np.int64)
            run = rounded = np.zeros(want.shape[1])
        if min(b, full) > a:
            x = want[:min(b, full) - a] / n
            whole = np.floor(x)
            frac = x - whole
            sums = np.cumsum(np.vstack([run, frac]), axis=0)  # row 0: the sum carried in
            near = np.rint(sums)
            rates[a:a + len(x)] = whole.astype(np.int64) + (near[1:] - near[:-1]).astype(np.int64)
            worst = np.max([worst, np.max(np.abs((sums[1:] - near[1:]) * n) / n)])
            run, rounded = sums[-1], near[-1]
        if b == count and full < count:
            residual = (run - rounded) * n
            last = int(lengths[-1])
            rates[-1] = np.rint((residual + want[-1]) / last).astype(np.int64)
            worst = np.max([worst, np.max(np.abs(residual + want[-1] - rates[-1] * last) / last)])
    assert rates is not None
    return rates, float(worst)


def _quantize_clipped_all(wanted: Callable[[int, int], np.ndarray], lengths: np.ndarray, lo: int, hi: int,
                          chunk: int | None = None) -> tuple[np.ndarray, float, int]:
    """:func:`_quantize_clipped` over every segment, ``chunk`` at a time: rates, largest residual, clips."""
    chunk = chunk or SEGMENT_CHUNK
    parts, worst, clips, residual = [], np.float64(0.0), 0, None
    for a in range(0, len(lengths), chunk):
        b = min(a + chunk, len(lengths))
        rates, errors, n_clips = _quantize_clipped(wanted(a, b), lengths[a:b], lo, hi, residual)
        parts.append(rates)
        worst = np.max([worst, np.max(np.abs(errors) / lengths[a:b, None])])
        clips += n_clips
        residual = errors[-1]
    return np.concatenate(parts), float(worst), clips


def _quantize_clipped(wanted: np.ndarray, lengths: np.ndarray, lo: int, hi: int,
                      residual: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray, int]:
    """The same recursion one segment at a time, clipping to the rate register.

    ``residual``: what earlier segments left (none by default); the last row of the
    errors returned is what these leave.
    """
    residual = np.zeros(wanted.shape[1]) if residual is None else residual
    rates = np.empty(wanted.shape, dtype=np.int64)
    errors = np.empty(wanted.shape)
    clips = 0
    for j, n in enumerate(lengths.tolist()):
        want = residual + wanted[j]
        rate = np.rint(want / n)
        clipped = np.clip(rate, lo, hi)
        clips += int(np.any(clipped != rate))
        rates[j] = clipped.astype(np.int64)
        residual = want - rates[j] * n
        errors[j] = residual
    return rates, errors, clips


def save_program(program: Program, path: str | Path) -> Path:
    """Write a program to ``path`` (``.npz``: exact integers and the config figures it needs)."""
    path = Path(path)
    with path.open("wb") as handle:
        np.savez_compressed(
            handle, format=np.array(PROGRAM_FORMAT), ticks=program.ticks, rates=program.rates,
            names=np.array(program.names), frac_bits=np.array(program.frac_bits),
            clock_hz=np.array(program.clock_hz), weights=np.array(program.weights),
            segment_ticks=np.array(program.segment_ticks), start_time=np.array(program.start_time),
        )
    return path


def load_program(path: str | Path) -> Program:
    """Read a program written by :func:`save_program`.

    Raises
    ------
    UserError
        When the file is missing or is not a program of this format.
    """
    path = Path(path)
    try:
        with np.load(path, allow_pickle=False) as data:
            if int(data["format"]) != PROGRAM_FORMAT:
                raise UserError(f"{path}: program format {int(data['format'])}; this dvgate reads {PROGRAM_FORMAT}")
            return Program(data["ticks"], data["rates"], tuple(str(s) for s in data["names"]),
                           int(data["frac_bits"]), float(data["clock_hz"]),
                           tuple(float(w) for w in data["weights"]), int(data["segment_ticks"]),
                           float(data["start_time"]))
    except FileNotFoundError:
        raise UserError(f"{path}: no such file") from None
    except (OSError, KeyError, ValueError) as error:
        raise UserError(f"{path}: not a dvgate program ({error})") from None


def check_program(program: Program, config: Config) -> None:
    """Refuse a program made for another emulator (channels, clock, fraction bits, rate width)."""
    hw = config.hw
    problems = []
    if program.names != hw.names:
        problems.append(f"channels {program.names} against the config's {hw.names}")
    if program.frac_bits != hw.frac_bits:
        problems.append(f"frac_bits {program.frac_bits} against {hw.frac_bits}")
    if program.clock_hz != config.clock_hz:
        problems.append(f"clock {program.clock_hz:g} Hz against {config.clock_hz:g} Hz")
    if np.any(program.rates < hw.rate_min) or np.any(program.rates > hw.rate_max):
        problems.append(f"rates beyond the {hw.rate_bits}-bit rate register")
    if problems:
        raise UserError(f"the program does not fit the config {config.source}: " + "; ".join(problems))


__all__ = [
    "OverRange", "Program", "ProgramSettings", "check_program", "load_program", "make_program",
    "program_settings", "save_program",
]

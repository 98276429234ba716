"""The host model: what the computer makes of the pulses.

The computer counts every pulse on each channel's two lines (up on the positive line,
down on the negative one), reads its counters once per computation cycle and turns the
net count into velocity (count times pulse weight). It also watches that both lines of
every channel stay alive, and every pulse it counts costs it time: the counting load is
pulses per second times the time per counted pulse, as a share of its time.

The model works from pulse counts sampled at chosen cycles (:class:`PulseCounts`), never
from per-cycle arrays, so a run of billions of cycles costs only its samples. Counts can
come from a run's edges (:func:`pulse_counts`) or from any source that counts pulses per
line (a count-only engine, a board's telemetry).

Config, ``[host]`` section::

    cycle = "10 ms"          # computation cycle: the counters are read once per cycle
    pulse_cost = "5 us"      # computer time spent per counted pulse
    load_warning = "50 %"    # warn when the counting load passes this share
    liveness = true          # watch both lines of every channel
    silence = "3 ms"         # alarm when a line stays silent longer (default: 3 strobe periods)
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from pydantic import BaseModel, ConfigDict, Field

from dvgate.config import Config, Duration, section
from dvgate.errors import UserError
from dvgate.sim import quantities as q
from dvgate.sim.trace import LINE_NAMES, RunResult

Share = q.field("share", positive=True)
Cost = q.field("time", minimum=0.0)


class HostSettings(BaseModel):
    """The ``[host]`` section of the emulator config."""

    model_config = ConfigDict(extra="forbid", frozen=True, str_strip_whitespace=True, validate_default=True)

    cycle: Duration = Field(default="10 ms")
    pulse_cost: Cost = Field(default="5 us")
    load_warning: Share = Field(default="50 %")
    liveness: bool = True
    silence: Duration | None = None


@dataclass(frozen=True)
class HostTiming:
    """The host settings in clock cycles, checked against the config.

    Attributes
    ----------
    cycle_cyc : int
        Computation cycle.
    silence_cyc : int
        Liveness limit.
    pulse_cost : float
        Seconds per counted pulse.
    load_warning : float
        Share (0 to 1) above which the load is a warning.
    liveness : bool
        Whether the liveness check runs.
    """

    cycle_cyc: int
    silence_cyc: int
    pulse_cost: float
    load_warning: float
    liveness: bool


def host_timing(config: Config, settings: HostSettings | None = None) -> HostTiming:
    """The config's ``[host]`` section in cycles.

    Raises
    ------
    UserError
        A computation cycle shorter than the strobe period (the computer would read its
        counters between two answers of the sensor), or a bad value.
    """
    settings = settings or section(config, "host", HostSettings)
    cycle = config.cycles("host.cycle", settings.cycle)
    period = config.strobe_period_cyc
    if cycle < period:
        raise UserError(f"{config.source}: host.cycle = {settings.cycle.text!r} ({cycle} cycles): allowed: at least "
                        f"the strobe period, strobe.period = {config.model.strobe.period.text!r} ({period} cycles); "
                        "the computer reads its counters once per computation cycle, after the strobe answers")
    silence = 3 * period if settings.silence is None else config.cycles("host.silence", settings.silence)
    return HostTiming(cycle, silence, settings.pulse_cost, settings.load_warning, settings.liveness)


@dataclass(frozen=True)
class PulseCounts:
    """Pulses counted on every line, sampled at chosen cycles.

    Attributes
    ----------
    cycles : ndarray of int64, shape (k,)
        Sample cycles, strictly increasing.
    counts : ndarray of int64, shape (k, channels, 2)
        Pulses started on the positive (``[..., 0]``) and negative (``[..., 1]``) line
        in cycles ``1 .. cycle`` (a pulse whose rising edge is at the sample cycle counts).
    """

    cycles: np.ndarray
    counts: np.ndarray

    def __post_init__(self) -> None:
        cycles = np.asarray(self.cycles, dtype=np.int64)
        counts = np.asarray(self.counts, dtype=np.int64)
        if cycles.ndim != 1 or counts.shape[:1] != cycles.shape or counts.ndim != 3 or counts.shape[2] != 2:
            raise ValueError("counts must have shape (samples, channels, 2) to match the cycles")
        if np.any(np.diff(cycles) <= 0):
            raise ValueError("sample cycles must increase strictly")
        object.__setattr__(self, "cycles", cycles)
        object.__setattr__(self, "counts", counts)

    @property
    def net(self) -> np.ndarray:
        """Net count (positive minus negative) per sample and channel, shape (k, channels)."""
        return self.counts[:, :, 0] - self.counts[:, :, 1]

    def at(self, cycles: np.ndarray) -> PulseCounts:
        """The samples at ``cycles`` (each must be one of this object's sample cycles)."""
        cycles = np.asarray(cycles, dtype=np.int64)
        index = np.searchsorted(self.cycles, cycles)
        if np.any(index >= len(self.cycles)) or np.any(self.cycles[np.minimum(index, len(self.cycles) - 1)] != cycles):
            raise ValueError("every cycle asked for must be a sample cycle")
        return PulseCounts(cycles, self.counts[index])


def rise_cycles(result: RunResult, channels: int) -> list[list[np.ndarray]]:
    """Rising-edge cycles of each channel's positive and negative line, sorted."""
    if not result.edges:
        return [[np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)] for _ in range(channels)]
    count = len(result.edges)
    flat = np.fromiter((x for e in result.edges for x in (e.channel, e.line, e.rise)), np.int64, 3 * count)
    table = flat.reshape(count, 3)
    out = []
    for ch in range(channels):
        mine = table[table[:, 0] == ch]
        out.append([np.sort(mine[mine[:, 1] == line, 2]) for line in (0, 1)])
    return out


def pulse_counts(result: RunResult | list[list[np.ndarray]], cycles: np.ndarray, channels: int) -> PulseCounts:
    """Count each line's pulses (rising edge at or before each sample cycle).

    Parameters
    ----------
    result : RunResult or list of [pos, neg] arrays
        A run's edges, or the rising-edge cycles from :func:`rise_cycles`.
    cycles : ndarray of int
        Sample cycles, strictly increasing.
    channels : int
        Number of channels.
    """
    rises = rise_cycles(result, channels) if isinstance(result, RunResult) else result
    cycles = np.asarray(cycles, dtype=np.int64)
    counts = np.empty((len(cycles), channels, 2), dtype=np.int64)
    for ch in range(channels):
        for line in (0, 1):
            counts[:, ch, line] = np.searchsorted(rises[ch][line], cycles, side="right")
    return PulseCounts(cycles, counts)


def read_cycles(timing: HostTiming, start: int, stop: int) -> np.ndarray:
    """Cycles at which the computer reads its counters: every computation cycle from
    ``start`` (the first read one cycle in), and a last read at ``stop``."""
    reads = np.arange(start + timing.cycle_cyc, stop + 1, timing.cycle_cyc, dtype=np.int64)
    if len(reads) == 0 or reads[-1] != stop:
        reads = np.append(reads, np.int64(stop))
    return reads


@dataclass(frozen=True)
class LivenessAlarm:
    """A line silent longer than the limit.

    Attributes
    ----------
    channel : str
        Channel name.
    line : str
        ``"pos"`` or ``"neg"``.
    since : int
        Cycle of the last sample that saw the line pulse (or the start).
    raised : int
        First sample cycle at which the silence passed the limit.
    cleared : int or None
        Sample cycle at which a pulse was seen again; None if silent to the end.
    """

    channel: str
    line: str
    since: int
    raised: int
    cleared: int | None


@dataclass(frozen=True)
class HostView:
    """The computer's view of a run.

    Attributes
    ----------
    reads : ndarray of int64, shape (k,)
        Cycles of the counter reads.
    times : ndarray of float, shape (k,)
        The same in seconds from the start of the run.
    counts : ndarray of int64, shape (k, channels)
        Net count read at each read (running since the start).
    velocity : ndarray of float, shape (k, channels)
        Net count times pulse weight (m/s or rad).
    delta : ndarray of int64, shape (k, channels)
        Net pulses counted during each computation cycle.
    pulses : ndarray of int64, shape (k, channels)
        Pulses counted on both lines during each computation cycle.
    pulse_rate : ndarray of float, shape (k,)
        Pulses per second on every line of every channel, over each computation cycle.
    load : ndarray of float, shape (k,)
        Counting load over each computation cycle, as a share of the computer's time.
    alarms : tuple of LivenessAlarm
        Every line silence longer than the limit.
    timing : HostTiming
        The settings used.
    """

    reads: np.ndarray
    times: np.ndarray
    counts: np.ndarray
    velocity: np.ndarray
    delta: np.ndarray
    pulses: np.ndarray
    pulse_rate: np.ndarray
    load: np.ndarray
    alarms: tuple[LivenessAlarm, ...]
    timing: HostTiming

    @property
    def peak_load(self) -> float:
        return float(self.load.max()) if len(self.load) else 0.0

    @property
    def overloaded(self) -> bool:
        """True when the counting load passed the warning share in some computation cycle."""
        return self.peak_load > self.timing.load_warning


def host_view(samples: PulseCounts, config: Config, timing: HostTiming, *, start: int, stop: int) -> HostView:
    """Play the computer on a run's pulse counts.

    Parameters
    ----------
    samples : PulseCounts
        Counts at every read cycle (:func:`read_cycles`) and at any further cycles; the
        liveness check looks at every sample, so sampling once per strobe gives it strobe
        resolution.
    config : Config
        Channel names, weights and clock.
    timing : HostTiming
        From :func:`host_timing`.
    start, stop : int
        Cycle at which the computer starts counting (arming), and the last cycle.
    """
    reads = read_cycles(timing, start, stop)
    at = samples.at(reads)
    net = at.net
    weights = np.array([c.weight for c in config.channels])
    both = at.counts.sum(axis=2)
    prev_net = np.vstack([np.zeros((1, net.shape[1]), dtype=np.int64), net[:-1]])
    prev_both = np.vstack([np.zeros((1, both.shape[1]), dtype=np.int64), both[:-1]])
    # Counts at `start` are zero: nothing is emitted before the outputs are armed.
    delta = net - prev_net
    pulses = both - prev_both
    spans = np.diff(np.concatenate(([start], reads))) / config.clock_hz
    rate = pulses.sum(axis=1) / spans
    alarms = _liveness(samples, config, timing, start) if timing.liveness else ()
    return HostView(reads, (reads - start) / config.clock_hz, net, net * weights, delta, pulses, rate,
                    rate * timing.pulse_cost, alarms, timing)


def _liveness(samples: PulseCounts, config: Config, timing: HostTiming, start: int) -> tuple[LivenessAlarm, ...]:
    """Silences longer than the limit, at the samples' resolution."""
    out = []
    cycles = np.concatenate(([start], samples.cycles[samples.cycles > start]))
    counts = samples.counts[samples.cycles > start]
    counts = np.concatenate((np.zeros((1, *counts.shape[1:]), dtype=np.int64), counts))
    for ch, channel in enumerate(config.channels):
        for line in (0, 1):
            c = counts[:, ch, line]
            changed = np.concatenate(([True], np.diff(c) != 0))
            last = cycles[np.maximum.accumulate(np.where(changed, np.arange(len(c)), 0))]
            silent = cycles - last > timing.silence_cyc
            if not silent.any():
                continue
            # each run of silent samples is one alarm
            starts = np.flatnonzero(silent & ~np.concatenate(([False], silent[:-1])))
            for s in starts:
                since = int(last[s])
                after = np.flatnonzero(changed[s:])
                cleared = int(cycles[s + after[0]]) if len(after) else None
                out.append(LivenessAlarm(channel.name, LINE_NAMES[line], since, int(cycles[s]), cleared))
    return tuple(sorted(out, key=lambda a: (a.raised, a.channel, a.line)))


__all__ = [
    "HostSettings", "HostTiming", "HostView", "LivenessAlarm", "PulseCounts", "host_timing", "host_view",
    "pulse_counts", "read_cycles", "rise_cycles",
]

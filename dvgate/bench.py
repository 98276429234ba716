"""Bench check: a logic-analyzer capture of the real pins against the reference model.

:func:`check_capture` reads a capture (:mod:`dvgate.sim.capture`), finds the strobe's
edges and every pulse, drives the reference model with the capture's own strobe edges
(and ``arm`` line and rate program), and compares the whole pulse sequence with the
model's prediction. :func:`write_report` writes the report folder (text, JSON, CSV
tables and plots).

Matching rule
-------------
(``docs/bench.md`` gives it in full.) Let ``T`` be the emulator's clock period (config),
``Ts`` the analyzer's sample period, ``J`` the declared timing uncertainty of one
captured edge beyond sampling (default 0) and ``p`` the clock tolerance (default 100 ppm,
for the emulator's and the analyzer's oscillators together).

1. **Clock.** The outputs are registered, so every captured output edge sits on the
   emulator's clock, seen up to ``Ts`` late: :func:`dvgate.clock_recovery.recover_clock`
   finds the period and phase in the capture's time base (least squares of the rising
   edges against their integer cycles).
2. **Strobe cycles.** Each strobe's pin edge may fall in one or two cycles of that
   clock. It is fixed by its time alone when one is possible; else by the first output
   edge it caused (a burst on an idle emitter rises ``L = M + 2`` cycles after the pin
   edge); else, when nothing answered, by the model's fit: of its possible cycles, the
   one that makes the model agree (both are physically possible). The model runs on
   those cycles (each taken strobe at least ``M`` cycles long), the ``arm`` line and the
   program's rate changes, converted on the same clock.
3. **Window.** A predicted edge of cycle ``k`` is expected at ``a + k P``; a captured
   rising edge matches it when its deviation lies in the band the clock's edges showed,
   at most ``2 (Ts + 2J)`` wide, so the match is cycle-exact. Predicted and captured
   pulses are paired in time order, each line on its own; a predicted pulse left
   without a partner is **missing**, a captured one is **extra**.
4. **Lengths.** A matched pulse's width must equal the predicted width within
   ``Ts + 2J + p w`` (both edges come from one clock; each is seen up to ``Ts`` late), or
   it is a **width** discrepancy. The low time between two pulses the model sends back
   to back is held to the same bound (a **gap** discrepancy, unless a width discrepancy
   of either pulse explains it).
5. **Clock.** A recovered clock beyond ``p`` (plus three standard errors) of the config's,
   or output edges on no clock grid near it, is a **clock** discrepancy.
6. **Sampling limit.** Edges are known to one sample period. A pulse or gap narrower
   than two samples is flagged as unmeasurable (its width is not reported, not
   guessed); a capture whose sample period exceeds half the configured width or gap
   is refused. Pulses before the capture's first strobe, or whose window passes the
   capture's end, are counted as not compared.

Without a recovered clock (``Ts + 2J`` over half a clock period, too few edges, edges on
no grid, or ``clock_recovery=False``), the nominal time base is used:
``c(t) = round((t - t0) / T - phi) + 1`` with ``phi`` the strobe edges' circular mean
phase; predicted edges are placed from the strobe that started their burst,
``t_s + (k - c_s) T``, in the window ``-(T + Ts + 2J + d) .. Ts + 2J + d`` with
``d = p |t_p - t_s|``; a strobe's cycle is then known only to within one.
"""

from __future__ import annotations

import csv
import io
import json
import math
import tomllib
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from dvgate.clock_recovery import ClockGrid, NoClock, recover_clock
from dvgate.config import Config
from dvgate.errors import UserError
from dvgate.params import HardwareParams
from dvgate.sim.capture import Capture, CaptureMap, SignalRef, Trace, read_capture
from dvgate.sim.model import armed_intervals, run_model
from dvgate.sim.stimulus import integral
from dvgate.sim.trace import LINE_NAMES, NEG, POS, RateChange, RunResult, Stimulus
from dvgate.units import QuantityError, format_si, parse_quantity

if TYPE_CHECKING:
    from dvgate.sim.program import Program

__all__ = [
    "BenchReport", "Bounds", "ChannelCheck", "ClockCheck", "Discrepancy", "FIXED_BY", "RateProgram", "RateStep",
    "Stats", "check_capture", "load_rate_program", "parse_time", "write_report", "DEFAULT_CLOCK_PPM",
]

#: Clock tolerance of the emulator's and the analyzer's oscillators together, ppm. Crystal
#: oscillators are commonly specified to tens of ppm (from memory); 100 ppm covers two.
DEFAULT_CLOCK_PPM = 100.0


# -- the program: rate changes the model needs ------------------------------------------


@dataclass(frozen=True)
class RateStep:
    """From ``at`` seconds after arming, ``channel`` is commanded ``rate`` (SI)."""

    at: float
    channel: int
    rate: float


@dataclass(frozen=True)
class RateProgram:
    """The rates commanded during a capture.

    Attributes
    ----------
    steps : tuple of RateStep
        A hand-written program (TOML): sorted by time, times from the ``arm`` input's
        rise. Channels not named keep the config's initial rate.
    source : str
        The file, for the report.
    segments : Program or None
        A program saved by ``dvgate run`` (``program.npz``, :mod:`dvgate.sim.program`):
        its tick 0 is the first armed cycle, the cycle after the ``arm`` input rises,
        as ``dvgate run`` places it; after its last segment every rate is zero.
    """

    steps: tuple[RateStep, ...]
    source: str
    segments: Program | None = None


def load_rate_program(path: str | Path, config: Config) -> RateProgram:
    """Read the program run during a capture: ``program.npz`` or a TOML file of steps.

    A ``.npz`` file is a program saved by ``dvgate run`` (:func:`dvgate.sim.program.load_program`),
    checked against the config. A TOML file holds ``[[step]]`` tables, each with ``at``
    (time after the ``arm`` input rises, such as ``"250 ms"``) and a rate for each
    channel that changes then (``x = "1.5 g"``, ``z = "-0.2 rad/s"``); a channel not
    named keeps its rate. Steps are in time order::

        [[step]]
        at = "0 s"
        x = "1 g"

        [[step]]
        at = "20 ms"
        x = "-0.5 g"
        y = "2 m/s^2"

    Raises
    ------
    UserError
        Naming the step, the field, the value and what is allowed.
    """
    path = Path(path)
    if path.suffix.lower() == ".npz":
        from dvgate.sim.program import check_program, load_program

        segments = load_program(path)
        check_program(segments, config)
        return RateProgram((), str(path), segments)
    return _load_steps(path, config)


def _load_steps(path: Path, config: Config) -> RateProgram:
    path = Path(path)
    try:
        with path.open("rb") as handle:
            raw = tomllib.load(handle)
    except FileNotFoundError:
        raise UserError(f"{path}: no such file") from None
    except IsADirectoryError:
        raise UserError(f"{path}: is a folder, not a program file") from None
    except tomllib.TOMLDecodeError as error:
        raise UserError(f"{path}: not valid TOML: {error}") from None
    except UnicodeDecodeError:
        raise UserError(f"{path}: not a text file") from None
    extra = sorted(set(raw) - {"step"})
    if extra:
        raise UserError(f"{path}: unknown key {extra[0]!r}; allowed: [[step]] tables")
    steps_raw = raw.get("step", [])
    if not isinstance(steps_raw, list) or not steps_raw:
        raise UserError(f"{path}: step = {steps_raw!r}: allowed: one or more [[step]] tables")
    names = [ch.name for ch in config.channels]
    steps: list[RateStep] = []
    last_at = -math.inf
    for index, entry in enumerate(steps_raw):
        where = f"{path}: step[{index}]"
        if not isinstance(entry, dict):
            raise UserError(f"{where} = {entry!r}: allowed: a table with 'at' and channel rates")
        if "at" not in entry:
            raise UserError(f"{where}: 'at' is missing: the time from arming, such as '10 ms'")
        try:
            at, _ = parse_quantity(entry["at"], "time")
        except QuantityError as error:
            raise UserError(f"{where}.at = {entry['at']!r}: {error}") from None
        if at < 0 or at < last_at:
            raise UserError(f"{where}.at = {entry['at']!r}: allowed: 0 or later, and not before the step before")
        last_at = at
        for key, text in entry.items():
            if key == "at":
                continue
            if key not in names:
                raise UserError(f"{where}.{key}: no such channel; channels: {', '.join(names)}")
            ch = names.index(key)
            channel = config.channels[ch]
            kind = "acceleration" if channel.unit == "m/s" else "angular_rate"
            try:
                rate, _ = parse_quantity(text, kind)
            except QuantityError as error:
                raise UserError(f"{where}.{key} = {text!r}: {error}") from None
            if abs(rate) > channel.range:
                raise UserError(f"{where}.{key} = {text!r}: allowed: within the channel's full scale "
                                f"(+/-{channel.range:.6g} {channel.rate_unit})")
            steps.append(RateStep(at, ch, rate))
    return RateProgram(tuple(steps), str(path))


def parse_time(text: str, field_name: str) -> float:
    """A time written with its unit (``"1.5 ms"``), in seconds; may be negative (pre-trigger)."""
    try:
        value, _ = parse_quantity(text, "time")
    except QuantityError as error:
        raise UserError(f"{field_name} = {text!r}: {error}") from None
    return value


# -- bounds and statistics --------------------------------------------------------------


@dataclass(frozen=True)
class Bounds:
    """What the clock and the sampling allow a captured edge to differ from the model.

    Attributes
    ----------
    clock_period : float
        The emulator's clock period ``T``, seconds.
    sample_period : float
        The analyzer's sample period ``Ts``, seconds.
    jitter : float
        Timing uncertainty ``J`` of one captured edge beyond sampling, seconds.
    clock_ppm : float
        Clock tolerance ``p``, ppm.
    """

    clock_period: float
    sample_period: float
    jitter: float
    clock_ppm: float

    def window(self, span: Any) -> tuple[Any, Any]:
        """Allowed ``captured - predicted`` for an edge ``span`` seconds after its strobe (float or array)."""
        slack = self.sample_period + 2 * self.jitter + self.clock_ppm * 1e-6 * np.abs(span)
        return -(self.clock_period + slack), slack

    def length(self, length: float) -> float:
        """Allowed difference of a width or a gap of ``length`` seconds."""
        return self.sample_period + 2 * self.jitter + self.clock_ppm * 1e-6 * abs(length)

    @property
    def measurable(self) -> float:
        """The narrowest pulse or gap measured: two sample periods."""
        return 2 * self.sample_period

    def describe(self, window: tuple[float, float] | None = None) -> str:
        """The bound in words; ``window`` is the recovered clock's edge window when there is one."""
        if window is None:
            edges = (f"edges within -{format_si(-self.window(0)[0], 's')}/+{format_si(self.window(0)[1], 's')} "
                     "of the model (from the strobe's captured edge)")
        else:
            edges = (f"edges within {format_si(window[0], 's')} to {format_si(window[1], 's')} of their cycle "
                     "on the recovered clock")
        return (f"edges known to one sample period ({format_si(self.sample_period, 's')}); widths and gaps "
                f"within +/-{format_si(self.length(0), 's')} (+{self.clock_ppm:g} ppm); {edges}; "
                f"pulses narrower than {format_si(self.measurable, 's')} are unmeasurable")


@dataclass(frozen=True)
class Stats:
    """Count, minimum, median and maximum of a measurement (seconds); None when empty."""

    count: int
    min: float | None
    median: float | None
    max: float | None

    @classmethod
    def of(cls, values: Sequence[float] | np.ndarray) -> Stats:
        data = np.asarray(values, dtype=np.float64)
        if data.size == 0:
            return cls(0, None, None, None)
        return cls(int(data.size), float(data.min()), float(np.median(data)), float(data.max()))

    def text(self) -> str:
        if not self.count:
            return "none measured"
        return (f"{format_si(self.min, 's')} / {format_si(self.median, 's')} / {format_si(self.max, 's')} "
                f"(n={self.count})")


@dataclass(frozen=True)
class Discrepancy:
    """One place where the capture and the model disagree.

    Attributes
    ----------
    kind : str
        ``"missing"`` (predicted, not captured), ``"extra"`` (captured, not predicted),
        ``"width"`` or ``"gap"`` (out of bound), or ``"clock"`` (the emulator's clock,
        recovered from the output edges, is beyond the clock tolerance, or the edges sit
        on no clock grid near the config's).
    channel, line : str
        Channel name and ``"pos"`` or ``"neg"`` (empty for ``"clock"``).
    time : float
        Capture time of the pulse's rising edge (predicted for a missing pulse; the
        capture's start for ``"clock"``).
    predicted, captured : float or None
        Missing/extra: the rise times; width: the widths; gap: the low times (seconds);
        clock: the config's and the recovered clock (Hz; None when none fits).
    """

    kind: str
    channel: str
    line: str
    time: float
    predicted: float | None
    captured: float | None

    def text(self) -> str:
        if self.kind == "clock":
            assert self.predicted is not None
            if self.captured is None:
                return (f"clock: the output edges sit on no clock grid near the config's "
                        f"{format_si(self.predicted, 'Hz')}: the clock is far off, or edges are off its grid")
            ppm = (self.captured / self.predicted - 1) * 1e6
            return (f"clock: {format_si(self.captured, 'Hz', 9)} recovered from the output edges, {ppm:+.1f} ppm "
                    f"against the config's {format_si(self.predicted, 'Hz')}: beyond the clock tolerance")
        where = f"{self.channel}_{self.line} at {format_si(self.time, 's', 9)}"
        if self.kind == "missing":
            return f"missing: {where}: the model predicts a pulse; none captured in its window"
        if self.kind == "extra":
            return f"extra: {where}: a captured pulse the model does not predict"
        assert self.predicted is not None and self.captured is not None
        return (f"{self.kind}: {where}: {format_si(self.captured, 's')} captured, "
                f"{format_si(self.predicted, 's')} predicted")


@dataclass(frozen=True)
class ChannelCheck:
    """One channel's comparison.

    Attributes
    ----------
    predicted, captured : tuple of (int, int)
        Pulses on the positive and negative lines, over the compared span.
    matched, missing, extra, width_errors, gap_errors : int
        Outcome of the matching.
    unmeasurable : int
        Captured pulses or back-to-back gaps narrower than two samples.
    not_compared : int
        Captured pulses before the first strobe or active at the capture's start, and
        predicted ones whose window passes the capture's end.
    widths, gaps, latency : Stats
        Captured widths (measurable ones), low times between pulses sent back to back,
        and delays from a strobe's pin edge to the first edge it causes.
    latency_out : int
        Delays outside the bound.
    least_low : float or None
        The shortest low time between any two pulses of the channel.
    net_captured, net_model : int
        Positive minus negative pulses over the whole capture.
    dv_captured, dv_model, dv_program : float
        Net delta-V (m/s or rad): captured and predicted pulses times the weight, and the
        commanded rate integrated over the armed time.
    held_model : float
        Pulses the model still holds at the end (owed plus pending, net): what separates
        the model's delta-V from the program's.
    running_max : int
        Largest difference of the running net count, captured minus model, at a strobe.
    flips : int
        Neighbouring strobe intervals whose net counts differ from the model by +1 and -1:
        a pulse handed over one strobe apart from the model (see ``docs/bench.md``).
    unknown : int
        x or z values read on the channel's lines.
    """

    name: str
    unit: str
    weight: float
    predicted: tuple[int, int]
    captured: tuple[int, int]
    matched: int
    missing: int
    extra: int
    width_errors: int
    gap_errors: int
    unmeasurable: int
    not_compared: int
    widths: Stats
    gaps: Stats
    latency: Stats
    latency_out: int
    least_low: float | None
    net_captured: int
    net_model: int
    dv_captured: float
    dv_model: float
    dv_program: float
    held_model: float
    running_max: int
    flips: int
    unknown: int

    @property
    def discrepancies(self) -> int:
        return self.missing + self.extra + self.width_errors + self.gap_errors


@dataclass(frozen=True)
class ClockCheck:
    """The emulator's clock as the capture shows it.

    Attributes
    ----------
    recovered : bool
        True when the output edges fixed the clock's phase, and its period where they
        can (the matching then runs on its grid); False when the nominal time base was
        used.
    hz : float or None
        The emulator's clock in the capture's time base (None when not measured).
    ppm, ppm_error : float or None
        Against the config's clock, and its standard error.
    source : str
        What measured it: output edges, or the spacing of bursts.
    reason : str
        Why the clock was not recovered (empty when it was).
    window : tuple of float or None
        Allowed ``captured - grid`` of an output edge, seconds.
    offset : tuple of float or None
        Where the clock's edges lie against the grid of seen edges, seconds.
    outliers : int
        Output rising edges off the grid.
    """

    recovered: bool
    hz: float | None
    ppm: float | None
    ppm_error: float | None
    source: str
    reason: str
    window: tuple[float, float] | None
    offset: tuple[float, float] | None
    outliers: int


@dataclass(frozen=True, eq=False)
class BenchReport:
    """Everything the bench check found.

    Attributes
    ----------
    capture : Capture
        What was read.
    bounds : Bounds
        The sampling bound used.
    expected : dict of str to float
        Configured width, gap and latency (seconds) and the latency window.
    channels : tuple of ChannelCheck
        Per channel.
    discrepancies : tuple of Discrepancy
        Every discrepancy, in time order.
    strobe_times : ndarray
        Capture time of every strobe pin edge the model was driven with.
    strobe_counts : ndarray of int, shape (strobes, channels, 2, 2)
        Pulses per strobe interval: ``[strobe, channel, line, 0]`` captured,
        ``[..., 1]`` predicted.
    strobe_mismatches : int
        Strobe intervals whose counts differ on some line.
    verdict : str
        ``"pass"``, ``"fail"`` or ``"inconclusive"``.
    notes : tuple of str
        Everything worth knowing that is not a discrepancy.
    clock_ppm, clock_ppm_error : float or None
        The emulator's clock against the config's in the analyzer's time base: from the
        recovered clock, or else from the captured spacing of the bursts' pulses (None
        with fewer than three bursts of two pulses or more).
    clock : ClockCheck
        The clock's recovery.
    strobe_cycles : ndarray of int
        The cycle of every strobe's pin edge the model was driven with.
    strobe_options : ndarray of int
        How many cycles each strobe's captured time allows.
    strobe_fixed_by : tuple of str
        How each strobe's cycle was fixed (:data:`FIXED_BY`).
    resolution : dict of str to int
        Strobes fixed each way, strobes with several possible cycles (``several``),
        those the model's fit moved from their nearest cycle (``moved``), and the
        model runs of the fit (``fit_runs``).
    """

    capture: Capture
    config_source: str
    program_source: str
    signals: dict[str, SignalRef]
    bounds: Bounds
    expected: dict[str, float]
    channels: tuple[ChannelCheck, ...]
    discrepancies: tuple[Discrepancy, ...]
    strobe_times: np.ndarray
    strobe_counts: np.ndarray
    strobe_mismatches: int
    verdict: str
    notes: tuple[str, ...]
    model_cycles: int
    clock_ppm: float | None
    clock_ppm_error: float | None
    clock: ClockCheck
    strobe_cycles: np.ndarray
    strobe_options: np.ndarray
    strobe_fixed_by: tuple[str, ...]
    resolution: dict[str, int]
    lines: dict[str, Trace] = field(repr=False)
    predicted: dict[str, np.ndarray] = field(repr=False)
    widths_all: np.ndarray = field(repr=False)
    latency_all: np.ndarray = field(repr=False)

    def summary(self) -> str:
        """The report as text."""
        cap = self.capture
        out = io.StringIO()
        w = out.write
        w(f"bench check of {cap.source} against {self.config_source}\n")
        w(f"verdict: {self.verdict.upper()}\n\n")
        w(f"capture: {cap.kind.upper()}, {format_si(cap.end - cap.start, 's')} from "
          f"{format_si(cap.start, 's')}, {cap.samples} {'rows' if cap.kind == 'csv' else 'time stamps'}; "
          f"sample period {format_si(cap.sample_period, 's')} ({cap.sample_period_from})\n")
        w(f"sampling bound: {self.bounds.describe(self.clock.window if self.clock.recovered else None)}\n")
        w(f"program: {self.program_source}; model run: {self.model_cycles} cycles\n")
        mapped = ", ".join(f"{role}={'~' if ref.inverted else ''}{self.lines[role].name}"
                           for role, ref in self.signals.items() if role in self.lines)
        w(f"lines: {mapped}\n")
        e = self.expected
        w(f"configured: width {format_si(e['width'], 's')}, gap {format_si(e['gap'], 's')}, latency "
          f"{format_si(e['latency'], 's')} (window {format_si(e['latency_lo'], 's')} to "
          f"{format_si(e['latency_hi'], 's')})\n")
        c = self.clock
        nominal = format_si(1 / self.bounds.clock_period, 'Hz')
        if c.hz is not None:
            measured = (f"{format_si(c.hz, 'Hz', 9)} from {c.source}, {c.ppm:+.2f} ppm against the config's {nominal} "
                        f"(standard error {c.ppm_error:.2f} ppm, tolerance {self.bounds.clock_ppm:g} ppm)")
        else:
            measured = "not measured"
        if c.recovered:
            assert c.window is not None
            w(f"clock: recovered: {measured}{'; ' + c.reason if c.reason else ''}; output edges within "
              f"{format_si(c.window[0], 's')} to {format_si(c.window[1], 's')} of its grid\n")
        else:
            w(f"clock: not recovered ({c.reason}), nominal time base; {measured}\n")
        r = self.resolution
        w(f"strobes: {len(self.strobe_times)}; strobe intervals whose pulse counts differ from the model: "
          f"{self.strobe_mismatches}\n")
        if c.recovered:
            w(f"  cycle of each strobe: {r['several']} could fall in more than one; fixed by the capture alone "
              f"{r['capture']}, by the first output edge {r['output']}, by the model's fit {r['model']} "
              f"({r['moved']} moved from the nearest cycle), contradicted by the output edge {r['contradicted']}\n")
        w("\n")
        for ch in self.channels:
            w(f"channel {ch.name}: matched {ch.matched}, missing {ch.missing}, extra {ch.extra}, "
              f"width {ch.width_errors}, gap {ch.gap_errors}; unmeasurable {ch.unmeasurable}, "
              f"not compared {ch.not_compared}\n")
            w(f"  pulses pos/neg: captured {ch.captured[0]}/{ch.captured[1]}, "
              f"model {ch.predicted[0]}/{ch.predicted[1]}\n")
            w(f"  width min/median/max: {ch.widths.text()}\n")
            w(f"  gap (back to back) min/median/max: {ch.gaps.text()}; least low time "
              f"{'n/a' if ch.least_low is None else format_si(ch.least_low, 's')}\n")
            w(f"  latency min/median/max: {ch.latency.text()}; outside the window: {ch.latency_out}\n")
            unit = ch.unit
            w(f"  net delta-V: captured {ch.dv_captured:+.6g} {unit} ({ch.net_captured:+d} pulses), model "
              f"{ch.dv_model:+.6g} {unit} ({ch.net_model:+d}), program {ch.dv_program:+.6g} {unit} "
              f"(captured - program = {(ch.dv_captured - ch.dv_program) / ch.weight:+.3f} pulses; the model "
              f"holds {ch.held_model:+.3f} owed or pending at the end)\n")
            w(f"  running net count, captured - model, largest at a strobe: {ch.running_max} pulse(s); "
              f"pulses handed over one strobe apart: {ch.flips}\n")
            if ch.unknown:
                w(f"  x/z values read on its lines: {ch.unknown}\n")
        if self.discrepancies:
            w(f"\ndiscrepancies ({len(self.discrepancies)}; all in discrepancies.csv):\n")
            for item in self.discrepancies[:20]:
                w(f"  {item.text()}\n")
            if len(self.discrepancies) > 20:
                w(f"  ... and {len(self.discrepancies) - 20} more\n")
        if self.notes:
            w("\nnotes:\n")
            for note in self.notes:
                w(f"  - {note}\n")
        return out.getvalue()

    def to_json(self) -> dict[str, Any]:
        """The report as plain data."""
        def stats(s: Stats) -> dict[str, Any]:
            return {"count": s.count, "min": s.min, "median": s.median, "max": s.max}

        return {
            "verdict": self.verdict,
            "capture": {"source": self.capture.source, "format": self.capture.kind, "start": self.capture.start,
                        "end": self.capture.end, "sample_period": self.capture.sample_period,
                        "sample_period_from": self.capture.sample_period_from, "samples": self.capture.samples},
            "config": self.config_source,
            "program": self.program_source,
            "bounds": {"clock_period": self.bounds.clock_period, "sample_period": self.bounds.sample_period,
                       "jitter": self.bounds.jitter, "clock_ppm": self.bounds.clock_ppm,
                       "length": self.bounds.length(0), "window": list(self.bounds.window(0)),
                       "measurable": self.bounds.measurable},
            "expected": self.expected,
            "strobes": len(self.strobe_times),
            "strobe_mismatches": self.strobe_mismatches,
            "clock_ppm": self.clock_ppm, "clock_ppm_error": self.clock_ppm_error,
            "clock": {"recovered": self.clock.recovered, "hz": self.clock.hz, "ppm": self.clock.ppm,
                      "ppm_error": self.clock.ppm_error, "source": self.clock.source, "reason": self.clock.reason,
                      "window": None if self.clock.window is None else list(self.clock.window),
                      "offset": None if self.clock.offset is None else list(self.clock.offset),
                      "outliers": self.clock.outliers},
            "strobe_resolution": dict(self.resolution),
            "channels": [{
                "name": ch.name, "unit": ch.unit, "weight": ch.weight,
                "predicted": list(ch.predicted), "captured": list(ch.captured),
                "matched": ch.matched, "missing": ch.missing, "extra": ch.extra,
                "width_errors": ch.width_errors, "gap_errors": ch.gap_errors,
                "unmeasurable": ch.unmeasurable, "not_compared": ch.not_compared,
                "widths": stats(ch.widths), "gaps": stats(ch.gaps), "latency": stats(ch.latency),
                "latency_out": ch.latency_out, "least_low": ch.least_low,
                "net_captured": ch.net_captured, "net_model": ch.net_model,
                "dv_captured": ch.dv_captured, "dv_model": ch.dv_model, "dv_program": ch.dv_program,
                "held_model": ch.held_model, "running_max": ch.running_max, "flips": ch.flips,
                "unknown": ch.unknown,
            } for ch in self.channels],
            "discrepancies": [{"kind": d.kind, "channel": d.channel, "line": d.line, "time": d.time,
                               "predicted": d.predicted, "captured": d.captured} for d in self.discrepancies],
            "notes": list(self.notes),
        }


# -- the check ---------------------------------------------------------------------------


def _logical(trace: Trace, inverted: bool, active_low: bool) -> Trace:
    """The line as the emulator means it: 1 while active."""
    return trace.inverted() if inverted != active_low else trace


def _pulses(trace: Trace) -> tuple[np.ndarray, np.ndarray, int]:
    """Rises and falls (NaN while still active at the end) of a logical line.

    Returns the rises, the matching falls and 1 when a pulse is already active at the
    capture's start (its rise is not in the capture).
    """
    rises = trace.edges(1)
    falls = trace.edges(0)
    cut_start = 0
    if trace.initial == 1:
        falls = falls[1:] if falls.size else falls
        cut_start = 1
    out_falls = np.full(rises.shape, np.nan)
    out_falls[: falls.size] = falls[: rises.size]
    return rises, out_falls, cut_start


def _match(pred: np.ndarray, lo: np.ndarray, hi: np.ndarray,
           got: np.ndarray) -> tuple[list[tuple[int, int]], list[int], list[int]]:
    """Pair predicted and captured rises in time order within their windows."""
    pairs: list[tuple[int, int]] = []
    missing: list[int] = []
    extra: list[int] = []
    i = j = 0
    n_p, n_c = len(pred), len(got)
    while i < n_p and j < n_c:
        dev = got[j] - pred[i]
        if dev < lo[i]:
            extra.append(j)
            j += 1
        elif dev > hi[i]:
            missing.append(i)
            i += 1
        else:
            if i + 1 < n_p:
                nxt = got[j] - pred[i + 1]
                if lo[i + 1] <= nxt <= hi[i + 1]:
                    mid, mid_next = (lo[i] + hi[i]) / 2, (lo[i + 1] + hi[i + 1]) / 2
                    if abs(nxt - mid_next) < abs(dev - mid):
                        missing.append(i)  # the captured pulse belongs to the next one
                        i += 1
                        continue
            pairs.append((i, j))
            i += 1
            j += 1
    missing.extend(range(i, n_p))
    extra.extend(range(j, n_c))
    return pairs, missing, extra


@dataclass(frozen=True)
class _NominalBase:
    """The time base without a recovered clock: the config's clock, phased on the strobe's edges.

    ``c(t) = round((t - t0) / T - phi) + 1`` for every time, with ``phi`` the circular
    mean of the strobe edges' phases within a clock period (so a simulated capture,
    whose edges all sit on the clock grid, converts exactly).
    """

    start: float
    clock_hz: float
    phase: float

    @classmethod
    def of(cls, capture: Capture, clock_hz: float, strobe_times: np.ndarray) -> _NominalBase:
        x = (strobe_times - capture.start) * clock_hz
        angle = np.angle(np.mean(np.exp(2j * np.pi * x))) if strobe_times.size else 0.0
        return cls(capture.start, clock_hz, float(angle / (2 * np.pi)) % 1.0)

    def input_cycle(self, t: np.ndarray | float, observed: bool) -> np.ndarray:
        x = (np.asarray(t, dtype=np.float64) - self.start) * self.clock_hz - self.phase
        return np.rint(x).astype(np.int64) + 1


#: How a strobe's take cycle was fixed: by its own captured time (one cycle possible), by the
#: first output edge it caused, by the model's fit (no output edge answered it), at the nearest
#: cycle because the output edge contradicts its time, or by the nominal time base.
FIXED_BY = ("capture", "output", "model", "contradicted", "nominal")


@dataclass
class _Strobes:
    """The strobe pin's active pulses and the cycles they may start in.

    Attributes
    ----------
    t_on, t_off : ndarray
        Capture times of each active and inactive edge (NaN: the capture ends while active).
    lo, hi, nominal : ndarray of int
        Cycles the active edge may fall in, and the one its time gives.
    off : ndarray of int
        Cycle of the inactive edge from its time (-1: none).
    taken : ndarray of int
        From the measured width: 1 the glitch filter surely takes the strobe, 0 surely
        not, -1 undecided (the width in cycles is kept as measured).
    choice : ndarray of int
        The cycle the model is driven with.
    how : list of str
        One of :data:`FIXED_BY` per strobe.
    """

    t_on: np.ndarray
    t_off: np.ndarray
    lo: np.ndarray
    hi: np.ndarray
    nominal: np.ndarray
    off: np.ndarray
    taken: np.ndarray
    choice: np.ndarray
    how: list[str]

    def edges(self, min_width: int) -> list[int]:
        """The strobe pin's edges for the model, strictly increasing, each taken strobe ``min_width`` long."""
        out: list[int] = []
        prev = -1
        for s in range(self.choice.size):
            e = max(int(self.choice[s]), prev + 1)
            out.append(e)
            prev = e
            if self.off[s] >= 0:
                f = int(self.off[s])
                if self.taken[s] == 1:
                    f = max(f, e + min_width)
                elif self.taken[s] == 0:
                    f = min(f, e + min_width - 1)
                else:
                    f = e + f - int(self.nominal[s])
                f = max(f, e + 1)
                out.append(f)
                prev = f
        return out


@dataclass
class _Drive:
    """The model run on the capture's own strobe, arm line and program.

    Attributes
    ----------
    strobe_t, strobe_c : ndarray
        Capture times of the strobe pin's active edges, and the cycles the model takes them at.
    start_cycle, end_cycle : int
        Cycles of the capture's first and last sample.
    grid : ClockGrid or None
        The recovered clock; None when the nominal time base is used.
    strobes : _Strobes
        How each strobe's cycle was fixed.
    moved : int
        Strobes resolved by the model's fit at another cycle than their time's nearest.
    fit_runs : int
        Model runs the fit took.
    """

    strobe_t: np.ndarray
    strobe_c: np.ndarray
    start_cycle: int
    end_cycle: int
    params: HardwareParams
    stim: Stimulus
    result: RunResult
    grid: ClockGrid | None
    strobes: _Strobes
    moved: int = 0
    fit_runs: int = 0


def _strobe_toggles(capture: Capture, config: Config, ref: SignalRef, notes: list[str],
                    lines: dict[str, Trace]) -> np.ndarray:
    """The strobe pin's toggles from inactive, capture seconds."""
    hw = config.hw
    strobe = _logical(capture.traces[ref.name], ref.inverted, not hw.edge_rising)
    lines["strobe"] = strobe
    toggles = strobe.changes
    if strobe.initial == 1:
        toggles = toggles[1:]
        notes.append("the strobe is active at the capture's start; that strobe (cut by the start) is ignored")
    if toggles.size == 0:
        raise UserError(f"{capture.source}: no strobe edges on {strobe.name!r} "
                        f"({'active high' if hw.edge_rising != ref.inverted else 'active low'}, "
                        f"level {strobe.initial} throughout); the model is driven by the capture's strobe, so "
                        "a capture needs at least one; check the map and the strobe's wiring")
    return toggles


def _without_glitches(capture: Capture, config: Config, toggles: np.ndarray, cyc: np.ndarray, bounds: Bounds,
                      notes: list[str], name: str) -> np.ndarray:
    """Which toggles to keep: two in one clock cycle are a glitch the synchronizer may or may not see."""
    keep = np.ones(cyc.size, dtype=bool)
    glitches = 0
    for index in np.flatnonzero(np.diff(cyc) <= 0):
        if keep[index] and keep[index + 1]:
            keep[index] = keep[index + 1] = False
            glitches += 1
    if glitches:
        notes.append(f"{glitches} strobe glitch(es) shorter than one clock cycle ignored")
    if not np.all(np.diff(cyc[keep]) > 0):
        raise UserError(f"{capture.source}: the strobe on {name!r} toggles faster than the emulator's "
                        f"clock ({format_si(config.clock_hz, 'Hz')}) can follow; check the config's clock")
    if not keep.any():
        raise UserError(f"{capture.source}: no strobe edges on {name!r} after removing glitches "
                        "shorter than one clock cycle")
    period = 1.0 / config.clock_hz
    kept = toggles[keep]
    active = kept[1::2] - kept[0::2][: kept[1::2].size]
    near = np.abs(active - config.hw.min_width_cyc * period) <= period + bounds.length(0)
    if np.any(near):
        notes.append(f"{int(near.sum())} strobe(s) last within the sampling bound of the glitch filter's "
                     f"{config.hw.min_width_cyc} cycles: the emulator may take or ignore them either way")
    return keep


def _burst_starts(traces: list[Trace], pulses: list[tuple[np.ndarray, np.ndarray, int]], capture: Capture,
                  grid: ClockGrid, hw: HardwareParams, bounds: Bounds) -> np.ndarray:
    """Pin-edge cycles implied by the channel's captured pulses that start on an idle emitter.

    An idle emitter starts a hand-over's first pulse the cycle after the strobe is taken,
    ``L`` cycles after the pin edge (``docs/timing.md``). A pulse whose low time before it
    is longer than the gap (beyond the sampling bound) surely started on an idle emitter;
    one sent back to back could belong to an earlier hand-over.
    """
    rises = np.concatenate([p[0] for p in pulses])
    falls = np.concatenate([p[1] for p in pulses])
    order = np.argsort(rises, kind="stable")
    rises, falls = rises[order], falls[order]
    # A pulse active at the capture's start ends at its line's first change; before that, nothing is known.
    before = [tr.changes[0] if tr.changes.size else math.inf for tr in traces if tr.initial == 1]
    latest = np.fmax.accumulate(np.concatenate(([max(before, default=capture.start)], falls)))
    prev = latest[:-1]
    gap = hw.gap_cyc * grid.period
    start = (rises - prev) > gap + bounds.length(gap)
    start &= grid.on_grid(rises)
    return np.sort(grid.output_cycle(rises[start]) - hw.latency_cyc)


def _answer(strobes: _Strobes, implied: list[np.ndarray]) -> int:
    """Fix each strobe's cycle from the first output edge it caused, where one did; the contradictions.

    Each channel's burst start within a cycle of the strobe's possible cycles answers it.
    Answers inside the possible cycles fix the strobe (the most common one, when
    channels disagree); answers only outside contradict it, and it stays at its nearest
    cycle. Returns the strobes with a contradicting or disagreeing answer.
    """
    n = strobes.choice.size
    none = np.iinfo(np.int64).min
    answers = np.full((max(len(implied), 1), n), none, dtype=np.int64)
    for ch, cycles in enumerate(implied):
        if cycles.size:
            at = np.searchsorted(cycles, strobes.lo - 1, side="left")
            value = cycles[np.minimum(at, cycles.size - 1)]
            found = (at < cycles.size) & (value <= strobes.hi + 1)
            answers[ch, found] = value[found]
    valid = answers != none
    inside = valid & (answers >= strobes.lo) & (answers <= strobes.hi)
    got, n_inside = valid.sum(axis=0), inside.sum(axis=0)
    low = np.where(inside, answers, np.iinfo(np.int64).max).min(axis=0)
    high = np.where(inside, answers, none).max(axis=0)
    disagree = (n_inside > 0) & (low != high)
    choice = np.where(n_inside > 0, low, strobes.choice)
    for s in np.flatnonzero(disagree):
        values, counts = np.unique(answers[:, s][inside[:, s]], return_counts=True)
        choice[s] = values[np.argmax(counts)]
    strobes.choice[:] = choice
    strobes.taken[n_inside > 0] = 1
    single = strobes.lo == strobes.hi
    strobes.how[:] = np.where(n_inside > 0, np.where(single, "capture", "output"),
                              np.where(got > 0, "contradicted", np.where(single, "capture", "model"))).tolist()
    return int(np.sum((got > 0) & ((n_inside < got) | disagree)))


#: Rounds of the model's fit (each runs the model twice); it stops earlier when nothing is left to
#: try, or after FIT_FRUITLESS rounds in a row that kept no move (a real fault, not the time base).
FIT_ROUNDS = 24
FIT_FRUITLESS = 3


def _fit_strobes(strobes: _Strobes, run: Callable[[np.ndarray], RunResult], captured: np.ndarray,
                 span: tuple[int, int], channels: int) -> tuple[int, int]:
    """Choose, for the strobes no output edge fixed, the possible cycle that makes the model agree.

    Rising edges, as ``cycle * 2 * channels + 2 * channel + line`` codes within ``span``,
    are compared per strobe interval. Where an interval differs, the unresolved strobe
    that starts it (or the one before) is moved to another of its possible cycles; the
    move is kept when it leaves fewer differing intervals around it. Moves far enough
    apart are tried in the same model run.

    Returns
    -------
    (int, int)
        Strobes moved from their nearest cycle, and model runs.
    """
    free = np.array([h == "model" for h in strobes.how])
    runs = 0
    if not free.any():
        return 0, runs
    width = 2 * channels

    def differing(result: RunResult) -> np.ndarray:
        codes = np.array([e.rise * width + 2 * e.channel + e.line for e in result.edges
                          if span[0] <= e.rise <= span[1]], dtype=np.int64)
        values = np.union1d(codes, captured)
        pred = np.bincount(np.searchsorted(values, codes), minlength=values.size)
        got = np.bincount(np.searchsorted(values, captured), minlength=values.size)
        cycles = values[pred != got] // width
        return np.unique(np.searchsorted(strobes.nominal, cycles, side="right") - 1)

    def near(bad: np.ndarray, b: int) -> int:
        return int(np.sum((bad >= b - 1) & (bad <= b + 2)))

    tried: set[tuple[int, int]] = set()
    fruitless = 0
    for _ in range(FIT_ROUNDS):
        if fruitless >= FIT_FRUITLESS:
            break
        bad = differing(run(strobes.choice))
        runs += 1
        picks: list[tuple[int, int, int]] = []
        last = -(1 << 60)
        for b in bad:
            if b < 0 or b - last < 4:
                continue
            for s in (b, b - 1):
                if s < 0 or not free[s]:
                    continue
                alts = sorted((c for c in range(int(strobes.lo[s]), int(strobes.hi[s]) + 1)
                               if c != strobes.choice[s] and (s, c) not in tried),
                              key=lambda c, s=s: abs(c - int(strobes.nominal[s])))
                if alts:
                    tried.add((s, alts[0]))
                    picks.append((int(s), alts[0], int(b)))
                    last = int(b)
                    break
        if not picks:
            break
        trial = strobes.choice.copy()
        for s, c, _b in picks:
            trial[s] = c
        after = differing(run(trial))
        runs += 1
        kept = 0
        for s, c, b in picks:
            if near(after, b) < near(bad, b):
                strobes.choice[s] = c
                kept += 1
        fruitless = 0 if kept else fruitless + 1
    moved = int(np.sum(free & (strobes.choice != strobes.nominal)))
    return moved, runs


def _drive_model(capture: Capture, config: Config, signals: dict[str, SignalRef], bounds: Bounds,
                 program: RateProgram | None, program_start: float | None, notes: list[str],
                 lines: dict[str, Trace], grid: ClockGrid | None,
                 outputs: list[tuple[list[Trace], list[tuple[np.ndarray, np.ndarray, int]]]]) -> _Drive:
    """Convert the strobe, arm line and program to a stimulus and run the reference model.

    With a recovered clock, each strobe's cycle is fixed by its time where only one is
    possible, else by the first output edge it caused, else by the model's fit; without
    one, every time is converted by the nominal time base.
    """
    hw = config.hw
    toggles = _strobe_toggles(capture, config, signals["strobe"], notes, lines)
    base: ClockGrid | _NominalBase = grid if grid is not None else _NominalBase.of(capture, config.clock_hz, toggles)
    cyc = base.input_cycle(toggles, observed=True)
    keep = _without_glitches(capture, config, toggles, cyc, bounds, notes, lines["strobe"].name)
    toggles, cyc = toggles[keep], cyc[keep]
    start_cycle = int(base.input_cycle(capture.start, observed=False))
    end_cycle = int(base.input_cycle(capture.end, observed=False))

    t_on, t_off = toggles[0::2], np.full(toggles[0::2].size, np.nan)
    t_off[: toggles[1::2].size] = toggles[1::2]
    off = np.full(t_on.size, -1, dtype=np.int64)
    off[: toggles[1::2].size] = cyc[1::2]
    nominal = cyc[0::2].copy()
    if grid is None:
        lo = hi = nominal
        taken = np.full(t_on.size, -1, dtype=np.int64)
        how = ["nominal"] * t_on.size
    else:
        lo, hi = grid.input_range(t_on)
        lo, hi = np.maximum(lo, 0), np.maximum(hi, 0)  # the model's cycles start at 0
        nominal = np.clip(nominal, lo, hi)
        spread = bounds.sample_period + 2 * bounds.jitter
        width = t_off - t_on
        m = hw.min_width_cyc * grid.period
        taken = np.where(width - spread >= m + grid.period, 1,
                         np.where(width + spread < m - grid.period, 0, -1)).astype(np.int64)
        how = ["capture"] * t_on.size
    strobes = _Strobes(t_on, t_off, lo, hi, nominal, off, taken, nominal.copy(), how)
    contradicted = 0
    if grid is not None:
        implied = [_burst_starts(traces, pulses, capture, grid, hw, bounds) for traces, pulses in outputs]
        contradicted = _answer(strobes, implied)
        if contradicted:
            notes.append(f"{contradicted} strobe(s) whose first output edge is not where the latency "
                         f"({hw.latency_cyc} cycles) puts it for any cycle the strobe's time allows: compared "
                         "at the nearest cycle")

    arm_ref = signals["arm"]
    arm_time: float | None
    if arm_ref.name in capture.traces:
        arm = _logical(capture.traces[arm_ref.name], arm_ref.inverted, False)
        lines["arm"] = arm
        arm_list: dict[int, bool] = {start_cycle: bool(arm.initial)}
        levels = arm.initial ^ 1 ^ (np.arange(arm.changes.size) & 1)
        for c, level in zip(base.input_cycle(arm.changes, observed=True), levels, strict=True):
            arm_list[int(c)] = bool(level)
        arm_changes = tuple(sorted(arm_list.items()))
        rises = arm.edges(1)
        arm_time = capture.start if arm.initial else (float(rises[0]) if rises.size else None)
        if arm_time is None:
            notes.append(f"the arm line {arm.name!r} never rises: the emulator stays disarmed")
    else:
        arm_changes = ((start_cycle, True),)
        arm_time = capture.start
        notes.append("no arm line in the capture: the model is armed from the capture's first sample "
                     "(trigger the analyzer on arming, or map the arm line, for an exact start)")

    if program is None and program_start is not None:
        raise UserError(f"program start = {format_si(program_start, 's')}: given without a program; "
                        "allowed: only with --program")
    if program_start is not None and not capture.start <= program_start <= capture.end:
        raise UserError(f"program start = {format_si(program_start, 's')}: allowed: a time within the capture "
                        f"({format_si(capture.start, 's')} to {format_si(capture.end, 's')})")
    init = list(hw.rates)
    changes: list[RateChange] = []
    origin_time = program_start if program_start is not None else arm_time
    # The arm line's rise is a captured edge; a given program start is exact.
    observed = program_start is None and arm_ref.name in capture.traces and arm_time != capture.start
    if program is not None and origin_time is None:
        notes.append("the program is not applied: the outputs are never armed")
    elif program is not None and program.segments is not None:
        # Tick 0 is the first armed cycle: the cycle after the arm input rises.
        origin = int(base.input_cycle(origin_time, observed=observed)) + (0 if program_start is not None else 1)
        changes = list(program.segments.rate_changes(max(1, origin), hw.rates))
    elif program is not None:
        for step in program.steps:
            # A step's time counts from the arm line's rise as the capture shows it.
            cycle = int(base.input_cycle(origin_time + step.at, observed=observed))
            fixed = config.rate_to_fixed(step.channel, step.rate)
            if cycle < 1:
                init[step.channel] = fixed
            else:
                changes.append(RateChange(cycle, step.channel, fixed))
    changes.sort(key=lambda c: c.cycle)

    params = replace(hw, init_rates=tuple(init))
    # Run a little past the capture's end, so a pulse captured at the end has its prediction.
    margin = 3 + math.ceil((1.0 / config.clock_hz + 2 * bounds.length(0)) * config.clock_hz)
    if grid is None:
        pin = [int(c) for c in cyc]
    else:
        pin = strobes.edges(hw.min_width_cyc)
    n_cyc = max(end_cycle + margin, pin[-1] + 1)

    def run(choice: np.ndarray) -> RunResult:
        edges = pin if grid is None else replace(strobes, choice=choice).edges(hw.min_width_cyc)
        stim = Stimulus(cycles=max(n_cyc, edges[-1] + 1), strobe_edges=tuple(edges), rate_changes=tuple(changes),
                        arm_changes=arm_changes)
        return run_model(params, stim)

    moved = runs = 0
    if grid is not None:
        width = 2 * hw.n
        first = int(np.min(lo))
        last = int(np.floor((capture.end - grid.window[1] - grid.origin) / grid.period))
        codes = []
        for ch, (_traces, pulses) in enumerate(outputs):
            for ln, (rises, _falls, _cut) in enumerate(pulses):
                c = grid.output_cycle(rises[rises >= t_on[0]])
                codes.append(c * width + 2 * ch + ln)
        captured = np.sort(np.concatenate(codes)) if codes else np.empty(0, dtype=np.int64)
        captured = captured[(captured // width >= first) & (captured // width <= last)]
        moved, runs = _fit_strobes(strobes, run, captured, (first, last), hw.n)
        pin = strobes.edges(hw.min_width_cyc)
        n_cyc = max(n_cyc, pin[-1] + 1)
    stim = Stimulus(cycles=n_cyc, strobe_edges=tuple(pin), rate_changes=tuple(changes), arm_changes=arm_changes)
    # The active edges as the model saw them (an edge pushed past its neighbour went where it was pushed).
    strobe_c = np.array(pin[0::2] if grid is None else [pin[i] for i in _active_indices(strobes)], dtype=np.int64)
    return _Drive(t_on, strobe_c, start_cycle, end_cycle, params, stim, run_model(params, stim), grid, strobes,
                  moved, runs)


def _active_indices(strobes: _Strobes) -> list[int]:
    """Positions of the active edges in :meth:`_Strobes.edges`."""
    out, at = [], 0
    for s in range(strobes.choice.size):
        out.append(at)
        at += 2 if strobes.off[s] >= 0 else 1
    return out


@dataclass
class _Prediction:
    """One channel's predicted pulses, placed in capture time with their windows."""

    rise_c: np.ndarray   # rise cycles, sorted
    line: np.ndarray     # POS or NEG
    rise: np.ndarray     # predicted capture times
    fall: np.ndarray     # NaN when still active at the model's end
    starts: np.ndarray   # True where a burst starts
    anchor: np.ndarray   # index of the strobe whose edge anchors the pulse, -1 for none
    lo: np.ndarray       # match window, captured - predicted
    hi: np.ndarray


def _predict(drive: _Drive, ch: int, bounds: Bounds, start: float) -> _Prediction:
    hw = drive.params
    edges = sorted((e for e in drive.result.edges if e.channel == ch), key=lambda e: e.rise)
    rise_c = np.array([e.rise for e in edges], dtype=np.int64)
    fall_c = np.array([np.nan if e.fall is None else e.fall for e in edges], dtype=np.float64)
    line = np.array([e.line for e in edges], dtype=np.int64)
    # A burst's anchor is the strobe edge L cycles before its first rise; its pulses share it.
    starts = np.ones(rise_c.size, dtype=bool)
    starts[1:] = np.diff(rise_c) != hw.pulse_period_cyc
    burst_anchor = np.searchsorted(drive.strobe_c, rise_c - hw.latency_cyc, side="right") - 1
    anchor = np.maximum.accumulate(np.where(starts, np.arange(rise_c.size), 0)) if rise_c.size else rise_c
    anchor = burst_anchor[anchor] if rise_c.size else anchor
    has = anchor >= 0
    if drive.grid is not None:
        # Every edge on the recovered clock's grid, within the sampling window of its own cycle.
        grid = drive.grid
        rise = grid.edge_time(rise_c)
        fall = grid.edge_time(fall_c)
        lo, hi = np.full(rise.size, grid.window[0]), np.full(rise.size, grid.window[1])
        return _Prediction(rise_c, line, rise, fall, starts, anchor, lo, hi)
    period = 1.0 / hw.clock_hz
    a_t = np.where(has, drive.strobe_t[np.maximum(anchor, 0)], start)
    a_c = np.where(has, drive.strobe_c[np.maximum(anchor, 0)], drive.start_cycle)
    rise = a_t + (rise_c - a_c) * period
    fall = a_t + (fall_c - a_c) * period
    lo, hi = bounds.window(rise - a_t)
    return _Prediction(rise_c, line, rise, fall, starts, anchor, lo, hi)


@dataclass
class _ChannelOutcome:
    check: ChannelCheck
    found: list[Discrepancy]
    predicted: dict[str, np.ndarray]
    widths: list[float]
    latencies: list[float]
    bursts: list[tuple[float, float]]   # (captured, modelled) time from first to last rise of a burst
    counts: np.ndarray                  # (strobes, 2 lines, captured/predicted)


def _captured_outputs(capture: Capture, config: Config, signals: dict[str, SignalRef],
                      lines: dict[str, Trace]) -> list[tuple[list[Trace], list[tuple[np.ndarray, np.ndarray, int]]]]:
    """Each channel's logical lines and their pulses (:func:`_pulses`), in line order."""
    out = []
    for channel in config.channels:
        traces = []
        for line_name in LINE_NAMES:
            ref = signals[f"{channel.name}_{line_name}"]
            trace = _logical(capture.traces[ref.name], ref.inverted, config.hw.active_low)
            lines[f"{channel.name}_{line_name}"] = trace
            traces.append(trace)
        out.append((traces, [_pulses(trace) for trace in traces]))
    return out


def _compare_channel(ch: int, config: Config, capture: Capture, drive: _Drive, bounds: Bounds,
                     expected: dict[str, float],
                     output: tuple[list[Trace], list[tuple[np.ndarray, np.ndarray, int]]]) -> _ChannelOutcome:
    """Match one channel's captured pulses with the model's and measure them (rules 3 to 7)."""
    hw = drive.params
    channel = config.channels[ch]
    period = 1.0 / config.clock_hz
    pred = _predict(drive, ch, bounds, capture.start)
    first_strobe = float(drive.strobe_t[0])
    interval_edges = np.concatenate((drive.strobe_t, [math.inf]))
    counts = np.zeros((drive.strobe_t.size, 2, 2), dtype=np.int64)
    found: list[Discrepancy] = []
    predicted: dict[str, np.ndarray] = {}

    traces, captured = output
    unknown = sum(trace.unknown for trace in traces)

    # Latency: from each strobe that started a burst to the first captured rise on either line.
    all_rises = np.sort(np.concatenate([c[0] for c in captured]))
    latencies: list[float] = []
    latency_out = 0
    for k in np.flatnonzero(pred.starts & (pred.anchor >= 0)):
        s = int(pred.anchor[k])
        t_s = drive.strobe_t[s]
        nxt = np.searchsorted(all_rises, t_s, side="left")
        if nxt < all_rises.size and all_rises[nxt] < interval_edges[s + 1]:
            delay = float(all_rises[nxt] - t_s)
            latencies.append(delay)
            latency_out += not expected["latency_lo"] <= delay <= expected["latency_hi"]

    matched = missing = extra = width_errors = gap_errors = unmeasurable = not_compared = 0
    widths: list[float] = []
    pred_counts = [0, 0]
    got_counts = [0, 0]
    # Every captured pulse of both lines: rise, fall, matched prediction (-1: none), width flagged.
    merged: list[tuple[float, float, int, bool]] = []
    for ln, line_name in enumerate(LINE_NAMES):
        rises, falls, cut = captured[ln]
        not_compared += cut
        sel = np.flatnonzero(pred.line == ln)
        sel = sel[np.argsort(pred.rise[sel], kind="stable")]
        pairs, miss, ext = _match(pred.rise[sel], pred.lo[sel], pred.hi[sel], rises)
        for i in miss:
            k = int(sel[i])
            if pred.rise[k] + pred.hi[k] >= capture.end:
                not_compared += 1
                continue
            missing += 1
            found.append(Discrepancy("missing", channel.name, line_name, float(pred.rise[k]),
                                     float(pred.rise[k]), None))
        for j in ext:
            if rises[j] < first_strobe:
                not_compared += 1
                continue
            extra += 1
            found.append(Discrepancy("extra", channel.name, line_name, float(rises[j]), None, float(rises[j])))
        pair_of = {j: int(sel[i]) for i, j in pairs}
        matched += len(pairs)
        for j in range(rises.size):
            w_c = falls[j] - rises[j]
            flagged = False
            if not math.isnan(w_c):
                if w_c < bounds.measurable:
                    unmeasurable += 1
                else:
                    widths.append(float(w_c))
                    k = pair_of.get(j)
                    if k is not None and not math.isnan(pred.fall[k]):
                        w_p = pred.fall[k] - pred.rise[k]
                        if abs(w_c - w_p) > bounds.length(w_p):
                            width_errors += 1
                            flagged = True
                            found.append(Discrepancy("width", channel.name, line_name, float(rises[j]),
                                                     float(w_p), float(w_c)))
            merged.append((float(rises[j]), float(falls[j]), pair_of.get(j, -1), flagged))
        # Counts over the compared span: captured from the first strobe, predicted up to the end.
        in_time = np.sort(pred.rise[sel][pred.rise[sel] <= capture.end])
        got_counts[ln] = int(np.sum(rises >= first_strobe))
        pred_counts[ln] = int(in_time.size)
        counts[:, ln, 0] = np.diff(np.searchsorted(rises, interval_edges))
        counts[:, ln, 1] = np.diff(np.searchsorted(in_time, interval_edges))
        predicted[f"{channel.name}_{line_name}"] = np.stack((pred.rise[sel], pred.fall[sel]), axis=1)

    # Low times: every pair of consecutive captured pulses; back-to-back ones against the bound.
    merged.sort()
    gaps: list[float] = []
    least_low: float | None = None
    bursts: list[tuple[float, float]] = []
    chain: list[tuple[float, int]] = []  # (captured rise, model rise cycle) of back-to-back pulses
    for (r0, f0, k0, bad0), (r1, _f1, k1, bad1) in zip(merged, merged[1:], strict=False):
        back_to_back = k0 >= 0 and k1 >= 0 and pred.rise_c[k1] - pred.rise_c[k0] == hw.pulse_period_cyc
        if back_to_back:
            chain = chain or [(r0, int(pred.rise_c[k0]))]
            chain.append((r1, int(pred.rise_c[k1])))
        else:
            if len(chain) > 1:
                bursts.append((chain[-1][0] - chain[0][0], (chain[-1][1] - chain[0][1]) * period))
            chain = []
        if math.isnan(f0):
            continue
        low = r1 - f0
        least_low = low if least_low is None else min(least_low, low)
        if not back_to_back:
            continue
        if low < bounds.measurable:
            unmeasurable += 1
            continue
        gaps.append(low)
        g_p = pred.rise[k1] - pred.fall[k0]
        if abs(low - g_p) > bounds.length(g_p) and not (bad0 or bad1):
            gap_errors += 1
            found.append(Discrepancy("gap", channel.name, LINE_NAMES[pred.line[k1]], r1, float(g_p), low))
    if len(chain) > 1:
        bursts.append((chain[-1][0] - chain[0][0], (chain[-1][1] - chain[0][1]) * period))

    # Running net count, captured minus model, at every strobe: a pulse handed over one
    # strobe apart from the model shows as +1 then back to 0.
    per_strobe = counts[:, POS, 0] - counts[:, NEG, 0] - counts[:, POS, 1] + counts[:, NEG, 1]
    running_max = int(np.abs(np.cumsum(per_strobe)).max()) if per_strobe.size else 0
    flips = int(np.sum(per_strobe[:-1] * per_strobe[1:] == -1)) if per_strobe.size > 1 else 0

    net_captured = int(captured[POS][0].size - captured[NEG][0].size)
    in_capture = pred.rise <= capture.end
    net_model = int(np.sum(in_capture & (pred.line == POS)) - np.sum(in_capture & (pred.line == NEG)))
    dv_program, held = _books(drive, ch, pred, in_capture)
    check = ChannelCheck(
        name=channel.name, unit=channel.unit, weight=channel.weight,
        predicted=(pred_counts[POS], pred_counts[NEG]), captured=(got_counts[POS], got_counts[NEG]),
        matched=matched, missing=missing, extra=extra, width_errors=width_errors, gap_errors=gap_errors,
        unmeasurable=unmeasurable, not_compared=not_compared,
        widths=Stats.of(widths), gaps=Stats.of(gaps), latency=Stats.of(latencies), latency_out=latency_out,
        least_low=least_low, net_captured=net_captured, net_model=net_model,
        dv_captured=net_captured * channel.weight, dv_model=net_model * channel.weight,
        dv_program=dv_program * channel.weight, held_model=held, running_max=running_max, flips=flips,
        unknown=unknown,
    )
    return _ChannelOutcome(check, found, predicted, widths, latencies, bursts, counts)


def _books(drive: _Drive, ch: int, pred: _Prediction, in_capture: np.ndarray) -> tuple[float, float]:
    """Pulses the program commanded up to the capture's end, and what the model still holds then."""
    params, stim = drive.params, drive.stim
    one = 1 << params.frac_bits
    upto = min(drive.end_cycle + 1, stim.cycles)
    live = [(a, b) for a, b in armed_intervals(stim) if a < upto]
    if not live:
        return 0.0, 0.0
    # What the computer is owed: the rate over the last armed stretch (disarming clears the books).
    commanded = integral(params, stim, ch, live, upto=min(upto, live[-1][1]))
    # The model's books are at its last cycle, a few past the capture's end: take back what those
    # cycles added, so that captured - program = -held when the capture matches the model.
    books = drive.result.channels[ch]
    tail = integral(params, stim, ch, live, upto=min(stim.cycles, live[-1][1])) - commanded
    after = np.sum(~in_capture & (pred.line == POS)) - np.sum(~in_capture & (pred.line == NEG))
    held = (books.owed - tail) / one + books.pend_pos - books.pend_neg + float(after)
    return commanded / one, held


def _clock_offset(bursts: list[tuple[float, float]]) -> tuple[float | None, float | None]:
    """The emulator's clock against the analyzer's (ppm) and its standard error, from burst lengths."""
    if len(bursts) < 3:
        return None, None
    seen, modelled = np.array(bursts).T
    ppm = float(seen.sum() / modelled.sum() - 1.0) * 1e6
    weights = modelled / modelled.sum()
    error = float(np.sqrt(np.sum(weights ** 2 * ((seen / modelled - 1.0) * 1e6 - ppm) ** 2)))
    return ppm, error


def check_capture(capture_path: str | Path, config: Config, *, program: RateProgram | None = None,
                  capture_map: CaptureMap | None = None, program_start: float | None = None,
                  clock_recovery: bool = True) -> BenchReport:
    """Read a capture and compare it with the reference model (the matching rule above).

    Parameters
    ----------
    capture_path : str or Path
        A VCD or CSV capture of the emulator's pins.
    config : Config
        The emulator's config (clock, strobe, pulse shape, channels).
    program : RateProgram, optional
        Rate changes during the capture; without one, the config's initial rates.
    capture_map : CaptureMap, optional
        Which capture signal is which line, and the capture's settings.
    program_start : float, optional
        Capture time (s) at which the program starts; by default, when the ``arm``
        input rises (the capture's start without an arm line).
    clock_recovery : bool
        Recover the emulator's clock from the output edges and fix each strobe's cycle
        with it (default). False uses the nominal time base, as when the sampling is too
        coarse to recover the clock: an asynchronous strobe's cycle is then known only to
        within one, and the windows are the wider ones of that rule.

    Returns
    -------
    BenchReport

    Raises
    ------
    UserError
        For a bad capture, a line the capture lacks, a capture without strobe edges, or
        a sample rate too slow for the configured pulse width or gap.
    """
    cmap = capture_map or CaptureMap()
    hw = config.hw
    names = [ch.name for ch in config.channels]
    signals = cmap.resolve(names)
    required = [signals[r].name for r in ["strobe"] + [f"{n}_{ln}" for n in names for ln in LINE_NAMES]]
    optional = [signals["arm"].name] if not signals["arm"].mapped else []
    if signals["arm"].mapped:
        required.append(signals["arm"].name)
    capture = read_capture(capture_path, required, optional=optional, kind=cmap.format,
                           sample_rate=cmap.sample_rate, time_column=cmap.time_column)

    period = 1.0 / config.clock_hz
    ts = capture.sample_period
    bounds = Bounds(period, ts, cmap.jitter, DEFAULT_CLOCK_PPM if cmap.clock_ppm is None else cmap.clock_ppm)
    width_s, gap_s = hw.width_cyc * period, hw.gap_cyc * period
    for what, length in (("pulses.width", width_s), ("pulses.gap", gap_s)):
        if length < bounds.measurable:
            raise UserError(
                f"sample rate {format_si(1 / ts, 'Hz')} (period {format_si(ts, 's')}, {capture.sample_period_from}) "
                f"is too slow for {what} = {format_si(length, 's')}: a pulse or gap is measured only when it "
                f"lasts two samples or more; allowed: a sample rate of {format_si(2 / length, 'Hz')} or faster")

    notes: list[str] = []
    lines: dict[str, Trace] = {}
    outputs = _captured_outputs(capture, config, signals, lines)
    grid: ClockGrid | None = None
    failed: NoClock | None = None
    if clock_recovery:
        rises = np.concatenate([p[0] for _traces, pulses in outputs for p in pulses])
        found_clock = recover_clock(rises, period, ts, cmap.jitter, bounds.clock_ppm)
        if isinstance(found_clock, ClockGrid):
            grid = found_clock.renumbered(capture.start)
        else:
            failed = found_clock
            notes.append(f"the emulator's clock was not recovered from the output edges: {failed.reason}; the "
                         "nominal time base is used, which fixes an asynchronous strobe's cycle only to within one")
    else:
        notes.append("clock recovery off: the nominal time base is used, which fixes an asynchronous strobe's "
                     "cycle only to within one")
    drive = _drive_model(capture, config, signals, bounds, program, program_start, notes, lines, grid, outputs)
    latency = hw.latency_cyc * period
    lat_lo, lat_hi = bounds.window(latency)
    expected = {"width": width_s, "gap": gap_s, "latency": latency,
                "latency_lo": latency + lat_lo, "latency_hi": latency + lat_hi}

    outcomes = [_compare_channel(ch, config, capture, drive, bounds, expected, outputs[ch]) for ch in range(hw.n)]
    checks = [o.check for o in outcomes]
    found = [d for o in outcomes for d in o.found]
    strobe_counts = np.stack([o.counts for o in outcomes], axis=1)
    mismatched = int(np.any(strobe_counts[..., 0] != strobe_counts[..., 1], axis=(1, 2)).sum())

    tolerance = bounds.clock_ppm
    if grid is not None and grid.measured:
        hz, ppm, err, source = grid.hz, grid.ppm, grid.ppm_error, f"{grid.edges} output edges"
        if abs(grid.ppm) > tolerance + 3 * grid.ppm_error:
            found.append(Discrepancy("clock", "", "", capture.start, config.clock_hz, grid.hz))
    else:
        # Without a measured period, the spacing of the bursts' pulses still estimates the clock.
        bursts = [b for o in outcomes for b in o.bursts]
        ppm, err = _clock_offset(bursts)
        hz = None if ppm is None else config.clock_hz * (1 + ppm * 1e-6)
        source = f"the spacing of {len(bursts)} bursts" if ppm is not None else ""
        if failed is not None and failed.off_grid:
            found.append(Discrepancy("clock", "", "", capture.start, config.clock_hz, None))
    if grid is not None:
        reason = "" if grid.measured else "the output edges fix its phase only; its period is the config's"
        clock = ClockCheck(True, hz, ppm, err, source, reason, grid.window, grid.offset, grid.outliers)
    else:
        reason = failed.reason if failed is not None else "clock recovery off"
        clock = ClockCheck(False, hz, ppm, err, source, reason, None, None, 0)
    if clock.ppm is not None:
        notes.append("the emulator's clock is measured against the analyzer's: a real difference is a delta-V "
                     "scale error of the same size")
    if grid is not None and grid.outliers:
        notes.append(f"{grid.outliers} output rising edge(s) off the recovered clock's grid (not used to fit it)")
    if grid is not None and grid.alternatives:
        notes.append(f"{grid.alternatives} other clock period(s) fit the output edges as well: the edges' spacing "
                     "is too regular to tell them apart; the one with the least residual is used")
    resolution = _resolution(drive)
    if resolution["model"]:
        notes.append(f"{resolution['model']} strobe(s) could fall in more than one cycle and caused no output edge "
                     f"that fixes it: resolved by the model's fit ({drive.moved} moved from the cycle nearest their "
                     "time); both cycles are possible given the sampling (see docs/bench.md)")
    if grid is None and any(c.flips for c in checks):
        notes.append("a pulse handed over one strobe apart from the model (net count +1 at one strobe, -1 at the "
                     "next) can come from the time base: without the recovered clock a capture fixes an "
                     "asynchronous strobe's clock cycle only to within one cycle (see docs/bench.md); check the "
                     "running count")
    strobe_unknown = lines["strobe"].unknown + (lines["arm"].unknown if "arm" in lines else 0)
    if strobe_unknown:
        notes.append(f"{strobe_unknown} x/z value(s) read on the strobe or arm line (held at the last level)")
    if any(c.not_compared for c in checks):
        notes.append("pulses not compared: before the capture's first strobe, active at its start, or "
                     "predicted so close to its end that their window passes it")
    unmeasurable = sum(c.unmeasurable for c in checks)
    if unmeasurable:
        notes.append(f"{unmeasurable} pulse(s) or gap(s) narrower than two samples "
                     f"({format_si(bounds.measurable, 's')}): flagged unmeasurable, not guessed; sample faster")
    compared = any(c.matched for c in checks)
    found.sort(key=lambda d: (d.time, d.channel, d.line, d.kind))
    if found:
        verdict = "fail"
    elif unmeasurable or strobe_unknown or any(c.unknown for c in checks) or not compared:
        verdict = "inconclusive"
        if not compared:
            notes.append("no pulse was compared: nothing to judge")
    else:
        verdict = "pass"
    return BenchReport(
        capture=capture, config_source=config.source,
        program_source=program.source if program else "none (the config's initial rates)",
        signals=signals, bounds=bounds, expected=expected, channels=tuple(checks), discrepancies=tuple(found),
        strobe_times=drive.strobe_t, strobe_counts=strobe_counts, strobe_mismatches=mismatched, verdict=verdict,
        notes=tuple(notes), model_cycles=drive.stim.cycles, clock_ppm=clock.ppm, clock_ppm_error=clock.ppm_error,
        clock=clock, strobe_cycles=drive.strobe_c, strobe_options=drive.strobes.hi - drive.strobes.lo + 1,
        strobe_fixed_by=tuple(drive.strobes.how), resolution=resolution,
        lines=lines, predicted={k: v for o in outcomes for k, v in o.predicted.items()},
        widths_all=np.asarray([w for o in outcomes for w in o.widths]),
        latency_all=np.asarray([t for o in outcomes for t in o.latencies]),
    )


def _resolution(drive: _Drive) -> dict[str, int]:
    """How many strobes had their cycle fixed each way (:data:`FIXED_BY`), and the other counts."""
    how = drive.strobes.how
    out = {kind: sum(h == kind for h in how) for kind in FIXED_BY}
    out["several"] = int(np.sum(drive.strobes.hi > drive.strobes.lo))
    out["moved"] = drive.moved
    out["fit_runs"] = drive.fit_runs
    return out


# -- the report folder -------------------------------------------------------------------


def write_report(report: BenchReport, out_dir: str | Path) -> list[Path]:
    """Write the report folder: ``report.txt``, ``report.json``, ``discrepancies.csv``,
    ``strobes.csv``, ``timeline.png`` and ``histograms.png``.

    Returns
    -------
    list of Path
        The files written.

    Raises
    ------
    UserError
        If ``out_dir`` exists and is not a folder.
    """
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise UserError(f"{out}: exists and is not a folder; give a folder for the report")
    out.mkdir(parents=True, exist_ok=True)
    written = []

    path = out / "report.txt"
    path.write_text(report.summary())
    written.append(path)

    path = out / "report.json"
    path.write_text(json.dumps(report.to_json(), indent=2, default=_plain) + "\n")
    written.append(path)

    path = out / "discrepancies.csv"
    with path.open("w", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(["kind", "channel", "line", "time_s", "predicted", "captured"])
        for d in report.discrepancies:
            writer.writerow([d.kind, d.channel, d.line, repr(d.time), _cell(d.predicted), _cell(d.captured)])
    written.append(path)

    path = out / "strobes.csv"
    names = [ch.name for ch in report.channels]
    with path.open("w", newline="") as handle:
        writer = csv.writer(handle)
        header = ["strobe", "time_s", "cycle", "cycles_possible", "cycle_fixed_by"]
        for name in names:
            header += [f"{name}_pos", f"{name}_pos_model", f"{name}_neg", f"{name}_neg_model"]
        writer.writerow(header)
        for s, t in enumerate(report.strobe_times):
            row: list[Any] = [s, repr(float(t)), int(report.strobe_cycles[s]), int(report.strobe_options[s]),
                              report.strobe_fixed_by[s]]
            for ch in range(len(names)):
                for ln in (POS, NEG):
                    row += [int(report.strobe_counts[s, ch, ln, 0]), int(report.strobe_counts[s, ch, ln, 1])]
            writer.writerow(row)
    written.append(path)

    written.append(_plot_timeline(report, out / "timeline.png"))
    written.append(_plot_histograms(report, out / "histograms.png"))
    return written


def _plain(value: Any) -> Any:
    if isinstance(value, np.generic):
        return value.item()
    raise TypeError(f"cannot write {type(value).__name__} as JSON")


def _cell(value: float | None) -> str:
    return "" if value is None else repr(float(value))


def _focus(report: BenchReport) -> tuple[float, float, str]:
    """The time window the timeline shows, and why."""
    e = report.expected
    pitch = e["width"] + e["gap"]
    if report.discrepancies:
        times = np.array([d.time for d in report.discrepancies])
        which = np.searchsorted(report.strobe_times, times, side="right") - 1
        counts = np.bincount(which + 1)
        worst = int(np.argmax(counts)) - 1
        centre = float(times[which == worst][0])
        title = f"around the worst discrepancy ({int(counts.max())} in one strobe interval)"
    else:
        totals = report.strobe_counts[..., 0].sum(axis=(1, 2))
        worst = int(np.argmax(totals)) if totals.size else 0
        t_s = float(report.strobe_times[worst])
        busiest = int(report.strobe_counts[worst, :, :, 0].max()) if totals.size else 0
        lo = t_s - 2 * pitch
        hi = t_s + e["latency"] + (min(busiest, 20) * 2 + 2) * pitch
        why = "the busiest strobe interval (no discrepancy)"
        return max(lo, report.capture.start), min(hi, report.capture.end), why
    half = max(12 * pitch, 2 * e["latency"])
    lo, hi = centre - half, centre + half
    if 0 <= worst < report.strobe_times.size and report.strobe_times[worst] >= centre - 3 * half:
        lo = min(lo, float(report.strobe_times[worst]) - 2 * pitch)
    return max(lo, report.capture.start), min(hi, report.capture.end), title


def _steps(trace: Trace, lo: float, hi: float) -> tuple[np.ndarray, np.ndarray]:
    inside = trace.changes[(trace.changes > lo) & (trace.changes < hi)]
    level0 = trace.level_at(lo)
    t = np.concatenate(([lo], np.repeat(inside, 2), [hi]))
    levels = level0 ^ (np.arange(inside.size + 1) & 1)
    return t, np.repeat(levels, 2)


def _plot_timeline(report: BenchReport, path: Path) -> Path:
    from matplotlib.figure import Figure

    lo, hi, why = _focus(report)
    rows = list(report.lines)
    fig = Figure(figsize=(11, 1.2 + 0.55 * len(rows)))
    ax = fig.add_subplot()
    scale = 1e6
    for index, role in enumerate(rows):
        base = (len(rows) - 1 - index) * 1.5
        t, levels = _steps(report.lines[role], lo, hi)
        ax.plot(t * scale, base + levels * 1.0, color="black", linewidth=1.0,
                label="captured" if index == 0 else None)
        spans = report.predicted.get(role)
        if spans is not None and spans.size:
            for rise, fall in spans:
                end = hi if math.isnan(fall) else fall
                if end < lo or rise > hi:
                    continue
                ax.fill_between([max(rise, lo) * scale, min(end, hi) * scale], base, base + 1.0,
                                color="tab:blue", alpha=0.25, linewidth=0,
                                label="model" if not ax.get_legend_handles_labels()[1].count("model") else None)
    for d in report.discrepancies:
        if lo <= d.time <= hi:
            role = f"{d.channel}_{d.line}"
            if role in rows:
                base = (len(rows) - 1 - rows.index(role)) * 1.5
                ax.plot([d.time * scale], [base + 1.2], marker="v", color="tab:red", markersize=8,
                        label="discrepancy" if not ax.get_legend_handles_labels()[1].count("discrepancy") else None)
                ax.annotate(d.kind, (d.time * scale, base + 1.25), color="tab:red", fontsize=7)
    ax.set_yticks([(len(rows) - 1 - i) * 1.5 + 0.5 for i in range(len(rows))], rows)
    ax.set_xlim(lo * scale, hi * scale)
    ax.set_xlabel("capture time (us)")
    ax.set_title(f"{report.verdict.upper()}: {why}", fontsize=10)
    ax.legend(loc="upper right", fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    return path


def _plot_histograms(report: BenchReport, path: Path) -> Path:
    from matplotlib.figure import Figure

    e = report.expected
    fig = Figure(figsize=(11, 4))
    scale = 1e9
    panels = [
        ("pulse width", report.widths_all, e["width"], (e["width"] - report.bounds.length(e["width"]),
                                                          e["width"] + report.bounds.length(e["width"]))),
        ("strobe to first edge", report.latency_all, e["latency"], (e["latency_lo"], e["latency_hi"])),
    ]
    for index, (title, values, want, (b_lo, b_hi)) in enumerate(panels):
        ax = fig.add_subplot(1, 2, index + 1)
        if values.size:
            # The bins span the bound too, so a column of identical values still shows.
            span = (min(b_lo, float(values.min())) * scale, max(b_hi, float(values.max())) * scale)
            ax.hist(values * scale, bins=min(60, max(10, int(np.sqrt(values.size)))), range=span, color="tab:gray",
                    label="captured")
        else:
            ax.text(0.5, 0.5, "none measured", transform=ax.transAxes, ha="center")
        ax.axvline(want * scale, color="tab:blue", label="configured")
        ax.axvspan(b_lo * scale, b_hi * scale, color="tab:blue", alpha=0.12, label="sampling bound")
        ax.set_title(f"{title} (n={values.size})", fontsize=10)
        ax.set_xlabel("ns")
        ax.legend(fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    return path

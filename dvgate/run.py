"""``dvgate run`` as an API: from a motion profile to what the computer reads.

The pipeline: a scenario file or a CSV profile and an emulator config give a
:class:`~dvgate.sim.profile.Profile`; the sensor error model (off by default) alters
it; :func:`~dvgate.sim.program.make_program` turns it into a rate program; a
cycle-accurate engine simulates the emulator on the computer's periodic strobe; the
host model reads the counters once per computation cycle. :func:`run_pipeline`
returns everything in a :class:`RunOutcome`; :mod:`dvgate.report` writes it out.

Memory: with the compiled engine the pipeline takes the **counting path**: the harness
counts the pulses at every counter read and strobe taken
(:func:`~dvgate.sim.compiled.count_compiled`), and a second run keeps the edges of the
timeline's window only (:func:`~dvgate.sim.compiled.window_compiled`), so nothing per
pulse is held and memory grows with the run's length (strobes, reads, rate changes),
not with its pulses. Every other engine (the reference model, Amaranth, Icarus,
Verilator, any callable) takes the **edge path**: it returns every edge and the host
side counts them, which needs memory for every pulse. Both paths give the same counts,
host view, errors, books and timeline.
"""

from __future__ import annotations

import dataclasses
import inspect
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager, nullcontext
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from dvgate.config import Config
from dvgate.errors import UserError
from dvgate.params import HardwareParams
from dvgate.sim.books import conservation_errors
from dvgate.sim.host import (
    HostTiming,
    HostView,
    PulseCounts,
    host_timing,
    host_view,
    pulse_counts,
    read_cycles,
    rise_cycles,
)
from dvgate.sim.model import armed_intervals, run_model, strobe_cycles
from dvgate.sim.profile import Profile, read_csv
from dvgate.sim.program import Program, make_program, program_settings
from dvgate.sim.scenarios import load_scenario
from dvgate.sim.sensor import SensorEffect, apply_sensor, sensor_model
from dvgate.sim.stimulus import periodic_strobe_edges
from dvgate.sim.trace import Cycles, Edge, RunResult, Stimulus

#: A cycle-accurate engine: ``engine(params, stim) -> RunResult`` (as ``run_model``).
Engine = Callable[..., RunResult]
#: Engines ``dvgate run --engine`` knows.
ENGINE_NAMES = ("model", "compiled", "python")


def default_engine() -> tuple[Engine, str]:
    """The fastest engine present for long runs, and a line saying which and why.

    The compiled engine (:func:`dvgate.sim.engines.fastest`) where a C++ compiler is
    found: it runs the gateware itself. Otherwise the reference model, which works
    event by event: a run of a motion profile is billions of cycles but only as many
    events as pulses, strobes and rate changes, so the model is far faster than
    Amaranth's cycle-by-cycle simulator (the other fallback of ``fastest``). Figures for
    the demo: ``docs/performance.md``, section "dvgate run".
    """
    try:
        from dvgate.sim import engines
    except ImportError:
        return run_model, "reference model (event-driven; no compiled engine in this install)"
    name, why = engines.choose()
    if name == "compiled":
        return engines.fastest(), f"compiled gateware ({why})"
    return run_model, "reference model (event-driven; " + why.split(";")[0] + ")"


def engine_by_name(name: str | None) -> tuple[Engine, str]:
    """An engine by its command-line name: ``model``, ``compiled``, ``python``, or None for the default."""
    if name is None:
        return default_engine()
    if name == "model":
        return run_model, "reference model (event-driven)"
    if name not in ENGINE_NAMES:
        raise UserError(f"engine = {name!r}: allowed: {', '.join(ENGINE_NAMES)}")
    from dvgate.sim.engines import get_engine

    return get_engine(name)


def load_profile(source: str | Path, config: Config) -> Profile:
    """A profile from a scenario file (``.toml``) or a CSV file (``.csv``) for the config's channels."""
    path = Path(source)
    suffix = path.suffix.lower()
    if suffix == ".toml":
        return load_scenario(path, config.channels)
    if suffix == ".csv":
        return read_csv(path, config.channels)
    raise UserError(f"{source}: expected a scenario file (.toml) or a CSV profile (.csv)")


@dataclass(frozen=True)
class RunPlan:
    """The stimulus for a program and where the program sits in it.

    Attributes
    ----------
    stimulus : Stimulus
        Strobe edges, rate changes and arming.
    origin : int
        Cycle of program tick 0 (the first armed cycle).
    stop : int
        Last cycle of the run: the program's end plus time for the last strobe's answer.
    strobe_edges : ndarray of int64
        Cycles at which the strobe pin turns active.
    takes : ndarray of int64
        Cycles at which the emulator takes a strobe.
    """

    stimulus: Stimulus
    origin: int
    stop: int
    strobe_edges: np.ndarray
    takes: np.ndarray


def plan_run(program: Program, config: Config, *, read_every: int = 1) -> RunPlan:
    """Place a program in a run: armed from ``origin``, the config's periodic strobe, a tail.

    The rate register port writes a change on the cycles before it takes effect, so the
    program starts a few cycles after reset (one per channel, and one for the commit),
    and the outputs are armed from that cycle on. The strobe's active edges fall every
    strobe period from ``origin`` (the first one period in). After the program every
    rate returns to zero and the run goes on for one strobe period plus the longest
    answer the backlog allows, so the last strobe's pulses are all counted; the end is
    rounded up to a whole number of ``read_every`` cycles from ``origin`` (the host's
    computation cycle), so the last counter read covers a full cycle.
    """
    hw = config.hw
    if hw.datapath == "shared":
        raise UserError("rate.datapath = 'shared' keeps every channel at its config rate, and a program changes "
                        "rates: run programs with rate.datapath = 'per_channel' (the design a [link] build uses)")
    origin = hw.n + 2
    period = config.strobe_period_cyc
    end = origin + program.total_ticks
    tail = period + hw.latency_cyc + hw.backlog * hw.pulse_period_cyc + 1
    # The run ends on a whole number of computation cycles, so the last read is a full one.
    stop = origin + -(-(end + tail - origin) // read_every) * read_every
    edges, takes = _strobes(hw, config, origin + period, stop)
    stim = Stimulus(cycles=stop, strobe_edges=Cycles(edges), rate_changes=program.rate_changes(origin, hw.rates),
                    arm_changes=((origin - 1, True),))
    return RunPlan(stim, origin, stop, edges[0::2].copy(), takes[takes >= origin])


#: Strobes made at a time by :func:`_strobes` (bounds the Python objects alive at once).
_STROBE_CHUNK = 1 << 16


def _strobes(hw: HardwareParams, config: Config, first: int, stop: int) -> tuple[np.ndarray, np.ndarray]:
    """The periodic strobe's pin edges up to ``stop`` (inclusive) and the cycles its strobes are taken, as arrays.

    The same as ``periodic_strobe_edges(stop + 1, ...)`` and :func:`strobe_cycles` on
    them, made a chunk of strobes at a time: each chunk ends where a strobe would start,
    so no strobe is cut by it (its width is below the period), and a long run never has
    millions of Python integers at once.
    """
    period, width = config.strobe_period_cyc, config.strobe_width_cyc
    step = _STROBE_CHUNK * period
    edges, takes = [], []
    for start in range(first, max(first, stop + 1), step):
        part = periodic_strobe_edges(min(start + step, stop + 1), period, width, first=start)
        edges.append(np.array(part, dtype=np.int64))
        takes.append(np.array(strobe_cycles(hw, part, stop), dtype=np.int64))
    if not edges:  # no strobe starts before the end
        edges = [np.array(periodic_strobe_edges(stop + 1, period, width, first=first), dtype=np.int64)]
    return np.concatenate(edges), np.concatenate(takes or [np.zeros(0, np.int64)])


@dataclass(frozen=True)
class RunOutcome:
    """Everything a run computed.

    Attributes
    ----------
    config : Config
        The emulator.
    source : str
        The scenario or CSV file.
    truth : Profile
        The motion as given.
    profile : Profile
        The motion as the sensor reports it (``truth`` when the sensor model is off).
    sensor : SensorEffect
        The sensor model and what it added.
    program : Program
        The rate program.
    plan : RunPlan
        Stimulus and placement.
    result : RunResult
        The engine's status and books at the end, without edges: the edge path drops them
        once counted, the counting path never has them (``timeline`` keeps the ones the
        report shows).
    samples : PulseCounts
        Counts per line at every counter read and every strobe taken.
    host : HostView
        The computer's view.
    error : ndarray, shape (reads, channels)
        Host-read count minus the program's integral up to the last strobe taken before
        each read, in pulses (what the quantization and the strobe timing leave).
    commanded : ndarray, shape (reads, channels)
        The program's integral at each read, SI (m/s or rad).
    true_velocity : ndarray, shape (reads, channels)
        The profile's integral at each read before the sensor model, SI.
    timeline : Timeline
        Edges around one strobe, for the timeline plot.
    engine : str
        Which engine ran, why, and which path (counting or edges) the pipeline took.
    seconds : float
        Wall-clock time of the simulation (on the counting path, both runs).
    books : tuple of str
        Conservation problems (empty when the books balance).
    """

    config: Config
    source: str
    truth: Profile
    profile: Profile
    sensor: SensorEffect
    program: Program
    plan: RunPlan
    result: RunResult
    samples: PulseCounts
    host: HostView
    error: np.ndarray
    commanded: np.ndarray
    true_velocity: np.ndarray
    timeline: Timeline
    engine: str
    seconds: float
    books: tuple[str, ...]


@dataclass(frozen=True)
class Timeline:
    """The strobe and every pulse edge in a window around one strobe.

    Attributes
    ----------
    strobe : int
        Cycle at which the strobe pin turned active.
    take : int
        Cycle at which the emulator took it.
    start, stop : int
        Window shown, in cycles.
    edges : tuple of Edge
        Pulses that overlap the window.
    strobe_width : int
        Cycles the strobe pin stays active.
    """

    strobe: int
    take: int
    start: int
    stop: int
    edges: tuple[Edge, ...]
    strobe_width: int


def _timeline_window(plan: RunPlan, samples: PulseCounts, config: Config) -> Timeline:
    """The strobe whose answer has the most pulses (the busiest) and the window around it, without edges."""
    hw = config.hw
    takes = plan.takes
    width = config.strobe_width_cyc
    if len(takes) == 0:
        return Timeline(plan.origin, plan.origin, plan.origin, plan.origin + 1, (), width)
    # Pulses (both lines) each channel sent between one take and the next.
    at = samples.at(takes).counts.sum(axis=2)
    answer = np.diff(np.vstack((at, samples.counts[-1].sum(axis=1))), axis=0).max(axis=1)
    pick = int(np.argmax(answer))
    take = int(takes[pick])
    edge = take - hw.min_width_cyc - 1
    longest = max(int(answer[pick]), 1) * hw.pulse_period_cyc
    start = max(0, edge - max(4, longest // 8))
    stop = take + hw.latency_cyc + longest + max(4, longest // 8)
    return Timeline(edge, take, start, stop, (), width)


def _in_window(edges: tuple[Edge, ...], start: int, stop: int) -> tuple[Edge, ...]:
    """The pulses that overlap cycles ``start .. stop - 1``."""
    return tuple(e for e in edges if e.rise < stop and (e.fall is None or e.fall > start))


def _draws_progress(engine: Engine) -> bool:
    """True for an engine that takes a ``progress`` argument (and draws its own bar)."""
    try:
        return "progress" in inspect.signature(engine).parameters
    except (TypeError, ValueError):
        return False


def _call_engine(engine: Engine, params: HardwareParams, stim: Stimulus, show: bool) -> RunResult:
    """Run the engine; one that draws its own progress bar is asked to when ``show``."""
    if _draws_progress(engine):
        return engine(params, stim, progress=show)
    return engine(params, stim)


def _counts_in_harness(engine: Engine) -> bool:
    """True for the compiled engine, whose harness counts pulses and keeps edges in a window only."""
    try:
        from dvgate.sim.compiled import run_compiled
    except ImportError:
        return False
    return engine is run_compiled


def _sample_cycles(plan: RunPlan, timing: HostTiming) -> np.ndarray:
    """Where the host side needs counts: every counter read and every strobe taken."""
    reads = read_cycles(timing, plan.origin, plan.stop)
    return np.unique(np.concatenate((reads, plan.takes[plan.takes <= plan.stop])))


class _Stages:
    """A progress display over the pipeline's stages (silent when off)."""

    def __init__(self, show: bool, total: int) -> None:
        self.show = show
        self.total = total
        self.progress: Any = None
        self.task: Any = None

    @contextmanager
    def running(self) -> Iterator[_Stages]:
        if not self.show:
            yield self
            return
        from rich.progress import BarColumn, Progress, SpinnerColumn, TextColumn, TimeElapsedColumn

        with Progress(SpinnerColumn(), TextColumn("{task.description}"), BarColumn(),
                      TextColumn("{task.completed}/{task.total}"), TimeElapsedColumn(), transient=True) as bar:
            self.progress = bar
            self.task = bar.add_task("dvgate run", total=self.total)
            yield self

    def step(self, what: str) -> None:
        if self.progress is not None:
            self.progress.update(self.task, description=what)

    def done(self) -> None:
        if self.progress is not None:
            self.progress.advance(self.task)

    @contextmanager
    def paused(self) -> Iterator[None]:
        """Hide the display while an engine draws its own bar."""
        if self.progress is None:
            yield
            return
        self.progress.stop()
        try:
            yield
        finally:
            self.progress.start()


def run_pipeline(source: str | Path, config: Config, *, engine: Engine | None = None, engine_name: str | None = None,
                 progress: bool = False) -> RunOutcome:
    """Profile, program, simulation, host view: the whole run.

    Parameters
    ----------
    source : str or Path
        A scenario file (``.toml``) or a CSV profile (``.csv``).
    config : Config
        The emulator, with its ``[host]``, ``[sensor]`` and ``[program]`` sections.
    engine : callable, optional
        ``engine(params, stim) -> RunResult``; :func:`default_engine` when not given.
        The compiled engine (:func:`dvgate.sim.compiled.run_compiled`) takes the counting
        path: its harness counts the pulses at the reads and strobes, and a second run
        up to the timeline's window keeps that window's edges only, so memory does not
        grow with the number of pulses. Any other engine (the reference model, Amaranth,
        Icarus, Verilator) takes the edge path: every edge is returned and counted here.
    engine_name : str, optional
        How the report names the engine; the path taken is added to it.
    progress : bool
        Show a progress display on the terminal.

    Raises
    ------
    UserError
        Any bad input: the file, the config sections, a value beyond full scale, a
        computation cycle shorter than the strobe period.
    """
    if engine is None:
        engine, default_name = default_engine()
        engine_name = engine_name or default_name
    engine_name = engine_name or getattr(engine, "__name__", "engine")
    counting = _counts_in_harness(engine)
    engine_name += ("; counting path: pulses counted in the harness, edges kept only around the busiest strobe"
                    if counting else "; edge path: every pulse edge held in memory")
    stages = _Stages(progress, 6 if counting else 5)
    # Check every setting before any long work.
    timing = host_timing(config)
    sensor = sensor_model(config)
    settings = program_settings(config)
    with stages.running():
        stages.step("reading the profile")
        truth = load_profile(source, config)
        stages.done()
        stages.step("sensor model")
        profile, effect = apply_sensor(truth, sensor)
        stages.done()
        stages.step("rate program")
        program = make_program(profile, config, settings)
        plan = plan_run(program, config, read_every=timing.cycle_cyc)
        stages.done()
        stages.step(f"simulating {plan.stop:,} cycles")
        if counting:
            outcome = _counting_path(source, config, truth, profile, effect, program, plan, timing, engine_name,
                                     stages, progress)
        else:
            began = time.perf_counter()
            pausing = stages.paused() if _draws_progress(engine) else nullcontext()
            with pausing:
                result = _call_engine(engine, config.hw, plan.stimulus, progress)
            seconds = time.perf_counter() - began
            stages.done()
            stages.step("host view")
            samples = pulse_counts(rise_cycles(result, config.hw.n), _sample_cycles(plan, timing), config.hw.n)
            books = tuple(conservation_errors(config.hw, plan.stimulus, result))
            timeline = _timeline_window(plan, samples, config)
            timeline = dataclasses.replace(timeline, edges=_in_window(result.edges, timeline.start, timeline.stop))
            # The edges have served (counts, books, timeline); a long run's edges are large.
            light = RunResult(result.cycles, (), result.status, result.channels)
            outcome = _host_side(source, config, truth, profile, effect, program, plan, light, samples, books,
                                 timeline, timing, engine_name, seconds)
        stages.done()
    return outcome


def _counting_path(source: str | Path, config: Config, truth: Profile, profile: Profile, effect: SensorEffect,
                   program: Program, plan: RunPlan, timing: HostTiming, engine_name: str, stages: _Stages,
                   progress: bool) -> RunOutcome:
    """The compiled engine's run without edges: counts at the samples, then the timeline's window alone.

    The window is the busiest strobe's, found from the counts, so it is known only after
    the first run; the second run goes over the stimulus up to the window's end and keeps
    only the pulses that overlap it. (Choosing the window before the run would need the
    counts the run produces; keeping candidate windows during one run would repeat the
    choice of :func:`_timeline_window` in the harness.)
    """
    from dvgate.sim.compiled import count_compiled, window_compiled

    hw, stim = config.hw, plan.stimulus
    sample_at = _sample_cycles(plan, timing)
    # The books count the pulses since the last arming: the count at the arming cycle is
    # subtracted from the totals (the edge path keeps the edges that rise after it).
    armed = armed_intervals(stim)
    begin = armed[-1][0] if armed else 0
    at_begin = 1 <= begin <= stim.cycles  # else nothing can have risen by then
    asked = np.union1d(sample_at, np.array([begin], dtype=np.int64)) if at_begin else sample_at
    began = time.perf_counter()
    with stages.paused():
        counted = count_compiled(hw, stim, asked, progress=progress)
    seconds = time.perf_counter() - began
    stages.done()
    keep = np.isin(counted.sample_cycles, sample_at)
    since = np.array(counted.counts, dtype=np.int64)
    if at_begin:
        since = since - counted.sample_counts[np.searchsorted(counted.sample_cycles, begin)]
    result = counted.result
    # Only the kept samples stay (a long run's counts are tens of megabytes; no second copy).
    samples = (PulseCounts(counted.sample_cycles, counted.sample_counts) if keep.all()
               else PulseCounts(counted.sample_cycles[keep], counted.sample_counts[keep]))
    del counted, keep
    books = tuple(conservation_errors(hw, stim, result, counts=[(int(p), int(q)) for p, q in since]))
    timeline = _timeline_window(plan, samples, config)
    if len(plan.takes):
        stages.step(f"timeline: simulating up to cycle {timeline.stop:,}")
        began = time.perf_counter()
        with stages.paused():
            edges = window_compiled(hw, stim, timeline.start, timeline.stop, progress=progress)
        seconds += time.perf_counter() - began
        timeline = dataclasses.replace(timeline, edges=edges)
    stages.done()
    stages.step("host view")
    return _host_side(source, config, truth, profile, effect, program, plan, result, samples, books,
                      timeline, timing, engine_name, seconds)


def _host_side(source: str | Path, config: Config, truth: Profile, profile: Profile, effect: SensorEffect,
               program: Program, plan: RunPlan, result: RunResult, samples: PulseCounts, books: tuple[str, ...],
               timeline: Timeline, timing: HostTiming, engine_name: str, seconds: float) -> RunOutcome:
    """The host's view and the errors, from the counts at the sample cycles (either path)."""
    reads = read_cycles(timing, plan.origin, plan.stop)
    view = host_view(samples, config, timing, start=plan.origin, stop=plan.stop)
    # The reference for each read: the program's integral up to the last strobe taken
    # before it (what the emulator could have reported by then).
    index = np.searchsorted(plan.takes, reads, side="left") - 1
    ref_cycle = np.where(index >= 0, plan.takes[np.maximum(index, 0)], plan.origin)
    reference = program.pulses(ref_cycle - plan.origin)
    error = view.counts - reference
    ticks = np.minimum(reads - plan.origin, program.total_ticks)
    commanded = program.velocity(ticks)
    times = truth.start + ticks / config.clock_hz
    true_velocity = truth.integral(np.minimum(times, truth.stop))
    return RunOutcome(config, str(source), truth, profile, effect, program, plan, result, samples, view, error,
                      commanded, true_velocity, timeline, engine_name, seconds, books)


__all__ = ["Engine", "RunOutcome", "RunPlan", "Timeline", "default_engine", "engine_by_name", "load_profile",
           "plan_run", "run_pipeline"]

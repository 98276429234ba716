"""``dvgate sim`` as an API: run an engine and the model on the config's strobe, compare.

The run drives the config's periodic strobe at the configured rates, runs the chosen
cycle-accurate engine and the reference model on the same stimulus, and summarises
each channel: pulses per line, net count, delta-V emitted against delta-V commanded.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from dvgate.config import Config
from dvgate.sim.books import conservation_errors
from dvgate.sim.model import armed_intervals, run_model
from dvgate.sim.stimulus import integral, stimulus_for
from dvgate.sim.trace import RunResult, Stimulus

Engine = Callable[..., RunResult]


@dataclass(frozen=True)
class ChannelSummary:
    """One channel's outcome of a run.

    Attributes
    ----------
    pos, neg : int
        Pulses on each line.
    dv_emitted : float
        Net pulses times the pulse weight (m/s or rad).
    dv_commanded : float
        The integral of the commanded rate over the run, in the same unit.
    """

    name: str
    unit: str
    pos: int
    neg: int
    dv_emitted: float
    dv_commanded: float

    @property
    def net(self) -> int:
        return self.pos - self.neg


@dataclass(frozen=True)
class SimReport:
    """What ``dvgate sim`` prints.

    Attributes
    ----------
    agree : bool
        The engine's result equals the model's, edge for edge, and the books balance.
    differences : tuple of str
        What differs, when they do not agree.
    """

    engine: str
    cycles: int
    seconds: float
    channels: tuple[ChannelSummary, ...]
    engine_result: RunResult
    model_result: RunResult
    agree: bool
    differences: tuple[str, ...]


def compare_results(a: RunResult, b: RunResult, names: tuple[str, ...], *, limit: int = 8) -> list[str]:
    """Readable differences between two results (empty when equal)."""
    out: list[str] = []
    if a.status != b.status:
        for field in a.status.__dataclass_fields__:
            va, vb = getattr(a.status, field), getattr(b.status, field)
            if va != vb:
                out.append(f"status {field}: {va} against {vb}")
    for ch, (x, y) in enumerate(zip(a.channels, b.channels, strict=True)):
        # The shared datapath keeps no owed register and no pending counts in its
        # emitters (None): its books are in block RAM, and its pulses say what they did.
        if None in (x.owed, x.pend_pos, y.owed, y.pend_pos):
            continue
        if x != y:
            out.append(f"channel {names[ch]!r} books: {x} against {y}")
    if a.edges != b.edges:
        sa, sb = set(a.edges), set(b.edges)
        only_a = sorted(sa - sb, key=lambda e: e.rise)
        only_b = sorted(sb - sa, key=lambda e: e.rise)
        out.append(f"edges: {len(a.edges)} against {len(b.edges)}; {len(only_a)} only in the first, "
                   f"{len(only_b)} only in the second")
        for edge in (only_a[:limit // 2] + only_b[:limit // 2]):
            where = "first" if edge in sa else "second"
            out.append(f"  only in the {where}: channel {names[edge.channel]!r} "
                       f"{'pos' if edge.line == 0 else 'neg'} rise {edge.rise} fall {edge.fall}")
    return out


def summarise(config: Config, stim: Stimulus, result: RunResult) -> tuple[ChannelSummary, ...]:
    """Per-channel counts and delta-V of a result."""
    hw = config.hw
    armed = armed_intervals(stim)
    out = []
    for ch, channel in enumerate(config.channels):
        pos, neg = result.counts(ch)
        commanded = integral(hw, stim, ch, armed) / (1 << hw.frac_bits) * channel.weight
        out.append(ChannelSummary(channel.name, channel.unit, pos, neg, (pos - neg) * channel.weight, commanded))
    return tuple(out)


def simulate_config(config: Config, seconds: float, *, engine: Engine | None = None, engine_name: str = "",
                    vcd_path: str | Path | None = None) -> SimReport:
    """Run ``engine`` (default: :func:`dvgate.sim.engines.get_engine`'s choice) and the model
    for ``seconds`` of the config's periodic strobe."""
    stim = stimulus_for(config, seconds)
    if engine is None:
        from dvgate.sim.engines import get_engine

        engine, engine_name = get_engine(None, config.hw.datapath)
    run = engine
    kwargs = {"vcd_path": vcd_path} if vcd_path is not None else {}
    got = run(config.hw, stim, **kwargs)
    want = run_model(config.hw, stim)
    differences = compare_results(got, want, config.hw.names)
    differences += [f"{engine_name}: {p}" for p in conservation_errors(config.hw, stim, got)]
    differences += [f"model: {p}" for p in conservation_errors(config.hw, stim, want)]
    return SimReport(
        engine=engine_name, cycles=stim.cycles, seconds=stim.cycles / config.clock_hz,
        channels=summarise(config, stim, got), engine_result=got, model_result=want,
        agree=not differences, differences=tuple(differences),
    )

"""Stimulus builders: the computer's strobe, and rate programs in the model's terms."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from dvgate.sim.trace import RateChange, RateChanges, Stimulus

if TYPE_CHECKING:
    from dvgate.config import Config
    from dvgate.params import HardwareParams


def periodic_strobe_edges(cycles: int, period_cyc: int, width_cyc: int, *, first: int = 0) -> tuple[int, ...]:
    """Pin edges of a strobe of ``width_cyc`` cycles every ``period_cyc``, from ``first``.

    Only strobes that start before ``cycles`` are listed; one cut by the end of the run
    keeps its rising edge alone.
    """
    if not 1 <= width_cyc < period_cyc:
        raise ValueError(f"strobe width must be 1 to {period_cyc - 1} cycles, not {width_cyc}")
    edges: list[int] = []
    for start in range(first, cycles, period_cyc):
        edges.append(start)
        if start + width_cyc < cycles:
            edges.append(start + width_cyc)
    return tuple(edges)


def integral(params: HardwareParams, stim: Stimulus, channel: int, armed: list[tuple[int, int]],
             upto: int | None = None) -> int:
    """Sum of the channel's rate over armed cycles since the last arming, below ``upto``.

    This is the right-hand side of the conservation law in ``docs/timing.md``; it is
    computed from the stimulus alone, independently of any engine.
    """
    upto = stim.cycles if upto is None else upto
    # An arming at ``upto`` itself is the last one: nothing is integrated since.
    starts = [a for a, _ in armed if a <= upto]
    if not starts:
        return 0
    return sum(rate * (last - first) for first, last, rate in rate_pieces(params, stim, channel, starts[-1], upto))


def rate_pieces(params: HardwareParams, stim: Stimulus, channel: int, start: int,
                stop: int) -> list[tuple[int, int, int]]:
    """The channel's rate over the cycles ``[start, stop)`` as ``(first, stop, rate)`` pieces."""
    rates = stim.rate_changes
    if isinstance(rates, RateChanges):
        # The array form: only the changes in force somewhere in the span become records.
        mine = rates.channel == channel
        cycles, values = rates.cycle[mine], rates.rate[mine]
        lo = max(int(np.searchsorted(cycles, start, side="right")) - 1, 0)
        hi = int(np.searchsorted(cycles, stop, side="left"))
        later = list(zip(cycles[lo:hi].tolist(), values[lo:hi].tolist(), strict=True))
    else:
        later = [(c.cycle, c.rate) for c in rates if c.channel == channel and c.cycle < stop]
    changes = [(0, params.rates[channel])] + later
    out = []
    for index, (cycle, rate) in enumerate(changes):
        end = changes[index + 1][0] if index + 1 < len(changes) else stop
        first, last = max(cycle, start), min(end, stop)
        if last > first:
            out.append((first, last, rate))
    return out


def stimulus_for(config: Config, seconds: float, *, first_strobe: int | None = None) -> Stimulus:
    """The run ``dvgate sim`` makes: the config's periodic strobe at its initial rates.

    Armed from cycle 0 (from ``arm_lead``, the earliest the shared datapath can follow);
    the first strobe comes one strobe period in, so the first hand-over has a period's
    worth of rate owed.
    """
    cycles = max(1, round(seconds * config.clock_hz))
    period = config.strobe_period_cyc
    first = period if first_strobe is None else first_strobe
    edges = periodic_strobe_edges(cycles, period, config.strobe_width_cyc, first=first)
    return Stimulus(cycles=cycles, strobe_edges=edges, arm_changes=((config.hw.arm_lead, True),))


def rate_changes(changes: list[tuple[int, int, int]]) -> tuple[RateChange, ...]:
    """``(cycle, channel, rate)`` triples as sorted :class:`RateChange` records."""
    return tuple(RateChange(c, ch, r) for c, ch, r in sorted(changes))

"""The conservation law, checked on any engine's result.

``2**F * (net pulses started + net pulses pending) + owed == sum of rate over armed
cycles since the last arming``, per channel (``docs/timing.md``). The right-hand side
comes from the stimulus alone (:func:`dvgate.sim.stimulus.integral`).
"""

from __future__ import annotations

from dvgate.params import HardwareParams
from dvgate.sim.model import armed_intervals
from dvgate.sim.stimulus import integral
from dvgate.sim.trace import POS, RunResult, Stimulus


def conservation_errors(params: HardwareParams, stim: Stimulus, result: RunResult,
                        counts: list[tuple[int, int]] | None = None) -> list[str]:
    """One line per channel whose books do not balance; empty when all do.

    Parameters
    ----------
    counts : list of (int, int), optional
        Pulses per line since the last arming, for results that carry no edges.
    """
    if result.status.saturated:
        return []  # saturation is flagged and counted; the law holds only without it
    if any(change.faults.on_outputs for change in stim.fault_changes):
        # Silence, stuck, swap and storm act between the emitter and the pins, so the pins
        # differ from the books by design; the law still holds for the books themselves.
        return []
    armed = armed_intervals(stim)
    if not armed or armed[-1][1] <= stim.cycles:
        return []  # disarmed at the end: the books were cleared with the outputs
    begin = armed[-1][0]
    problems = []
    for ch, books in enumerate(result.channels):
        if counts is None:
            net = sum(1 if e.line == POS else -1 for e in result.edges if e.channel == ch and e.rise > begin)
        else:
            net = counts[ch][0] - counts[ch][1]
        pending = books.pend_pos - books.pend_neg
        left = (net + pending) * (1 << params.frac_bits) + books.owed
        right = integral(params, stim, ch, armed)
        if left != right:
            problems.append(f"channel {params.names[ch]!r}: emitted {net} + pending {pending} pulses and owed "
                            f"{books.owed} (fixed point) make {left}, but the rate integrates to {right}")
    return problems

"""The conservation law, checked on any engine's result.

``2**F * (net pulses started + net pulses pending) + owed == sum of rate over armed
cycles since the last arming``, per channel (``docs/timing.md``). The right-hand side
comes from the stimulus alone (:func:`dvgate.sim.stimulus.integral`).

The law holds only while no owed amount saturates. The status reports a saturation at
the next taken strobe, so one after the run's last taken strobe is not in it; the check
finds those from the stimulus and the books (:func:`unreported_saturation`).
"""

from __future__ import annotations

from dvgate.params import HardwareParams
from dvgate.sim.model import accumulate, armed_intervals, strobe_fates
from dvgate.sim.stimulus import integral, rate_pieces
from dvgate.sim.trace import POS, RunResult, Stimulus


def conservation_errors(params: HardwareParams, stim: Stimulus, result: RunResult,
                        counts: list[tuple[int, int]] | None = None) -> list[str]:
    """One line per channel whose books do not balance; empty when all do.

    The check is skipped (empty) when an owed amount saturated: when the status says so,
    or when :func:`unreported_saturation` finds one after the last taken strobe.

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
        if books.owed is None or books.pend_pos is None:
            continue  # the shared datapath keeps its books in block RAM, not in registers
        net = _net(result, counts, ch, begin)
        pending = books.pend_pos - books.pend_neg
        left = (net + pending) * (1 << params.frac_bits) + books.owed
        right = integral(params, stim, ch, armed)
        if left != right:
            problems.append(f"channel {params.names[ch]!r}: emitted {net} + pending {pending} pulses and owed "
                            f"{books.owed} (fixed point) make {left}, but the rate integrates to {right}")
    if problems and unreported_saturation(params, stim, result, counts):
        return []  # a saturation after the last taken strobe: not in the status, but it happened
    return problems


def unreported_saturation(params: HardwareParams, stim: Stimulus, result: RunResult,
                          counts: list[tuple[int, int]] | None = None) -> bool:
    """Whether an owed amount saturated, since the last arming, after the last taken strobe.

    A saturation is reported at the next taken strobe (``docs/timing.md``, "Status"), so
    the updates at the last taken strobe ``t`` and after it are not in the status. From
    ``t`` to the end no other hand-over happens, so the net pulses handed over since the
    arming (started plus pending, ``P``) are those at ``N``, and while nothing saturates
    the owed amount at every cycle ``j`` in ``t + 1 .. N`` is ``integral(j) - 2**F * P``.
    The first saturating update is the first such value past a limit; it is looked for
    piece by piece of constant rate with the model's :func:`~dvgate.sim.model.accumulate`.
    Without a taken strobe since the arming, ``t`` is the arming cycle.

    Exact for a result whose status reports no saturation and whose books are right: then
    no update before ``t`` saturated (the take at ``t`` would have reported it), so the law
    held at ``t``. False when the run ends disarmed (the books are cleared).

    Parameters
    ----------
    params : HardwareParams
        The emulator.
    stim : Stimulus
        The run's stimulus.
    result : RunResult
        Any engine's result: its books at ``N`` and, unless ``counts`` is given, its edges.
    counts : list of (int, int), optional
        Pulses per line since the last arming, for results that carry no edges.

    Returns
    -------
    bool
        True when some channel's owed amount saturated in an update at a cycle in ``[t, N)``.
    """
    armed = armed_intervals(stim)
    n_cyc = stim.cycles
    if not armed or armed[-1][1] <= n_cyc:
        return False
    begin = armed[-1][0]
    _, _, takes = strobe_fates(params, stim)
    start = max(takes[-1], begin) if takes else begin
    if start >= n_cyc:
        return False  # armed at N itself: no update since
    lo, hi = params.owed_min, params.owed_max
    one = 1 << params.frac_bits
    for ch, books in enumerate(result.channels):
        handed = _net(result, counts, ch, begin) + books.pend_pos - books.pend_neg
        # The owed amount after the update at ``start`` (the hand-over at ``start`` included).
        value = integral(params, stim, ch, armed, upto=start + 1) - handed * one
        if not lo <= value <= hi:
            return True
        for first, stop, rate in rate_pieces(params, stim, ch, start + 1, n_cyc):
            value, safe = accumulate(value, rate, stop - first, lo, hi)
            if safe < stop - first:
                return True
    return False


def _net(result: RunResult, counts: list[tuple[int, int]] | None, ch: int, begin: int) -> int:
    """Net pulses channel ``ch`` started since the arming at ``begin``."""
    if counts is None:
        return sum(1 if e.line == POS else -1 for e in result.edges if e.channel == ch and e.rise > begin)
    return counts[ch][0] - counts[ch][1]

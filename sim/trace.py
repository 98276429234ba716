"""Plain data shared by the reference model and every simulation engine.

A :class:`Stimulus` goes in; a :class:`RunResult` comes out. The model and each engine
return the same structure, so tests compare them with ``==``. Rules: ``docs/timing.md``.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from itertools import pairwise

POS, NEG = 0, 1
LINE_NAMES = ("pos", "neg")


@dataclass(frozen=True, order=True)
class Edge:
    """One pulse on one line: active from ``rise`` until ``fall`` (exclusive).

    Attributes
    ----------
    channel : int
        Channel index, in port order.
    line : int
        ``POS`` (0) or ``NEG`` (1).
    rise : int
        First cycle the line is active.
    fall : int or None
        First cycle it is idle again; None when it is still active at the end of the run.
    """

    channel: int
    line: int
    rise: int
    fall: int | None


@dataclass(frozen=True)
class RateChange:
    """The rate register of ``channel`` holds ``rate`` (fixed point) from ``cycle`` on."""

    cycle: int
    channel: int
    rate: int


@dataclass(frozen=True)
class Stimulus:
    """Everything driven into the emulator during a run.

    Attributes
    ----------
    cycles : int
        Run length N: inputs for cycles 0..N-1, outputs observed for 1..N.
    strobe_edges : tuple of int
        Cycles at which the strobe pin toggles (inactive at reset), strictly increasing.
    rate_changes : tuple of RateChange
        Sorted by cycle; each at cycle 1 or later.
    arm_changes : tuple of (int, bool)
        ``arm`` input level from that cycle on; the input is low at reset.
    """

    cycles: int
    strobe_edges: tuple[int, ...] = ()
    rate_changes: tuple[RateChange, ...] = ()
    arm_changes: tuple[tuple[int, bool], ...] = ((0, True),)

    def __post_init__(self) -> None:
        if self.cycles < 1:
            raise ValueError(f"cycles must be at least 1, not {self.cycles}")
        edges = self.strobe_edges
        if any(b <= a for a, b in pairwise(edges)):
            raise ValueError("strobe_edges must be strictly increasing")
        if edges and edges[0] < 0:
            raise ValueError(f"strobe edge at cycle {edges[0]}: cycles start at 0")
        cyc = [c.cycle for c in self.rate_changes]
        if cyc != sorted(cyc):
            raise ValueError("rate_changes must be sorted by cycle")
        if cyc and cyc[0] < 1:
            raise ValueError(f"rate change at cycle {cyc[0]}: changes start at cycle 1")
        arm = [c for c, _ in self.arm_changes]
        if arm and arm[0] < 0:
            raise ValueError(f"arm change at cycle {arm[0]}: cycles start at 0")
        if any(b <= a for a, b in pairwise(arm)):
            raise ValueError("arm_changes must be strictly increasing in cycle")


@dataclass(frozen=True)
class Status:
    """Status registers at cycle N (see ``docs/timing.md``)."""

    strobes: int
    period: int
    host_absent: bool
    overrun: bool
    clamped: bool
    deferred: bool
    saturated: bool
    overruns: int
    clamps: int
    deferrals: int
    saturations: int


@dataclass(frozen=True)
class ChannelState:
    """One channel's books at cycle N, for the conservation check.

    Attributes
    ----------
    owed : int
        The owed amount, fixed point.
    pend_pos, pend_neg : int
        Pulses waiting in the emitter on each line.
    """

    owed: int
    pend_pos: int
    pend_neg: int


@dataclass(frozen=True)
class RunResult:
    """Every output edge, the status and each channel's books at the end of a run."""

    cycles: int
    edges: tuple[Edge, ...]
    status: Status
    channels: tuple[ChannelState, ...] = field(default=())

    def counts(self, channel: int) -> tuple[int, int]:
        """Pulses started on the positive and negative lines of ``channel``."""
        pos = sum(1 for e in self.edges if e.channel == channel and e.line == POS)
        neg = sum(1 for e in self.edges if e.channel == channel and e.line == NEG)
        return pos, neg

"""Plain data shared by the reference model and every simulation engine.

A :class:`Stimulus` goes in; a :class:`RunResult` comes out. The model and each engine
return the same structure, so tests compare them with ``==``. Rules: ``docs/timing.md``.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from itertools import pairwise
from typing import Any, overload

import numpy as np

from dvgate.params import STORM_PERIOD_BITS

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


#: Elements a compact sequence turns into Python objects at a time while iterating.
_CHUNK = 1 << 16


def _int64(values: Any) -> np.ndarray:
    """A read-only one-dimensional int64 copy of ``values``."""
    out = np.array(values, dtype=np.int64, copy=True).reshape(-1)
    out.setflags(write=False)
    return out


class _ArrayBacked(Sequence[Any]):
    """What :class:`Cycles` and :class:`RateChanges` share: columns of int64 arrays that
    read, compare and hash like the tuple of records they stand for."""

    __slots__ = ()

    def _columns(self) -> tuple[np.ndarray, ...]:
        raise NotImplementedError

    def __len__(self) -> int:
        return len(self._columns()[0])

    def __eq__(self, other: object) -> bool:
        if type(other) is type(self):
            return all(np.array_equal(a, b) for a, b in zip(self._columns(), other._columns(), strict=True))
        if isinstance(other, tuple):
            return len(other) == len(self) and all(a == b for a, b in zip(self, other, strict=True))
        return NotImplemented

    def __hash__(self) -> int:
        return hash(tuple(self))


class Cycles(_ArrayBacked, Sequence[int]):
    """Strictly increasing cycle numbers held in one int64 array: a compact ``tuple[int, ...]``.

    For long runs (a billion-cycle run has millions of strobe edges): it reads like the
    tuple it replaces (indexing, iteration and ``==`` give Python ints and compare equal
    to a tuple of the same numbers), and :func:`numpy.asarray` gets the array without a
    copy. The array is read-only.
    """

    __slots__ = ("array",)

    def __init__(self, values: Any) -> None:
        self.array = _int64(values)

    def _columns(self) -> tuple[np.ndarray, ...]:
        return (self.array,)

    @overload
    def __getitem__(self, index: int) -> int: ...
    @overload
    def __getitem__(self, index: slice) -> Cycles: ...
    def __getitem__(self, index: int | slice) -> int | Cycles:
        if isinstance(index, slice):
            return Cycles(self.array[index])
        return int(self.array[index])

    def __iter__(self) -> Iterator[int]:
        for at in range(0, len(self.array), _CHUNK):
            yield from self.array[at:at + _CHUNK].tolist()

    def __array__(self, dtype: Any = None, copy: bool | None = None) -> np.ndarray:
        return self.array if dtype is None else self.array.astype(dtype, copy=bool(copy))

    def __repr__(self) -> str:
        return f"Cycles({len(self)} cycles from {self[0]} to {self[-1]})" if len(self) else "Cycles(())"


@dataclass(frozen=True)
class Faults:
    """The fault set of one channel (``docs/timing.md``, "Fault injection"); all off by default.

    Attributes
    ----------
    silence_pos, silence_neg : bool
        The output line stays idle.
    stuck_pos, stuck_neg : bool
        The output line is held active (while armed).
    swap : bool
        The positive output shows the negative line and the other way round.
    no_rest : bool
        Hand-overs add no rest pulses (burst).
    storm_period : int
        ``P``: extra pulses active during the first ``width_cyc`` cycles of every ``P``
        cycles, counted from the cycle this set took effect; 0 is off.
    storm_neg : bool
        The storm goes on the negative output line instead of the positive one.
    """

    silence_pos: bool = False
    silence_neg: bool = False
    stuck_pos: bool = False
    stuck_neg: bool = False
    swap: bool = False
    no_rest: bool = False
    storm_period: int = 0
    storm_neg: bool = False

    def __post_init__(self) -> None:
        limit = (1 << STORM_PERIOD_BITS) - 1
        if not isinstance(self.storm_period, int) or not 0 <= self.storm_period <= limit:
            raise ValueError(f"storm_period must be an integer from 0 (off) to {limit} cycles, "
                             f"not {self.storm_period!r}")

    @property
    def on_outputs(self) -> bool:
        """True when a fault acts between the emitter's lines and the pins."""
        return (self.silence_pos or self.silence_neg or self.stuck_pos or self.stuck_neg or self.swap
                or self.storm_period != 0)


class RateChanges(_ArrayBacked, Sequence[RateChange]):
    """Rate changes held as three int64 arrays: a compact ``tuple[RateChange, ...]``.

    For long runs (a rate program of hours has millions of changes): every reader that
    iterates or indexes gets :class:`RateChange` records made on the fly, and ``==``
    compares equal to a tuple of the same records; :attr:`cycle`, :attr:`channel` and
    :attr:`rate` give the arrays (read-only) to readers that work on arrays.

    Parameters
    ----------
    cycle, channel, rate : array_like of int
        One entry per change, of equal length.
    """

    __slots__ = ("channel", "cycle", "rate")

    def __init__(self, cycle: Any, channel: Any, rate: Any) -> None:
        self.cycle = _int64(cycle)
        self.channel = _int64(channel)
        self.rate = _int64(rate)
        if not len(self.cycle) == len(self.channel) == len(self.rate):
            raise ValueError(f"rate changes: {len(self.cycle)} cycles, {len(self.channel)} channels and "
                             f"{len(self.rate)} rates; give one of each per change")

    @classmethod
    def of(cls, changes: Sequence[RateChange]) -> RateChanges:
        """``changes`` as a :class:`RateChanges` (itself when it already is one).

        Raises
        ------
        OverflowError
            If a cycle, channel or rate does not fit 64 signed bits.
        """
        if isinstance(changes, RateChanges):
            return changes
        n = len(changes)
        return cls(np.fromiter((c.cycle for c in changes), np.int64, n),
                   np.fromiter((c.channel for c in changes), np.int64, n),
                   np.fromiter((c.rate for c in changes), np.int64, n))

    def _columns(self) -> tuple[np.ndarray, ...]:
        return (self.cycle, self.channel, self.rate)

    @overload
    def __getitem__(self, index: int) -> RateChange: ...
    @overload
    def __getitem__(self, index: slice) -> RateChanges: ...
    def __getitem__(self, index: int | slice) -> RateChange | RateChanges:
        if isinstance(index, slice):
            return RateChanges(self.cycle[index], self.channel[index], self.rate[index])
        return RateChange(int(self.cycle[index]), int(self.channel[index]), int(self.rate[index]))

    def __iter__(self) -> Iterator[RateChange]:
        for at in range(0, len(self.cycle), _CHUNK):
            part = slice(at, at + _CHUNK)
            for cycle, channel, rate in zip(self.cycle[part].tolist(), self.channel[part].tolist(),
                                            self.rate[part].tolist(), strict=True):
                yield RateChange(cycle, channel, rate)

    def __repr__(self) -> str:
        if not len(self):
            return "RateChanges(())"
        return f"RateChanges({len(self)} changes, cycles {self.cycle[0]} to {self.cycle[-1]})"


@dataclass(frozen=True)
class FaultChange:
    """``channel`` has the fault set ``faults`` (the whole set) from ``cycle`` on."""

    cycle: int
    channel: int
    faults: Faults


@dataclass(frozen=True)
class Stimulus:
    """Everything driven into the emulator during a run.

    Attributes
    ----------
    cycles : int
        Run length N: inputs for cycles 0..N-1, outputs observed for 1..N.
    strobe_edges : tuple of int, or Cycles
        Cycles at which the strobe pin toggles (inactive at reset), strictly increasing.
        Long runs hold them as :class:`Cycles` (one array; reads like the tuple).
    rate_changes : tuple of RateChange, or RateChanges
        Sorted by cycle; each at cycle 1 or later. Long runs hold them as
        :class:`RateChanges` (three arrays; reads like the tuple).
    arm_changes : tuple of (int, bool)
        ``arm`` input level from that cycle on; the input is low at reset.
    fault_changes : tuple of FaultChange
        Sorted by cycle; each at cycle 1 or later; at most one per channel and cycle.
    ignore_windows : tuple of (int, int)
        ``(cycle, length)``: strobes detected at ``cycle .. cycle + length - 1`` are not
        taken; a window replaces the one in force. Strictly increasing in cycle, each at
        cycle 1 or later, length 1 or more.
    """

    cycles: int
    strobe_edges: tuple[int, ...] | Cycles = ()
    rate_changes: tuple[RateChange, ...] | RateChanges = ()
    arm_changes: tuple[tuple[int, bool], ...] = ((0, True),)
    fault_changes: tuple[FaultChange, ...] = ()
    ignore_windows: tuple[tuple[int, int], ...] = ()

    def __post_init__(self) -> None:
        if self.cycles < 1:
            raise ValueError(f"cycles must be at least 1, not {self.cycles}")
        edges = self.strobe_edges
        # The compact forms are checked on their arrays (the same rules, without a Python object per entry).
        if isinstance(edges, Cycles):
            rising = bool(np.all(np.diff(edges.array) > 0))
        else:
            rising = not any(b <= a for a, b in pairwise(edges))
        if not rising:
            raise ValueError("strobe_edges must be strictly increasing")
        if len(edges) and edges[0] < 0:
            raise ValueError(f"strobe edge at cycle {edges[0]}: cycles start at 0")
        changes = self.rate_changes
        if isinstance(changes, RateChanges):
            ordered = bool(np.all(np.diff(changes.cycle) >= 0))
            cyc: Sequence[int] = changes.cycle[:1].tolist()
        else:
            cyc = [c.cycle for c in changes]
            ordered = cyc == sorted(cyc)
        if not ordered:
            raise ValueError("rate_changes must be sorted by cycle")
        if cyc and cyc[0] < 1:
            raise ValueError(f"rate change at cycle {cyc[0]}: changes start at cycle 1")
        arm = [c for c, _ in self.arm_changes]
        if arm and arm[0] < 0:
            raise ValueError(f"arm change at cycle {arm[0]}: cycles start at 0")
        if any(b <= a for a, b in pairwise(arm)):
            raise ValueError("arm_changes must be strictly increasing in cycle")
        fault = [c.cycle for c in self.fault_changes]
        if fault != sorted(fault):
            raise ValueError("fault_changes must be sorted by cycle")
        if fault and fault[0] < 1:
            raise ValueError(f"fault change at cycle {fault[0]}: changes start at cycle 1")
        seen = [(c.cycle, c.channel) for c in self.fault_changes]
        if len(set(seen)) != len(seen):
            cycle, channel = next(x for x in seen if seen.count(x) > 1)
            raise ValueError(f"fault changes at cycle {cycle}: channel {channel} is set twice; "
                             "give one fault set per channel and cycle")
        windows = self.ignore_windows
        if any(b[0] <= a[0] for a, b in pairwise(windows)):
            raise ValueError("ignore_windows must be strictly increasing in cycle")
        if windows and windows[0][0] < 1:
            raise ValueError(f"ignore window at cycle {windows[0][0]}: windows start at cycle 1")
        for cycle, length in windows:
            if length < 1:
                raise ValueError(f"ignore window at cycle {cycle}: length is {length}, allowed 1 or more")


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
    #: Strobes detected inside an ignore window, armed or not (16 bits, saturating).
    ignored: int = 0


@dataclass(frozen=True)
class ChannelState:
    """One channel's books at cycle N, for the conservation check.

    Attributes
    ----------
    owed : int or None
        The owed amount, fixed point; None from the shared datapath, which keeps no owed
        register (``run_amaranth``'s ``anchors`` gives what it holds).
    pend_pos, pend_neg : int or None
        Pulses waiting in the emitter on each line; None from the shared datapath, which
        keeps them in block RAM.
    """

    owed: int | None
    pend_pos: int | None
    pend_neg: int | None


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

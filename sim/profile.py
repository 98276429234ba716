"""Motion profiles: specific force (or angular rate) per channel over time.

A :class:`Profile` is a time grid and one value per channel at each time, in SI units
(m/s^2 for accelerometer channels, rad/s for gyro channels), linear between samples.
Two samples at the same time make a step (the left and the right value); scenarios and
the sensor model use that, a CSV file may not. :func:`read_csv` imports a file whose
header names the time and each channel with its unit, and refuses anything doubtful
with the file, line and column.
"""

from __future__ import annotations

import csv
import difflib
import math
import re
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from dvgate.config import Channel
from dvgate.errors import UserError
from dvgate.units import KINDS

_HEADER = re.compile(r"^\s*([A-Za-z_][A-Za-z0-9_]*)\s*(?:[\[(]\s*([^\])]*?)\s*[\])])?\s*$")
TIME_NAMES = ("time", "t")
RATE_UNITS = {"m/s": "m/s^2", "rad": "rad/s"}


@dataclass(frozen=True)
class Phase:
    """A named stretch of a profile, for plots and summaries (start and stop in seconds)."""

    name: str
    start: float
    stop: float


@dataclass(frozen=True, eq=False)
class Profile:
    """Specific force or angular rate per channel, linear between samples.

    Attributes
    ----------
    time : ndarray of float, shape (n,)
        Seconds, non-decreasing, at least two samples and a positive duration. A time
        given twice is a step: the first sample is the value just before, the second
        the value from then on.
    values : ndarray of float, shape (n, channels)
        SI values: m/s^2 (accelerometer channels) or rad/s (gyro channels).
    names : tuple of str
        Channel names, in the config's order.
    units : tuple of str
        ``"m/s^2"`` or ``"rad/s"`` per channel.
    source : str
        Where the profile came from (file or scenario), for messages.
    lines : ndarray of int, optional
        Source line of each sample (CSV import), for messages.
    phases : tuple of Phase
        Named stretches (scenarios), for the report.
    title : str
        One line saying what the profile is.
    notes : tuple of str
        Remarks the report shows (such as "invented scenario").
    """

    time: np.ndarray
    values: np.ndarray
    names: tuple[str, ...]
    units: tuple[str, ...]
    source: str = "<profile>"
    lines: np.ndarray | None = None
    phases: tuple[Phase, ...] = ()
    title: str = ""
    notes: tuple[str, ...] = field(default=())

    def __post_init__(self) -> None:
        time = np.asarray(self.time, dtype=float)
        values = np.asarray(self.values, dtype=float)
        if values.ndim == 1:
            values = values[:, None]
        object.__setattr__(self, "time", time)
        object.__setattr__(self, "values", values)
        if time.ndim != 1 or len(time) < 2:
            raise ValueError("a profile needs at least two samples")
        if values.shape != (len(time), len(self.names)):
            raise ValueError(f"values must have shape {(len(time), len(self.names))}, not {values.shape}")
        if len(self.units) != len(self.names):
            raise ValueError("one unit per channel")
        if not (np.all(np.isfinite(time)) and np.all(np.isfinite(values))):
            raise ValueError("a profile holds finite numbers only")
        steps = np.diff(time)
        if np.any(steps < 0):
            raise ValueError("profile time must not decrease")
        if np.any((steps[:-1] == 0) & (steps[1:] == 0)):
            raise ValueError("a time may appear at most twice (a step)")
        if time[-1] <= time[0]:
            raise ValueError("a profile must last longer than zero seconds")

    # -- what it says ---------------------------------------------------------------

    @property
    def start(self) -> float:
        return float(self.time[0])

    @property
    def stop(self) -> float:
        return float(self.time[-1])

    @property
    def duration(self) -> float:
        return self.stop - self.start

    def at(self, times: np.ndarray | float) -> np.ndarray:
        """Values at ``times`` (shape (k, channels)); at a step, the value from then on."""
        t = np.atleast_1d(np.asarray(times, dtype=float))
        k = np.clip(np.searchsorted(self.time, t, side="right") - 1, 0, len(self.time) - 2)
        t0, t1 = self.time[k], self.time[k + 1]
        width = t1 - t0
        frac = np.where(width > 0, (t - t0) / np.where(width > 0, width, 1.0), 0.0)
        frac = np.clip(frac, 0.0, 1.0)
        v0, v1 = self.values[k], self.values[k + 1]
        return v0 + (v1 - v0) * frac[:, None]

    def interval_integrals(self, bounds: np.ndarray) -> np.ndarray:
        """Integral of each channel over ``[bounds[j], bounds[j+1])``, shape (len(bounds)-1, channels).

        Each integral is summed from the samples inside its interval only (never as a
        difference of two running totals), so its rounding error stays relative to the
        interval itself however long the profile is.
        """
        b = np.asarray(bounds, dtype=float)
        if np.any(np.diff(b) < 0) or b[0] < self.start or b[-1] > self.stop:
            raise ValueError("bounds must be sorted and lie within the profile")
        t, v = self.time, self.values
        area = np.zeros((len(t), v.shape[1]))
        area[:-1] = (np.diff(t)[:, None]) * (v[:-1] + v[1:]) / 2.0
        k = np.minimum(np.searchsorted(t, b, side="right") - 1, len(t) - 1)
        partial = self._partial(k, b)
        # Whole sample intervals from k[j] to k[j+1] - 1, then the partial ends. The
        # ranges follow one another, so one reduceat sums each from its own rows.
        lo, hi = k[:-1], k[1:]
        sums = np.add.reduceat(area, np.concatenate((lo, hi[-1:])), axis=0)[:-1]
        sums[hi == lo] = 0.0
        return sums + partial[1:] - partial[:-1]

    def _partial(self, k: np.ndarray, b: np.ndarray) -> np.ndarray:
        """Integral from sample ``k`` to time ``b`` inside interval ``k`` (0 past the end)."""
        t, v = self.time, self.values
        last = len(t) - 1
        kk = np.minimum(k, last - 1)
        t0, t1 = t[kk], t[kk + 1]
        width = t1 - t0
        dt = np.where(k >= last, 0.0, b - t[np.minimum(k, last)])
        slope = np.where((width > 0)[:, None], (v[kk + 1] - v[kk]) / np.where(width > 0, width, 1.0)[:, None], 0.0)
        return v[np.minimum(k, last)] * dt[:, None] + slope * (dt * dt / 2.0)[:, None]

    def integral(self, times: np.ndarray) -> np.ndarray:
        """Running integral from the start to each of ``times`` (sorted), shape (k, channels)."""
        times = np.asarray(times, dtype=float)
        bounds = np.concatenate(([self.start], times))
        return running_sum(self.interval_integrals(bounds))

    def with_values(self, time: np.ndarray, values: np.ndarray, *, note: str | None = None) -> Profile:
        """The same profile (names, phases, title) on new samples."""
        notes = self.notes + ((note,) if note else ())
        return Profile(time, values, self.names, self.units, self.source, None, self.phases, self.title, notes)


def running_sum(parts: np.ndarray, block: int = 256) -> np.ndarray:
    """Cumulative sum along axis 0 that stays accurate over millions of terms.

    A plain running sum loses about one rounding per term; here each block of
    ``block`` terms is summed on its own and the block totals are carried with
    compensated (Neumaier) summation, so the error stays near one rounding of the total.
    """
    parts = np.asarray(parts, dtype=float)
    rows = len(parts)
    if rows == 0:
        return parts.copy()
    shape = parts.shape[1:]
    blocks = -(-rows // block)
    padded = np.zeros((blocks * block, *shape))
    padded[:rows] = parts
    grouped = padded.reshape(blocks, block, *shape)
    inner = np.cumsum(grouped, axis=1)
    totals = grouped.sum(axis=1)
    offsets = np.zeros((blocks, *shape))
    total = np.zeros(shape)
    carry = np.zeros(shape)
    for i in range(blocks):
        offsets[i] = total + carry
        x = totals[i]
        new = total + x
        carry += np.where(np.abs(total) >= np.abs(x), (total - new) + x, (x - new) + total)
        total = new
    return (inner + offsets[:, None]).reshape(blocks * block, *shape)[:rows]


# -- CSV import ---------------------------------------------------------------------------


def _cell_error(path: str, line: int, column: str, message: str) -> UserError:
    return UserError(f"{path}: line {line}, column {column!r}: {message}")


def read_csv(path: str | Path, channels: Sequence[Channel]) -> Profile:
    """Read a profile from a CSV file whose header names time and every channel with units.

    The header is the first line that is not blank or a ``#`` comment, one cell per
    column, each ``name [unit]`` (or ``name (unit)``): a ``time`` column (units s, ms,
    us, ns) and one column per config channel (acceleration units for accelerometer
    channels: m/s^2, g, mg; angular rate for gyro channels: rad/s, deg/s). Every later
    line is one sample; time must increase strictly.

    Parameters
    ----------
    path : str or Path
        The file.
    channels : sequence of Channel
        The config's channels: each must have a column, and no other column may appear.

    Raises
    ------
    UserError
        Naming the file, the line and the column of the first problem.
    """
    path = Path(path)
    src = str(path)
    try:
        text = path.read_text(encoding="utf-8-sig")
    except FileNotFoundError:
        raise UserError(f"{src}: no such file") from None
    except IsADirectoryError:
        raise UserError(f"{src}: is a folder, not a CSV file") from None
    except UnicodeDecodeError:
        raise UserError(f"{src}: not a text file (UTF-8 expected)") from None
    rows = [(number, row) for number, row in enumerate(csv.reader(text.splitlines()), start=1)]
    rows = [(n, r) for n, r in rows if r and any(c.strip() for c in r) and not r[0].lstrip().startswith("#")]
    if not rows:
        raise UserError(f"{src}: empty; expected a header such as 'time [s], x [m/s^2], ...'")
    header_line, header = rows[0]
    columns = _read_header(src, header_line, header, channels)
    time_col = columns.index(None) if None in columns else -1
    factors, names = [], []
    for index, cell in enumerate(header):
        name, unit = _HEADER.match(cell).groups()  # type: ignore[union-attr]
        if index == time_col:
            factors.append(KINDS["time"][unit])
            names.append(name)
        else:
            ch = columns[index]
            kind = "acceleration" if channels[ch].unit == "m/s" else "angular_rate"  # type: ignore[index]
            factors.append(KINDS[kind][unit])
            names.append(name)
    if len(rows) < 3:
        raise UserError(f"{src}: line {header_line}: a profile needs at least two samples after the header")
    times, lines = [], []
    values = np.empty((len(rows) - 1, len(channels)))
    order = [columns[i] for i in range(len(header))]
    for r, (line, row) in enumerate(rows[1:]):
        if len(row) != len(header):
            raise UserError(f"{src}: line {line}: {len(row)} cells, but the header on line {header_line} "
                            f"has {len(header)} columns")
        for index, cell in enumerate(row):
            text_cell = cell.strip()
            if not text_cell:
                raise _cell_error(src, line, names[index], "empty cell; every sample needs every column")
            try:
                number = float(text_cell)
            except ValueError:
                raise _cell_error(src, line, names[index], f"{text_cell!r} is not a number") from None
            if not math.isfinite(number):
                raise _cell_error(src, line, names[index], f"{text_cell!r} is not a finite number")
            number *= factors[index]
            if order[index] is None:
                if times and number <= times[-1]:
                    word = "repeats" if number == times[-1] else "goes backwards"
                    raise _cell_error(src, line, names[index],
                                      f"time {word}: {text_cell} after {times[-1] / factors[index]:.10g} "
                                      f"on line {lines[-1]}; time must increase")
                times.append(number)
                lines.append(line)
            else:
                values[r, order[index]] = number
    return Profile(
        np.array(times), values, tuple(c.name for c in channels),
        tuple(RATE_UNITS[c.unit] for c in channels), src, np.array(lines), title=f"profile from {path.name}",
    )


def _read_header(src: str, line: int, header: list[str], channels: Sequence[Channel]) -> list[int | None]:
    """Map each header cell to a channel index (None for time), checking names and units."""
    wanted = {c.name: i for i, c in enumerate(channels)}
    out: list[int | None] = []
    seen: dict[str, int] = {}
    for col, cell in enumerate(header, start=1):
        match = _HEADER.match(cell)
        if not match:
            raise UserError(f"{src}: line {line}, column {col}: header cell {cell.strip()!r} is not "
                            "'name [unit]', such as 'time [s]' or 'x [m/s^2]'")
        name, unit = match.groups()
        if name in seen:
            raise UserError(f"{src}: line {line}, column {col}: {name!r} appears twice (also column {seen[name]})")
        seen[name] = col
        if name in TIME_NAMES:
            kind, out_index = "time", None
        elif name in wanted:
            ch = channels[wanted[name]]
            kind, out_index = ("acceleration" if ch.unit == "m/s" else "angular_rate"), wanted[name]
        else:
            guess = difflib.get_close_matches(name, [*wanted, "time"], n=1)
            hint = f"; did you mean {guess[0]!r}?" if guess else ""
            raise UserError(f"{src}: line {line}, column {col}: unknown column {name!r}; the config's channels "
                            f"are {', '.join(wanted)} (and 'time'){hint}")
        units = KINDS[kind]
        what = {"time": "a time", "acceleration": "an acceleration",
                "angular_rate": "an angular rate"}[kind]
        if not unit:
            raise UserError(f"{src}: line {line}, column {name!r}: no unit; write it as "
                            f"'{name} [{next(iter(units))}]' (units: {', '.join(units)})")
        if unit not in units:
            raise UserError(f"{src}: line {line}, column {name!r}: unit {unit!r} is not {what}; "
                            f"allowed: {', '.join(units)}")
        out.append(out_index)
    if None not in out:
        raise UserError(f"{src}: line {line}: no time column; add one such as 'time [s]'")
    if out.count(None) > 1:
        raise UserError(f"{src}: line {line}: two time columns ('time' and 't'); keep one")
    missing = [c.name for c in channels if wanted[c.name] not in out]
    if missing:
        raise UserError(f"{src}: line {line}: missing column(s) {', '.join(repr(m) for m in missing)}; "
                        "the profile must give every channel of the config")
    return out


__all__ = ["Phase", "Profile", "read_csv", "running_sum"]

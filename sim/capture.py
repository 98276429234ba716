"""Logic-analyzer captures of the emulator's pins: readers and the map of signals to lines.

Two formats are read, both streamed so that a capture of millions of samples costs
memory only for the level changes of the lines asked for:

- **VCD**, the value change dump of IEEE Std 1364-2001, section 18: header sections
  (``$date``, ``$version``, ``$comment``, ``$timescale`` in s, ms, us, ns, ps or fs),
  nested ``$scope``/``$upscope``, ``$var`` of one or more bits, then ``#time`` stamps,
  scalar changes (``0 1 x z``) and vector changes (``b...``). Tokens come from
  ``vcd.reader.tokenize`` of pyvcd (already a dependency of dvgate): it reads the
  stream incrementally, token by token, which is what a large capture needs, so no
  second library and no tokenizer of our own. pyvcd ends quietly at a token cut short
  by the end of the file; :class:`_TailWatch` catches that case (a truncated file).
- **CSV** of sampled levels: an optional block of comment lines (``;`` or ``#``), a
  header, then one row per sample (or per change) with a time or sample-number column
  and one 0/1 column per line. Rows are parsed in chunks with numpy.

Sample period: the rate the user gives wins. Otherwise a CSV's time column gives it
(its rows must then be evenly spaced; a change-only export needs the rate given) and a
VCD's is the greatest common divisor of its time steps (an analyzer puts every change
on its sample grid; a simulator's VCD gives its own time resolution).

A value that is neither 0 nor 1 (``x`` or ``z``) keeps the line at its last known level
and is counted in :attr:`Trace.unknown`; nothing is dropped silently.

The map (:class:`CaptureMap`) says which capture signal is the strobe, the ``arm``
input and each channel's ``<name>_pos``/``<name>_neg`` line. Unmapped lines default to
the emulator's own port names, so a VCD of the emulator needs no map at all.
"""

from __future__ import annotations

import csv
import difflib
import io
import math
import re
import tomllib
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from itertools import islice
from pathlib import Path
from typing import Any, Literal

import numpy as np
from pydantic import BaseModel, ConfigDict, ValidationError

from dvgate.errors import UserError
from dvgate.units import QuantityError, parse_quantity

__all__ = [
    "Capture", "CaptureMap", "SignalRef", "Trace", "capture_map_from_args", "load_capture_map",
    "read_capture", "TIME_UNITS",
]

#: Time units of VCD time scales and CSV time columns, as seconds.
TIME_UNITS: dict[str, float] = {"s": 1.0, "ms": 1e-3, "us": 1e-6, "µs": 1e-6, "ns": 1e-9, "ps": 1e-12, "fs": 1e-15}

#: Rows of a CSV parsed at once: large enough for numpy to pay, small enough for memory.
CSV_CHUNK_ROWS = 16384
#: Evenly spaced CSV rows: the largest time step within this fraction of the smallest.
EVEN_STEP_TOLERANCE = 0.01


# -- what a reader returns -------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class Trace:
    """The level changes of one captured line.

    Attributes
    ----------
    name : str
        The signal as the capture names it (full dotted path in a VCD, column header in
        a CSV), with its bit for one bit of a vector.
    initial : int
        Level (0 or 1) at the capture's start.
    changes : ndarray of float
        Seconds at which the level changes, strictly increasing; the level alternates,
        starting from ``initial``.
    unknown : int
        Values read as ``x`` or ``z`` (held at the last known level).
    """

    name: str
    initial: int
    changes: np.ndarray
    unknown: int = 0

    def edges(self, level: int) -> np.ndarray:
        """Times at which the line goes to ``level`` (1: rising edges, 0: falling edges)."""
        first = 0 if self.initial != level else 1
        return self.changes[first::2]

    def inverted(self) -> Trace:
        """The same line seen through an inverter."""
        return Trace(self.name, 1 - self.initial, self.changes, self.unknown)

    def level_at(self, t: float) -> int:
        """The level at time ``t`` (a change at ``t`` counts)."""
        count = int(np.searchsorted(self.changes, t, side="right"))
        return self.initial ^ (count & 1)


@dataclass(frozen=True, eq=False)
class Capture:
    """What a reader kept of a capture file.

    Attributes
    ----------
    source : str
        The file.
    kind : str
        ``"vcd"`` or ``"csv"``.
    start, end : float
        Times of the first and last sample or time stamp, seconds (the capture's clock).
    sample_period : float
        Seconds between samples: edges are known to this resolution.
    sample_period_from : str
        Where the sample period came from, for the report.
    traces : mapping of str to Trace
        The lines asked for, keyed by the name asked.
    samples : int
        CSV rows or VCD time stamps read.
    """

    source: str
    kind: str
    start: float
    end: float
    sample_period: float
    sample_period_from: str
    traces: Mapping[str, Trace]
    samples: int


# -- reading ------------------------------------------------------------------------------


def read_capture(path: str | Path, names: Sequence[str], *, optional: Sequence[str] = (),
                 kind: str | None = None, sample_rate: float | None = None,
                 time_column: str | None = None) -> Capture:
    """Read the level changes of some lines of a capture file.

    Parameters
    ----------
    path : str or Path
        A ``.vcd`` or ``.csv`` file (``kind`` says which for other names).
    names : sequence of str
        Signals that must be in the file. VCD: a variable's reference or a dotted
        suffix of its full path (``x_pos``, ``tb.dut.x_pos``), with ``[i]`` for bit
        ``i`` of a vector. CSV: a column header.
    optional : sequence of str
        Signals read when present, left out otherwise.
    kind : str, optional
        ``"vcd"`` or ``"csv"``; by default from the file's extension.
    sample_rate : float, optional
        The analyzer's sample rate, Hz. Required for a CSV with a sample-number column
        or an uneven time column.
    time_column : str, optional
        CSV: the time or sample column (default: the first column).

    Returns
    -------
    Capture

    Raises
    ------
    UserError
        For a missing, truncated or malformed file, a signal the file lacks, or a
        sample rate that the file contradicts.
    """
    path = Path(path)
    if kind is None:
        suffix = path.suffix.lower()
        kind = {".vcd": "vcd", ".csv": "csv", ".txt": "csv"}.get(suffix)
        if kind is None:
            raise UserError(f"{path}: cannot tell the format from the extension {suffix!r}; "
                            "allowed: .vcd, .csv (or give the format: vcd or csv)")
    if kind not in ("vcd", "csv"):
        raise UserError(f"format = {kind!r}: allowed: vcd, csv")
    if sample_rate is not None and not (math.isfinite(sample_rate) and sample_rate > 0):
        raise UserError(f"sample rate = {sample_rate!r}: allowed: a frequency greater than zero")
    if not path.exists():
        raise UserError(f"{path}: no such file")
    if path.is_dir():
        raise UserError(f"{path}: is a folder, not a capture file")
    if kind == "vcd":
        if time_column is not None:
            raise UserError(f"time column = {time_column!r}: a VCD has no columns; "
                            "the time column is for CSV captures")
        return _read_vcd(path, list(names), list(optional), sample_rate)
    return _read_csv(path, list(names), list(optional), sample_rate, time_column)


def _finish_trace(name: str, initial: int | None, times: np.ndarray, unknown: int) -> Trace:
    return Trace(name, 0 if initial is None else initial, np.asarray(times, dtype=np.float64), unknown)


# ---- VCD


@dataclass
class _VcdVar:
    path: tuple[str, ...]   # scopes
    reference: str
    size: int
    id_code: str
    index: int | tuple[int, int] | None
    is_real: bool

    @property
    def full(self) -> str:
        return ".".join((*self.path, self.reference))

    @property
    def shown(self) -> str:
        if isinstance(self.index, int):
            return f"{self.full}[{self.index}]"
        if isinstance(self.index, tuple):
            return f"{self.full}[{self.index[0]}:{self.index[1]}]"
        return self.full


@dataclass
class _Watch:
    """One line being followed: its level, change times (in ticks) and unknown count."""

    name: str
    shift: int            # bit position from the vector's least significant end
    size: int
    level: int | None = None
    initial: int | None = None
    times: list[int] = field(default_factory=list)
    unknown: int = 0

    def set(self, tick: int, value: int | None, at_start: bool) -> None:
        if value is None:
            self.unknown += 1
            return
        if self.level is None or at_start:
            # Values at the first time stamp (or before it) are the capture's initial levels.
            self.level = self.initial = value
            return
        if value == self.level:
            return
        self.level = value
        if self.times and self.times[-1] == tick:
            self.times.pop()  # two changes at one time stamp: the last one stands
        else:
            self.times.append(tick)


class _TailWatch(io.RawIOBase):
    """A binary stream that remembers where its last non-blank byte was.

    pyvcd's tokenizer stops silently when the file ends inside a token; comparing the
    end of the last token with the last non-blank byte tells a complete file from a
    truncated one. Locations follow pyvcd's counting (line from 1; a newline starts the
    next line at column 1, so a later line's first character is column 2).
    """

    def __init__(self, raw: io.BufferedReader) -> None:
        super().__init__()
        self._raw = raw
        self._line = 1      # line at the start of the next chunk
        self._col = 0       # column of the byte before the next chunk
        self.last: tuple[int, int] = (0, 0)

    def readable(self) -> bool:
        return True

    def readinto(self, buffer: Any) -> int:
        n = self._raw.readinto(buffer)
        if not n:
            return 0
        chunk = bytes(memoryview(buffer)[:n])
        body = chunk.rstrip()
        if body:
            newlines = body.count(b"\n")
            if newlines:
                line = self._line + newlines
                col = 1 + len(body) - body.rfind(b"\n") - 1
            else:
                line, col = self._line, self._col + len(body)
            self.last = (line, col)
        newlines = chunk.count(b"\n")
        if newlines:
            self._line += newlines
            self._col = 1 + len(chunk) - chunk.rfind(b"\n") - 1
        else:
            self._col += len(chunk)
        return n


def _match_vcd(name: str, variables: list[_VcdVar]) -> list[tuple[_VcdVar, int]]:
    """Variables (and bit offset) that ``name`` may mean, shallowest first."""
    bit: int | None = None
    base = name
    bracket = re.fullmatch(r"(.*?)\s*\[\s*(\d+)\s*\]", name)
    if bracket:
        base, bit = bracket.group(1), int(bracket.group(2))

    def suffix_of(full: str, want: str) -> bool:
        return full == want or full.endswith("." + want)

    found: list[tuple[_VcdVar, int]] = []
    for var in variables:
        if var.is_real:
            continue
        # A one-bit variable declared with its bit index, as "data [3]".
        if isinstance(var.index, int) and var.size == 1 and bit is not None:
            if suffix_of(var.full, base) and var.index == bit:
                found.append((var, 0))
            continue
        if not suffix_of(var.full, base):
            continue
        if bit is None:
            found.append((var, -1 if var.size != 1 else 0))
            continue
        msb, lsb = var.index if isinstance(var.index, tuple) else (var.size - 1, 0)
        if min(msb, lsb) <= bit <= max(msb, lsb):
            found.append((var, bit - lsb if msb >= lsb else lsb - bit))
    found.sort(key=lambda item: len(item[0].path))
    return found


def _resolve_vcd(path: Path, name: str, variables: list[_VcdVar], required: bool) -> tuple[_VcdVar, int] | None:
    found = _match_vcd(name, variables)
    if not found:
        if not required:
            return None
        known = sorted({v.shown for v in variables if not v.is_real})
        guess = difflib.get_close_matches(name, known + [v.reference for v in variables], n=1)
        hint = f"; did you mean {guess[0]!r}?" if guess else ""
        shown = ", ".join(known[:12]) + (" ..." if len(known) > 12 else "")
        raise UserError(f"{path}: no signal {name!r} in the VCD{hint} (signals: {shown})")
    depth = len(found[0][0].path)
    best = {(v.id_code, shift): (v, shift) for v, shift in found if len(v.path) == depth}
    if len(best) > 1:
        shown = ", ".join(sorted(v.shown for v, _ in best.values()))
        raise UserError(f"{path}: signal {name!r} is ambiguous in the VCD: it matches {shown}; "
                        "give more of its path")
    var, shift = next(iter(best.values()))
    if shift < 0:
        raise UserError(f"{path}: signal {name!r} is {var.size} bits wide ({var.shown}); "
                        f"name one bit of it, such as {name}[0]")
    return var, shift


def _vector_bit(value: int | str, shift: int, size: int) -> int | None:
    if isinstance(value, int):
        return (value >> shift) & 1
    text = value.lower()
    if len(text) < size:
        # Left-extension (IEEE Std 1364-2001 18.2.3): x and z extend themselves, 0 and 1 extend with 0.
        pad = text[0] if text[0] in "xz" else "0"
        text = pad * (size - len(text)) + text
    if shift >= len(text):
        return 0
    char = text[len(text) - 1 - shift]
    return 1 if char == "1" else 0 if char == "0" else None


def _read_vcd(path: Path, names: list[str], optional: list[str], sample_rate: float | None) -> Capture:
    from vcd.reader import TokenKind, VCDParseError, tokenize

    scopes: list[str] = []
    variables: list[_VcdVar] = []
    tick: float | None = None
    watches: dict[str, list[_Watch]] = {}
    by_name: dict[str, _Watch] = {}
    in_header = True
    now: int | None = None
    first: int | None = None
    step_gcd = 0
    stamps = 0
    last_end: tuple[int, int] = (0, 0)
    declared: set[str] = set()

    def where(token: Any) -> str:
        return f"line {token.span.start.line}"

    try:
        with path.open("rb") as raw:
            stream = _TailWatch(raw)
            for token in tokenize(stream):
                kind = token.kind
                last_end = (token.span.end.line, token.span.end.column)
                if in_header:
                    if kind is TokenKind.SCOPE:
                        scopes.append(token.data.ident)
                    elif kind is TokenKind.UPSCOPE:
                        if not scopes:
                            raise UserError(f"{path}: {where(token)}: $upscope without a matching $scope")
                        scopes.pop()
                    elif kind is TokenKind.VAR:
                        decl = token.data
                        variables.append(_VcdVar(tuple(scopes), decl.reference, decl.size, decl.id_code,
                                                 decl.bit_index, decl.type_.value in ("real", "realtime")))
                    elif kind is TokenKind.TIMESCALE:
                        scale = token.data
                        tick = scale.magnitude.value * TIME_UNITS[scale.unit.value]
                    elif kind is TokenKind.ENDDEFINITIONS:
                        in_header = False
                        declared = {v.id_code for v in variables}
                        if tick is None:
                            raise UserError(f"{path}: the header has no $timescale, so the time unit is "
                                            "unknown; allowed: a VCD with '$timescale 1 ns $end' (s, ms, us, "
                                            "ns, ps or fs)")
                        if scopes:
                            raise UserError(f"{path}: {where(token)}: $enddefinitions inside the open scope "
                                            f"{'.'.join(scopes)!r} (a $upscope is missing)")
                        for name, required in [(n, True) for n in names] + [(n, False) for n in optional]:
                            found = _resolve_vcd(path, name, variables, required)
                            if found is None:
                                continue
                            var, shift = found
                            watch = _Watch(var.shown if var.size == 1 else f"{var.full}[{name_bit(var, shift)}]",
                                           shift, var.size)
                            watches.setdefault(var.id_code, []).append(watch)
                            by_name[name] = watch
                    elif kind in (TokenKind.CHANGE_TIME, TokenKind.CHANGE_SCALAR, TokenKind.CHANGE_VECTOR,
                                  TokenKind.CHANGE_REAL, TokenKind.CHANGE_STRING):
                        raise UserError(f"{path}: {where(token)}: a value change before $enddefinitions")
                    continue
                if kind is TokenKind.CHANGE_TIME:
                    t = token.data
                    if now is not None and t < now:
                        raise UserError(f"{path}: {where(token)}: time stamp #{t} goes back from #{now}; "
                                        "time stamps must not decrease")
                    if first is None:
                        first = t
                    elif t != now:
                        step_gcd = math.gcd(step_gcd, t - first)
                    if t != now:
                        stamps += 1
                    now = t
                elif kind is TokenKind.CHANGE_SCALAR:
                    targets = watches.get(token.data.id_code)
                    if targets is None:
                        if token.data.id_code not in declared:
                            raise UserError(f"{path}: {where(token)}: a value change for the undeclared "
                                            f"identifier code {token.data.id_code!r}")
                    else:
                        char = token.data.value
                        value = 1 if char == "1" else 0 if char == "0" else None
                        for watch in targets:
                            watch.set(_now(now), value, now is None or now == first)
                elif kind is TokenKind.CHANGE_VECTOR:
                    targets = watches.get(token.data.id_code)
                    if targets is None:
                        if token.data.id_code not in declared:
                            raise UserError(f"{path}: {where(token)}: a value change for the undeclared "
                                            f"identifier code {token.data.id_code!r}")
                    else:
                        for watch in targets:
                            watch.set(_now(now), _vector_bit(token.data.value, watch.shift, watch.size),
                                      now is None or now == first)
                elif kind in (TokenKind.SCOPE, TokenKind.UPSCOPE, TokenKind.VAR, TokenKind.TIMESCALE,
                              TokenKind.ENDDEFINITIONS):
                    raise UserError(f"{path}: {where(token)}: a declaration after $enddefinitions")
                # $dumpvars, $dumpall, $dumpon, $dumpoff, $end, $comment: the values inside count as changes.
            tail = stream.last
    except VCDParseError as error:
        raise UserError(f"{path}: not a valid VCD: line {error.loc.line}, column {error.loc.column}: "
                        f"{error.args[0].split(': ', 1)[-1]}") from None
    except UnicodeDecodeError:
        raise UserError(f"{path}: not a valid VCD: it holds bytes that are not ASCII text") from None

    if in_header:
        raise UserError(f"{path}: truncated or not a VCD: the header never ends ($enddefinitions missing)")
    if tail > last_end:
        raise UserError(f"{path}: truncated VCD: the file ends inside a value change or declaration "
                        f"at line {tail[0]}")
    if first is None or now is None or now == first:
        raise UserError(f"{path}: the VCD holds {'no time stamp' if first is None else 'a single time stamp'}; "
                        "a capture needs a stretch of time")
    assert tick is not None
    if sample_rate is not None:
        period, origin = 1.0 / sample_rate, "given"
    else:
        period, origin = step_gcd * tick, "VCD time steps (their greatest common divisor)"
    traces = {}
    for name, watch in by_name.items():
        times = np.asarray(watch.times, dtype=np.float64) * tick
        traces[name] = _finish_trace(watch.name, watch.initial, times, watch.unknown)
    return Capture(str(path), "vcd", first * tick, now * tick, period, origin, traces, stamps)


def name_bit(var: _VcdVar, shift: int) -> int:
    """The declared bit index of the bit ``shift`` places from a variable's least significant end."""
    msb, lsb = var.index if isinstance(var.index, tuple) else (var.size - 1, 0)
    return lsb + shift if msb >= lsb else lsb - shift


def _now(now: int | None) -> int:
    # Values dumped before the first time stamp are the initial values, at time 0.
    return 0 if now is None else now


# ---- CSV

_TIME_HEADER = re.compile(r"^\s*(?P<name>[^\[\(]*?)\s*(?:[\[(]\s*(?P<unit>[A-Za-zµ]+)\s*[\])])?\s*$")


def _time_column_unit(header: str) -> tuple[str, float]:
    """``"time"`` or ``"sample"`` and the unit factor of a time column's header."""
    match = _TIME_HEADER.match(header)
    base = (match.group("name") if match else header).strip()
    unit = match.group("unit") if match else None
    if unit is None:
        tail = re.search(r"[_ ](s|ms|us|ns|ps|fs)$", base)
        unit = tail.group(1) if tail else None
    if "sample" in base.lower():
        return "sample", 1.0
    if unit is None:
        return "time", 1.0
    if unit not in TIME_UNITS:
        raise ValueError(f"unknown time unit {unit!r} in the header; allowed: {', '.join(TIME_UNITS)}")
    return "time", TIME_UNITS[unit]


def _delimiter(header: str) -> str:
    for candidate in (",", "\t", ";"):
        if candidate in header:
            return candidate
    return ","


def _row_error(path: Path, lineno: int, line: str, delim: str, width: int, cols: list[int],
               headers: list[str]) -> UserError:
    """The first thing wrong with one CSV row, as a message naming line and column."""
    fields = next(csv.reader([line], delimiter=delim))
    if len(fields) != width:
        return UserError(f"{path}: line {lineno}: {len(fields)} fields, the header has {width} "
                         "(a truncated or malformed row)")
    for position, col in enumerate(cols):
        text = fields[col].strip()
        try:
            value = float(text)
        except ValueError:
            value = math.nan
        if position == 0:
            if not math.isfinite(value):
                return UserError(f"{path}: line {lineno}, column {headers[col]!r}: {text!r} is not a number")
        elif value not in (0.0, 1.0):
            return UserError(f"{path}: line {lineno}, column {headers[col]!r}: {text!r} is not a logic level; "
                             "allowed: 0 or 1")
    return UserError(f"{path}: line {lineno}: cannot read this row")


def _read_csv(path: Path, names: list[str], optional: list[str], sample_rate: float | None,
              time_column: str | None) -> Capture:
    try:
        handle = path.open("r", encoding="utf-8-sig", newline="")
    except OSError as error:
        raise UserError(f"{path}: cannot open: {error.strerror}") from None
    with handle:
        try:
            return _read_csv_open(path, handle, names, optional, sample_rate, time_column)
        except UnicodeDecodeError:
            raise UserError(f"{path}: not a text file (a CSV capture is text)") from None


def _read_csv_open(path: Path, handle: io.TextIOBase, names: list[str], optional: list[str],
                   sample_rate: float | None, time_column: str | None) -> Capture:
    lineno = 0
    header_line = None
    for line in handle:
        lineno += 1
        stripped = line.strip()
        if not stripped or stripped[0] in ";#":
            continue
        header_line = line
        break
    if header_line is None:
        raise UserError(f"{path}: empty CSV: no header line")
    delim = _delimiter(header_line)
    headers = [h.strip() for h in next(csv.reader([header_line.rstrip("\r\n")], delimiter=delim))]
    width = len(headers)
    if width < 2:
        raise UserError(f"{path}: line {lineno}: the header names {width} column(s); a capture needs a time "
                        "or sample column and at least one line")

    if time_column is None:
        t_col = 0
    elif time_column in headers:
        t_col = headers.index(time_column)
    else:
        raise UserError(f"{path}: no time column {time_column!r}; columns: {', '.join(headers)}")
    try:
        t_kind, t_unit = _time_column_unit(headers[t_col])
    except ValueError as error:
        raise UserError(f"{path}: time column {headers[t_col]!r}: {error}") from None
    if t_kind == "sample" and sample_rate is None:
        raise UserError(f"{path}: column {headers[t_col]!r} counts samples; give the analyzer's sample rate "
                        "(--sample-rate, or sample_rate in the map's [capture] table)")

    cols: list[int] = [t_col]
    wanted: list[str] = []
    for name, required in [(n, True) for n in names] + [(n, False) for n in optional]:
        if name in headers and headers.index(name) != t_col:
            cols.append(headers.index(name))
            wanted.append(name)
        elif required:
            others = [h for i, h in enumerate(headers) if i != t_col]
            guess = difflib.get_close_matches(name, others, n=1)
            hint = f"; did you mean {guess[0]!r}?" if guess else ""
            raise UserError(f"{path}: no column {name!r}{hint} (columns: {', '.join(others)})")

    n_lines = len(wanted)
    initial: np.ndarray | None = None
    last_levels: np.ndarray | None = None
    pieces: list[list[np.ndarray]] = [[] for _ in range(n_lines)]
    rows = 0
    first_t = last_t = math.nan
    step_min, step_max = math.inf, 0.0
    sep_count = width - 1

    while True:
        raw = list(islice(handle, CSV_CHUNK_ROWS))
        if not raw:
            break
        start_line = lineno + 1
        lineno += len(raw)
        body = [line for line in raw if line.strip()]
        if not body:
            continue
        try:
            if any(line.count(delim) != sep_count for line in body) and not any('"' in line for line in body):
                raise ValueError("field count")
            table = np.loadtxt(body, delimiter=delim, usecols=cols, dtype=np.float64, ndmin=2, quotechar='"',
                               comments=None)
            levels = table[:, 1:]
            if not np.all((levels == 0.0) | (levels == 1.0)) or not np.all(np.isfinite(table[:, 0])):
                raise ValueError("level")
        except ValueError:
            for offset, line in enumerate(raw):
                if line.strip():
                    error = _row_error(path, start_line + offset, line.rstrip("\r\n"), delim, width, cols, headers)
                    if not str(error).endswith("cannot read this row"):
                        raise error from None
            raise UserError(f"{path}: lines {start_line} to {lineno}: cannot read these rows") from None

        times = table[:, 0] * t_unit
        steps = np.diff(times)
        if not math.isnan(last_t):
            steps = np.concatenate(([times[0] - last_t], steps))
        if np.any(steps <= 0):
            bad = int(np.flatnonzero(steps <= 0)[0]) + (0 if not math.isnan(last_t) else 1)
            line_at = _nth_body_line(raw, bad, start_line)
            raise UserError(f"{path}: line {line_at}: column {headers[t_col]!r} does not increase "
                            f"({table[bad, 0]!r} after the row before); rows must be in time order")
        if steps.size:
            step_min = min(step_min, float(steps.min()))
            step_max = max(step_max, float(steps.max()))
        if math.isnan(first_t):
            first_t = float(times[0])
        last_t = float(times[-1])

        lv = levels.astype(np.int8)
        if initial is None:
            initial = lv[0].copy()
            last_levels = lv[0].copy()
        assert last_levels is not None
        previous = np.vstack((last_levels[None, :], lv[:-1]))
        for j in range(n_lines):
            where = np.flatnonzero(lv[:, j] != previous[:, j])
            if where.size:
                pieces[j].append(times[where])
        last_levels = lv[-1].copy()
        rows += len(body)

    if rows < 2:
        raise UserError(f"{path}: {rows} data row(s); a capture needs at least two samples")
    span = last_t - first_t
    if t_kind == "sample":
        assert sample_rate is not None
        period, origin = 1.0 / sample_rate, "given"
        if step_min < 1.0 - EVEN_STEP_TOLERANCE:
            raise UserError(f"{path}: column {headers[t_col]!r} counts samples but steps by {step_min:g}; "
                            "sample numbers are whole and increasing")
        scale = period  # sample numbers to seconds
        first_t, last_t = first_t * scale, last_t * scale
        pieces = [[p * scale for p in piece] for piece in pieces]
    elif sample_rate is not None:
        period, origin = 1.0 / sample_rate, "given"
        if step_min < period * (1.0 - EVEN_STEP_TOLERANCE):
            raise UserError(f"{path}: rows {step_min:.6g} s apart, closer than the given sample period "
                            f"({period:.6g} s, {sample_rate:.6g} Hz); check the sample rate")
    else:
        if step_max > step_min * (1.0 + EVEN_STEP_TOLERANCE):
            raise UserError(f"{path}: the time column steps unevenly ({step_min:.6g} s to {step_max:.6g} s), "
                            "as in a change-only export; give the analyzer's sample rate (--sample-rate, or "
                            "sample_rate in the map's [capture] table)")
        period, origin = span / (rows - 1), "CSV time column"
    assert initial is not None
    traces = {}
    for j, name in enumerate(wanted):
        times = np.concatenate(pieces[j]) if pieces[j] else np.empty(0)
        traces[name] = _finish_trace(name, int(initial[j]), times, 0)
    return Capture(str(path), "csv", first_t, last_t, period, origin, traces, rows)


def _nth_body_line(raw: list[str], index: int, start_line: int) -> int:
    """File line of the ``index``-th non-blank line of a chunk."""
    seen = -1
    for offset, line in enumerate(raw):
        if line.strip():
            seen += 1
            if seen == index:
                return start_line + offset
    return start_line


# -- the map ------------------------------------------------------------------------------


@dataclass(frozen=True)
class SignalRef:
    """A capture signal standing for one emulator line.

    Attributes
    ----------
    name : str
        The signal in the capture.
    inverted : bool
        Seen through an inverting buffer (written ``~name`` in a map).
    mapped : bool
        Named by the user (False: the emulator's own port name, by default).
    """

    name: str
    inverted: bool = False
    mapped: bool = True

    @classmethod
    def parse(cls, text: str, field_name: str) -> SignalRef:
        raw = text.strip()
        inverted = raw.startswith("~")
        name = raw[1:].strip() if inverted else raw
        if not name:
            raise UserError(f"{field_name} = {text!r}: allowed: a signal or column name, "
                            "with '~' in front for an inverted line")
        return cls(name, inverted)


class _CaptureOptions(BaseModel):
    model_config = ConfigDict(extra="forbid")

    format: Literal["vcd", "csv"] | None = None
    time_column: str | None = None
    sample_rate: str | None = None
    jitter: str | None = None
    clock_tolerance: str | None = None


class _MapFile(BaseModel):
    model_config = ConfigDict(extra="forbid")

    signals: dict[str, str] = {}
    capture: _CaptureOptions = _CaptureOptions()


@dataclass(frozen=True)
class CaptureMap:
    """Which capture signal is which emulator line, and how the capture was taken.

    Attributes
    ----------
    signals : mapping of str to SignalRef
        Keyed by the emulator's port name: ``strobe``, ``arm``, ``<channel>_pos``,
        ``<channel>_neg``.
    format : str or None
        ``"vcd"`` or ``"csv"``; None: from the file's extension.
    time_column : str or None
        CSV: the time or sample column.
    sample_rate : float or None
        The analyzer's sample rate, Hz.
    jitter : float
        Timing uncertainty of one captured edge beyond the sample period, seconds.
    clock_ppm : float or None
        Tolerance of the emulator's and the analyzer's clocks together, ppm.
    source : str
        Where the map came from, for messages.
    """

    signals: Mapping[str, SignalRef] = field(default_factory=dict)
    format: str | None = None
    time_column: str | None = None
    sample_rate: float | None = None
    jitter: float = 0.0
    clock_ppm: float | None = None
    source: str = "defaults"

    def roles(self, channels: Sequence[str]) -> list[str]:
        """Every line an emulator with these channels has, strobe and arm first."""
        return ["strobe", "arm"] + [f"{name}_{line}" for name in channels for line in ("pos", "neg")]

    def resolve(self, channels: Sequence[str]) -> dict[str, SignalRef]:
        """The signal of every line, the emulator's port name where the map names none.

        Raises
        ------
        UserError
            If the map names a line the emulator does not have.
        """
        roles = self.roles(channels)
        for role in self.signals:
            if role not in roles:
                guess = difflib.get_close_matches(role, roles, n=1)
                hint = f"; did you mean {guess[0]!r}?" if guess else ""
                raise UserError(f"{self.source}: signals.{role}: no such emulator line{hint}; "
                                f"allowed: {', '.join(roles)}")
        return {role: self.signals.get(role, SignalRef(role, mapped=False)) for role in roles}

    def merged(self, other: CaptureMap) -> CaptureMap:
        """This map with ``other``'s settings on top (command line over file)."""
        return CaptureMap(
            signals={**self.signals, **other.signals},
            format=other.format or self.format,
            time_column=other.time_column or self.time_column,
            sample_rate=other.sample_rate if other.sample_rate is not None else self.sample_rate,
            jitter=other.jitter if other.jitter else self.jitter,
            clock_ppm=other.clock_ppm if other.clock_ppm is not None else self.clock_ppm,
            source=other.source if other.signals else self.source,
        )


def _quantity(text: str | None, kind: str, field_name: str, *, positive: bool) -> float | None:
    if text is None:
        return None
    try:
        value, _ = parse_quantity(text, kind)
    except QuantityError as error:
        raise UserError(f"{field_name} = {text!r}: {error}") from None
    if value < 0 or (positive and value == 0):
        raise UserError(f"{field_name} = {text!r}: allowed: a value {'greater than' if positive else 'at least'} zero")
    return value


def _ppm(text: str | None, field_name: str) -> float | None:
    if text is None:
        return None
    match = re.fullmatch(r"\s*([0-9]*\.?[0-9]+(?:[eE][-+]?\d+)?)\s*ppm\s*", str(text))
    if not match:
        raise UserError(f"{field_name} = {text!r}: allowed: parts per million, such as '100 ppm'")
    return float(match.group(1))


def _map_from_model(model: _MapFile, source: str, labels: Mapping[str, str] | None = None) -> CaptureMap:
    """Build a map; ``labels`` name each option in messages (default: ``<source>: capture.<option>``)."""

    def label(key: str) -> str:
        return (labels or {}).get(key, f"{source}: capture.{key}")

    signals = {role: SignalRef.parse(text, label(role) if labels else f"{source}: signals.{role}")
               for role, text in model.signals.items()}
    opts = model.capture
    return CaptureMap(
        signals=signals,
        format=opts.format,
        time_column=opts.time_column,
        sample_rate=_quantity(opts.sample_rate, "frequency", label("sample_rate"), positive=True),
        jitter=_quantity(opts.jitter, "time", label("jitter"), positive=False) or 0.0,
        clock_ppm=_ppm(opts.clock_tolerance, label("clock_tolerance")),
        source=source,
    )


def load_capture_map(path: str | Path) -> CaptureMap:
    """Read a map file (TOML).

    The file has a ``[signals]`` table (emulator line = capture signal, ``~`` in front
    for an inverted line) and an optional ``[capture]`` table (``format``,
    ``time_column``, ``sample_rate``, ``jitter``, ``clock_tolerance``)::

        [signals]
        strobe = "D0"
        x_pos = "D1"
        x_neg = "D2"

        [capture]
        sample_rate = "100 MHz"

    Raises
    ------
    UserError
        Naming the field, the value and what is allowed.
    """
    path = Path(path)
    try:
        with path.open("rb") as handle:
            raw = tomllib.load(handle)
    except FileNotFoundError:
        raise UserError(f"{path}: no such file") from None
    except IsADirectoryError:
        raise UserError(f"{path}: is a folder, not a map file") from None
    except tomllib.TOMLDecodeError as error:
        raise UserError(f"{path}: not valid TOML: {error}") from None
    except UnicodeDecodeError:
        raise UserError(f"{path}: not a text file") from None
    try:
        model = _MapFile.model_validate(raw)
    except ValidationError as error:
        lines = []
        for item in error.errors():
            loc = ".".join(str(p) for p in item["loc"])
            if item["type"] == "extra_forbidden":
                known = list(_MapFile.model_fields) if len(item["loc"]) == 1 else list(_CaptureOptions.model_fields)
                lines.append(f"{path}: unknown key {loc!r}; known keys here: {', '.join(known)}")
            else:
                lines.append(f"{path}: {loc} = {item.get('input')!r}: {item['msg']}")
        raise UserError("\n".join(lines)) from None
    return _map_from_model(model, str(path))


def capture_map_from_args(pairs: Iterable[str] = (), *, sample_rate: str | None = None, jitter: str | None = None,
                          time_column: str | None = None, fmt: str | None = None,
                          clock_tolerance: str | None = None) -> CaptureMap:
    """A map from command-line options: ``ROLE=NAME`` pairs and the capture settings.

    Raises
    ------
    UserError
        For a pair without ``=`` or a bad quantity.
    """
    signals: dict[str, str] = {}
    for pair in pairs:
        role, sep, name = pair.partition("=")
        if not sep or not role.strip():
            raise UserError(f"--signal {pair!r}: allowed: LINE=NAME, such as 'strobe=D0' or 'x_pos=D1'")
        signals[role.strip()] = name
    if fmt is not None and fmt not in ("vcd", "csv"):
        raise UserError(f"--format = {fmt!r}: allowed: vcd, csv")
    model = _MapFile(signals=signals, capture=_CaptureOptions(
        format=fmt, time_column=time_column, sample_rate=sample_rate, jitter=jitter,  # type: ignore[arg-type]
        clock_tolerance=clock_tolerance))
    labels = {"sample_rate": "--sample-rate", "jitter": "--jitter", "clock_tolerance": "--clock-tolerance",
              **{role: f"--signal {role}" for role in signals}}
    return _map_from_model(model, "command line", labels)

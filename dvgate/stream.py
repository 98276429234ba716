"""Play a pulse program to a board over its serial link, and check what it emitted.

The streamer speaks the frame protocol of ``docs/link.md`` through any port object with
``read(size)`` and ``write(data)`` (a ``serial.Serial``, or the simulated board's
pseudo-terminal opened the same way). It:

1. reads the board's next sequence number and disarms it (which clears its books);
2. reads each channel's pulse counters as a baseline;
3. sends segments while the FIFO has room, then START, and keeps the FIFO ahead of
   playback by reading the telemetry; a frame the board did not apply (its sequence
   number shows it) is sent again, so every segment is applied exactly once;
4. after the last segment (flagged ``last``: the rates go to zero) waits for the owed
   pulses to come out, then reads every channel and checks the books exactly:
   ``2**F * (net pulses emitted + net pending) + owed == the program's integral``.

A port that fails mid-stream (the cable pulled, the board gone) raises
:class:`LinkLost` with a message saying so; the board then plays its underrun policy.

:func:`send_settings` sets fault injection the same way, exactly once: a channel's whole
fault set (FAULT frames) and a window of ignored strobes (an IGNORE frame);
:func:`parse_fault_setting` and :func:`parse_ignore_window` read them as a user writes them.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Protocol

from dvgate.config import CYCLE_UNITS, Quantity
from dvgate.errors import UserError
from dvgate.linkspec import COUNT_BITS, FAULT_SET_BITS, SEQ_BITS, FrameType, LinkParams, PlayState, Reason, host_lengths
from dvgate.params import STORM_PERIOD_BITS
from dvgate.sim.link_model import (
    ChannelFaults,
    Frame,
    FrameDecoder,
    Segment,
    Telemetry,
    asked,
    check_ignore,
    encode_command,
    encode_fault,
    encode_ignore,
    encode_segment,
    encode_telemetry_request,
    fit_segments,
    parse_telemetry,
)
from dvgate.sim.trace import Faults
from dvgate.units import QuantityError, parse_quantity

if TYPE_CHECKING:
    from dvgate.config import Config

_SEQ_MOD = 1 << SEQ_BITS
_COUNT_MOD = 1 << 32
#: The telemetry's ``ignored`` counter stops at this value (16 bits, saturating).
IGNORED_MAX = (1 << COUNT_BITS) - 1


class Port(Protocol):
    """What the streamer needs of a serial port."""

    def read(self, size: int = 1) -> bytes: ...

    def write(self, data: bytes) -> int | None: ...


class LinkLost(Exception):
    """The serial link failed mid-stream; the message says what happened and where."""


@dataclass(frozen=True)
class ChannelCheck:
    """One channel's books at the end of a stream.

    Attributes
    ----------
    name : str
        Channel name.
    asked : int
        The program's integral, fixed point (pulses x ``2**frac_bits``).
    pos, neg : int
        Pulses the board started on each line during the stream.
    pend_pos, pend_neg : int
        Pulses still waiting in the emitter.
    owed : int
        The owed amount, fixed point.
    frac_bits : int
        Fraction bits of ``asked`` and ``owed``.
    """

    name: str
    asked: int
    pos: int
    neg: int
    pend_pos: int
    pend_neg: int
    owed: int
    frac_bits: int

    @property
    def net(self) -> int:
        """Net pulses emitted (positive minus negative)."""
        return self.pos - self.neg

    @property
    def accounted(self) -> int:
        """Emitted, pending and owed together, fixed point."""
        return ((self.net + self.pend_pos - self.pend_neg) << self.frac_bits) + self.owed

    @property
    def exact(self) -> bool:
        """The board emitted exactly what the program asked for (the rest still owed)."""
        return self.accounted == self.asked

    @property
    def asked_pulses(self) -> float:
        return self.asked / (1 << self.frac_bits)

    @property
    def owed_pulses(self) -> float:
        return self.owed / (1 << self.frac_bits)


@dataclass
class StreamReport:
    """What a stream did and whether the board's counts match the program.

    ``strobes`` and ``ignored`` count the strobes seen and those ignored (in an ignore
    window) during the stream; ``faults`` holds each channel's fault set in force at
    the end, for the channels that have one.
    """

    segments: int
    refits: int
    frames_sent: int = 0
    frames_resent: int = 0
    telemetry_reads: int = 0
    underruns: int = 0
    rejected: dict[Reason, int] = field(default_factory=dict)
    channels: list[ChannelCheck] = field(default_factory=list)
    flags: dict[str, bool] = field(default_factory=dict)
    strobes: int = 0
    ignored: int = 0
    faults: dict[str, Faults] = field(default_factory=dict)
    seconds: float = 0.0
    policy: str = "rest"

    @property
    def ok(self) -> bool:
        """Every channel's books balance exactly."""
        return bool(self.channels) and all(c.exact for c in self.channels)

    def problems(self) -> list[str]:
        """Why the check failed, in words."""
        out = []
        for c in self.channels:
            if not c.exact:
                diff = (c.accounted - c.asked) / (1 << c.frac_bits)
                out.append(f"channel {c.name}: the board accounts for {diff:+.6g} pulses more than the program asked")
        if self.underruns and self.policy == "hold":
            out.append(f"{self.underruns} underrun(s): the board held the last rates while it waited for segments "
                       "(feed it faster: a higher baud rate, or longer segments)")
        if self.flags.get("saturated"):
            out.append("the owed amount saturated on the board: the books cannot balance")
        return out


class BoardClient:
    """Frames to and from one board: commands with sequence numbers, telemetry requests.

    Parameters
    ----------
    port : Port
        The open serial port.
    link : LinkParams
        The board's link (payload layouts, busy time).
    reply_timeout : float
        Seconds to wait for a telemetry reply before asking again.
    retries : int
        Requests before giving up.
    """

    def __init__(self, port: Port, link: LinkParams, *, reply_timeout: float, retries: int = 4) -> None:
        self.port = port
        self.link = link
        self.reply_timeout = reply_timeout
        self.retries = retries
        self.decoder = FrameDecoder(host_lengths(link))
        self.reads = 0
        self.frames_sent = 0
        self._fed = 0
        self._drain_until = 0

    def _write(self, data: bytes) -> None:
        try:
            self.port.write(data)
        except Exception as error:  # noqa: BLE001 - pyserial and the OS raise several types
            raise LinkLost(f"writing to the port failed: {error}") from None
        self.frames_sent += 1

    def _read(self) -> list[Frame]:
        """Bytes from the port through the decoder: the replies that ended."""
        try:
            data = self.port.read(256)
        except Exception as error:  # noqa: BLE001
            raise LinkLost(f"reading from the port failed: {error}") from None
        frames = []
        for byte in data:
            self._fed += 1
            frames += [e for e in self.decoder.feed(byte) if isinstance(e, Frame)]
        return frames

    def drain(self) -> None:
        """Wait for the filler that follows the last reply: the board is busy until it ends."""
        deadline = time.monotonic() + self.reply_timeout
        while self._fed < self._drain_until and time.monotonic() < deadline:
            self._read()

    def send(self, frame: bytes) -> None:
        """Send one frame."""
        self._write(frame)

    def telemetry(self, channel: int = 0) -> Telemetry:
        """Ask for a telemetry reply about ``channel`` and wait for it (asking again on silence).

        Raises
        ------
        LinkLost
            When the port fails, or no reply comes after every retry.
        """
        for _ in range(self.retries):
            # A request before the last reply's filler has ended would be refused (BUSY).
            self.drain()
            self._write(encode_telemetry_request(channel))
            deadline = time.monotonic() + self.reply_timeout
            while time.monotonic() < deadline:
                for frame in self._read():
                    self._drain_until = frame.first + self.link.reply_bytes
                    reply = parse_telemetry(frame.payload, self.link)
                    if reply.channel == channel:
                        self.reads += 1
                        return reply
        raise LinkLost(f"no telemetry reply from the board after {self.retries} requests "
                       f"of {self.reply_timeout:g} s each")


def program_segments(program, link: LinkParams) -> tuple[list[Segment], int]:  # noqa: ANN001 - a Program
    """A :class:`~dvgate.sim.program.Program` as link segments (short segments refitted)."""
    try:
        return fit_segments(list(program.segments()), link)
    except ValueError as error:
        raise UserError(f"the program cannot be streamed: {error}") from None


def stream(port: Port, link: LinkParams, segments: Sequence[Segment], *,
           names: Sequence[str], reply_timeout: float = 1.0, window: int | None = None,
           progress: Callable[[int, int], None] | None = None, settle_timeout: float | None = None,
           refits: int = 0) -> StreamReport:
    """Play ``segments`` on the board behind ``port`` and check its books at the end.

    Parameters
    ----------
    port : Port
        The open serial port.
    link : LinkParams
        The board's link, as its config says.
    segments : sequence of Segment
        The program, the last one flagged ``last``.
    names : sequence of str
        Channel names, for the report.
    reply_timeout : float
        Seconds to wait for a telemetry reply.
    window : int, optional
        Most frames sent ahead of what the board has applied (default: the FIFO depth).
    progress : callable, optional
        ``progress(done_cycles, total_cycles)`` as playback advances.
    settle_timeout : float, optional
        Seconds to wait after the end for the owed pulses to come out (default: ten
        reply timeouts).
    refits : int
        Short segments refitted (for the report).

    Raises
    ------
    LinkLost
        When the port fails or the board stops answering.
    """
    if not segments or not segments[-1].last:
        raise ValueError("a program ends with a segment flagged last")
    started = time.monotonic()
    board = BoardClient(port, link, reply_timeout=reply_timeout)
    report = StreamReport(segments=len(segments), refits=refits, policy=link.underrun)
    window = window or link.fifo_depth
    settle_timeout = settle_timeout if settle_timeout is not None else 10 * reply_timeout

    # 1. Disarm: stops anything playing, drops queued segments, clears the books.
    tm = board.telemetry(0)
    base = tm.next_seq
    _deliver(board, [encode_command(FrameType.DISARM, base)], base)
    base = (base + 1) % _SEQ_MOD
    # 2. Baselines of the pulse counters.
    baseline = [board.telemetry(ch) for ch in range(link.n)]
    played0 = baseline[0].played
    # 3. The program: the preload, START, then the rest, each with its sequence number.
    preload = min(len(segments), link.fifo_depth)
    items = [encode_segment((base + k) % _SEQ_MOD, seg, link) for k, seg in enumerate(segments[:preload])]
    items.append(encode_command(FrameType.START, (base + preload) % _SEQ_MOD))
    items += [encode_segment((base + preload + 1 + k) % _SEQ_MOD, seg, link)
              for k, seg in enumerate(segments[preload:])]
    starts = [0]
    for seg in segments:
        starts.append(starts[-1] + seg.duration)
    total = starts[-1]
    sent = 0          # items sent at least once, in order
    tm = baseline[-1] if link.n == 1 else board.telemetry(0)
    while True:
        applied = (tm.next_seq - base) % _SEQ_MOD
        if applied > len(items):
            raise LinkLost(f"the board's sequence number moved to {tm.next_seq}, past what was sent: "
                           "another host is talking to it")
        if applied < sent:
            report.frames_resent += sent - applied
            sent = applied  # go back: resend from the first frame not applied
        # Room: what the FIFO had free, less the segments sent since that are not applied yet.
        room = tm.free - sum(1 for k in range(applied, sent) if not _is_command(k, preload))
        while sent < len(items) and sent - applied < window and (room > 0 or _is_command(sent, preload)):
            board.send(items[sent])
            if not _is_command(sent, preload):
                room -= 1
            sent += 1
        played = (tm.played - played0) % _COUNT_MOD
        if progress is not None:
            progress(starts[min(played, len(segments))], total)
        if applied == len(items) and tm.play == PlayState.IDLE and played >= len(segments):
            break
        tm = board.telemetry(0)
    if progress is not None:
        progress(total, total)
    # 4. Let the owed whole pulses out: at least one strobe after the end, nothing pending.
    end_strobes = tm.strobes
    deadline = time.monotonic() + settle_timeout
    final = [board.telemetry(ch) for ch in range(link.n)]
    while time.monotonic() < deadline:
        settled = all(t.pend_pos == 0 and t.pend_neg == 0 for t in final)
        if settled and (final[-1].strobes - end_strobes) % _COUNT_MOD >= 2:
            break
        if final[-1].host_absent:
            break  # no strobes: the books still balance, the owed pulses simply wait
        final = [board.telemetry(ch) for ch in range(link.n)]
    want = asked(segments, link.n)
    for ch in range(link.n):
        t, b = final[ch], baseline[ch]
        report.channels.append(ChannelCheck(
            name=names[ch], asked=want[ch], pos=(t.pos - b.pos) % _COUNT_MOD, neg=(t.neg - b.neg) % _COUNT_MOD,
            pend_pos=t.pend_pos, pend_neg=t.pend_neg, owed=t.owed, frac_bits=link.hw.frac_bits))
    last = final[-1]
    report.underruns = (last.underruns - baseline[0].underruns) % (1 << 16)
    report.rejected = {r: (last.rejected[r] - baseline[0].rejected[r]) % (1 << 16) for r in Reason}
    report.flags = last.flags
    report.strobes = (last.strobes - baseline[0].strobes) % _COUNT_MOD
    # The ignored-strobe counter saturates (it never wraps); the fault sets are read at the end.
    report.ignored = last.ignored - baseline[0].ignored
    report.faults = {names[ch]: final[ch].faults for ch in range(link.n) if final[ch].faults != Faults()}
    report.frames_sent = board.frames_sent
    report.telemetry_reads = board.reads
    board.drain()  # the port is quiet again for the next client
    report.seconds = time.monotonic() - started
    return report


def _is_command(index: int, preload: int) -> bool:
    return index == preload


def _deliver(board: BoardClient, frames: list[bytes], base: int, channel: int = 0) -> tuple[Telemetry, int]:
    """Send sequenced frames (numbered from ``base``) until the board's sequence number
    shows each applied once; each try sends again from the first one not applied.

    Returns the telemetry (about ``channel``) that showed it, and the frames sent again.
    """
    done = resent = 0
    for attempt in range(board.retries):
        if attempt:
            resent += len(frames) - done
        for frame in frames[done:]:
            board.send(frame)
        tm = board.telemetry(channel)
        done = (tm.next_seq - base) % _SEQ_MOD
        if done > len(frames):
            raise LinkLost(f"the board's sequence number moved to {tm.next_seq}, past what was sent: "
                           "another host is talking to it")
        if done == len(frames):
            return tm, resent
    raise LinkLost(f"the board did not apply a command after {board.retries} tries")


# -- fault injection ----------------------------------------------------------------------

@dataclass(frozen=True)
class SettingsReport:
    """What :func:`send_settings` did.

    Attributes
    ----------
    faults : tuple of ChannelFaults
        Fault sets applied, in order.
    ignore : int or None
        Cycles of the ignore window applied.
    first_seq : int
        Sequence number of the first frame (the others follow).
    resent : int
        Frames sent again because the board had not applied them.
    telemetry : Telemetry
        The board's telemetry that showed every frame applied (about the last fault
        set's channel, else channel 0).
    in_force : dict of int to Faults
        The fault set in force on each channel set, read back from the board after it
        applied every frame.
    """

    faults: tuple[ChannelFaults, ...]
    ignore: int | None
    first_seq: int
    resent: int
    telemetry: Telemetry
    in_force: dict[int, Faults] = field(default_factory=dict)

    @property
    def ignored(self) -> int:
        """Strobes the board has ignored since its reset (saturates at 65535)."""
        return self.telemetry.ignored

    @property
    def mismatched(self) -> list[int]:
        """Channels whose fault set read back is not the last one sent (another host?)."""
        last = {setting.channel: setting.faults for setting in self.faults}
        return [ch for ch, faults in last.items() if self.in_force.get(ch) != faults]

    def seq(self, index: int) -> int:
        """Sequence number of the ``index``-th frame sent (the ignore window's comes last)."""
        return (self.first_seq + index) % _SEQ_MOD


def send_settings(port: Port, link: LinkParams, faults: Sequence[ChannelFaults] = (), ignore: int | None = None, *,
                  reply_timeout: float = 1.0) -> SettingsReport:
    """Set fault injection on the board behind ``port``, each setting applied exactly once.

    Reads the board's next sequence number, sends a FAULT frame for each fault set, in
    order, then an IGNORE frame for the window, and sends again from the first one the
    board did not apply until its sequence number shows them all applied (a frame is
    never applied twice: a repeat carries a number the board no longer expects). The
    board writes each setting to the emulator two cycles after applying its frame
    (``docs/link.md``, "Faults"), so the telemetry that shows them applied shows them in
    force: the fault set of each channel set is read back from it. Playback, arming and
    the books are untouched.

    Parameters
    ----------
    port : Port
        The open serial port.
    link : LinkParams
        The board's link.
    faults : sequence of ChannelFaults
        Whole fault sets, each replacing its channel's set.
    ignore : int, optional
        Strobes detected in this many cycles from the window's start are not taken.
    reply_timeout : float
        Seconds to wait for a telemetry reply.

    Raises
    ------
    ValueError
        For a setting the board would refuse (a channel it does not have, an empty window).
    LinkLost
        When the port fails or the board stops answering.
    """
    if not faults and ignore is None:
        raise ValueError("nothing to send: give a fault set or an ignore window")
    board = BoardClient(port, link, reply_timeout=reply_timeout)
    base = board.telemetry(0).next_seq
    frames = [encode_fault((base + k) % _SEQ_MOD, setting, link) for k, setting in enumerate(faults)]
    if ignore is not None:
        frames.append(encode_ignore((base + len(frames)) % _SEQ_MOD, ignore))
    # The telemetry that shows every frame applied is about the last channel set.
    channels = list(dict.fromkeys(setting.channel for setting in faults))
    tm, resent = _deliver(board, frames, base, channels[-1] if channels else 0)
    in_force = {ch: (tm if ch == tm.channel else board.telemetry(ch)).faults for ch in channels}
    # Let the last reply's filler end, so a request sent next over this port is not refused (busy).
    board.drain()
    return SettingsReport(tuple(faults), ignore, base, resent, tm, in_force)


def channel_index(config: Config, text: str) -> int:
    """A channel named by its name in the config or by its index (``CHANNEL``)."""
    names = [c.name for c in config.channels]
    if text in names:
        return names.index(text)
    if text.isdigit() and int(text) < len(names):
        return int(text)
    raise UserError(f"CHANNEL = {text!r}: allowed: a channel name ({', '.join(names)}) "
                    f"or an index 0 to {len(names) - 1}")


#: Words of a fault setting: the yes/no fields, ``storm=PERIOD``, or ``none``.
FAULT_WORDS = (*FAULT_SET_BITS, "storm=PERIOD", "none")


def _duration_cycles(config: Config, field: str, text: str) -> int:
    """A duration written with its unit (or in cycles) as whole clock cycles, at least 1."""
    try:
        value, unit = parse_quantity(text, "time", extra_units=CYCLE_UNITS)
    except QuantityError as error:
        raise UserError(f"{field} = {text!r}: {error}") from None
    if unit in CYCLE_UNITS and value != int(value):
        raise UserError(f"{field} = {text!r}: allowed: a whole number of cycles")
    return config.cycles(field, Quantity(value, unit, text))


def parse_fault_setting(config: Config, channel: str, words: Sequence[str]) -> ChannelFaults:
    """A channel's whole fault set as a user writes it: ``CHANNEL [WORD ...]``.

    Each word is one of :data:`FAULT_WORDS`: a yes/no field of the fault set
    (``silence_pos``, ``swap``, ...; ``-`` may stand for ``_``), ``storm=PERIOD`` with a
    duration such as ``"50 us"`` or ``"80 cycles"`` (extra pulses, one pulse width
    long, every period), or ``none`` alone (or no word): no fault on the channel.

    Raises
    ------
    UserError
        Naming the word, its value and what is allowed.
    """
    index = channel_index(config, channel)
    fields: dict[str, bool | int] = {}
    width = config.hw.width_cyc
    limit = (1 << STORM_PERIOD_BITS) - 1
    for raw in words:
        word = raw.strip().replace("-", "_")
        key, _, value = word.partition("=")
        if word == "none":
            if len(words) > 1:
                raise UserError(f"fault setting {raw!r}: 'none' clears every fault and stands alone")
        elif key in FAULT_SET_BITS and not value:
            fields[key] = True
        elif key in ("storm", "storm_period") and value:
            period = _duration_cycles(config, "storm", value)
            if period <= width:
                raise UserError(f"storm = {value!r} ({period} cycles): allowed: more than the pulse width "
                                f"({width} cycles; a shorter period holds the line active: use stuck_pos or stuck_neg)")
            if period > limit:
                raise UserError(f"storm = {value!r} ({period} cycles): allowed: at most {limit} cycles "
                                f"({limit / config.clock_hz:.6g} s at this clock)")
            fields["storm_period"] = period
        else:
            raise UserError(f"fault setting {raw!r}: allowed: {', '.join(FAULT_WORDS)}")
    if fields.get("storm_neg") and not fields.get("storm_period"):
        raise UserError("fault setting 'storm_neg': it puts the storm on the negative line; give storm=PERIOD too")
    return ChannelFaults(index, Faults(**fields))


def parse_ignore_window(config: Config, text: str) -> int:
    """An ignore window's length as a user writes it (``"5 ms"``, ``"1200 cycles"``), in cycles.

    Raises
    ------
    UserError
        Naming the value and what is allowed.
    """
    cycles = _duration_cycles(config, "--ignore-strobes", text)
    try:
        check_ignore(cycles)
    except ValueError as error:
        raise UserError(f"--ignore-strobes = {text!r}: {error}") from None
    return cycles


def describe_faults(faults: Faults) -> str:
    """A fault set in words, for reports."""
    words = [name for name in FAULT_SET_BITS if name != "storm_neg" and getattr(faults, name)]
    if faults.storm_period:
        words.append(f"storm every {faults.storm_period} cycles on the {'neg' if faults.storm_neg else 'pos'} line")
    return ", ".join(words) or "no fault"


@contextmanager
def progress_bar(console, clock_hz: float) -> Iterator[Callable[[int, int], None]]:  # noqa: ANN001 - a Console
    """A progress bar (rich) in program seconds; yields the ``progress`` callback of :func:`stream`."""
    from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn

    columns = (TextColumn("streaming"), BarColumn(), TextColumn("{task.completed:.3f} / {task.total:.3f} s"),
               TimeElapsedColumn())
    with Progress(*columns, console=console, transient=False, disable=not console.is_terminal) as bar:
        task = bar.add_task("stream", total=1.0)

        def update(done: int, total: int) -> None:
            bar.update(task, completed=done / clock_hz, total=max(total, 1) / clock_hz)

        yield update


def open_port(device: str, baud: int):  # noqa: ANN201 - a serial.Serial
    """Open a serial port with pyserial (8N1, short read timeout)."""
    import serial

    try:
        return serial.Serial(device, baudrate=baud, bytesize=8, parity="N", stopbits=1, timeout=0.02)
    except (serial.SerialException, ValueError, OSError) as error:
        raise UserError(f"--port {device}: cannot open it: {error}") from None


def load_stream_program(path: str | Path, config) -> tuple[list[Segment], int]:  # noqa: ANN001 - a Config
    """Read a program (``.npz`` from ``dvgate run``) and fit it to the config's link."""
    from dvgate.linkspec import link_params
    from dvgate.sim.program import check_program, load_program

    path = Path(path)
    if path.suffix != ".npz":
        raise UserError(f"{path}: expected a pulse program (.npz), such as the program.npz "
                        "`dvgate run` writes in its report folder")
    program = load_program(path)
    check_program(program, config)
    return program_segments(program, link_params(config))


__all__ = ["FAULT_WORDS", "IGNORED_MAX", "BoardClient", "ChannelCheck", "LinkLost", "SettingsReport", "StreamReport",
           "channel_index", "describe_faults", "load_stream_program", "open_port", "parse_fault_setting",
           "parse_ignore_window", "program_segments", "progress_bar", "send_settings", "stream"]

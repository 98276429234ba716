"""The host link in pure Python: frame codec, and the reference model of the board's link.

Two jobs, one source of truth (``docs/link.md``):

- **Codec** (used by the streamer): CRC-16/CCITT-FALSE, byte stuffing, frames for
  segments, commands, fault settings and telemetry requests, and a byte-by-byte
  :class:`FrameDecoder` that reads the board's replies.
- **Reference model** of the link on the board: the same decoder with the board's
  inter-byte timeout, the command layer (sequence numbers, FIFO room, the busy time of
  the telemetry reply), and the segment player (:class:`PlayerModel`) with its exact
  cycle rules. :class:`LinkModel` turns the bytes the board receives, with the cycle
  each one arrives, into the rate changes, arm changes, fault changes and ignore
  windows the emulator's model (:func:`dvgate.sim.model.run_model`) takes:
  :meth:`LinkModel.stimulus` (:func:`link_stimulus`).

Like every model here, it imports neither Amaranth nor the gateware.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field

from dvgate.linkspec import (
    BITS_PER_BYTE,
    ESC,
    ESC_XOR,
    FAULT_DELAY,
    FAULT_SET_BITS,
    FLAG,
    FLAG_BITS,
    IGNORE_BYTES,
    SEG_LAST,
    SEQ_BITS,
    SEQUENCED,
    STATE_BITS,
    STORM_BYTES,
    FrameType,
    LinkParams,
    PlayState,
    Reason,
    board_lengths,
    host_lengths,
)
from dvgate.params import IGNORE_CYCLES_BITS
from dvgate.sim.trace import FaultChange, Faults, RateChange, RunResult, Stimulus

_SEQ_MASK = (1 << SEQ_BITS) - 1
_COUNT_MAX = 0xFFFF
_WRAP32 = 1 << 32


# -- CRC and stuffing -------------------------------------------------------------------

def crc16(data: bytes | bytearray | Iterable[int], crc: int = 0xFFFF) -> int:
    """CRC-16/CCITT-FALSE: polynomial 0x1021, initial 0xFFFF, no reflection, no final XOR.

    Bit by bit, most significant bit first; ``crc16(b"123456789") == 0x29B1`` (the CRC
    catalogue's check value).
    """
    for byte in data:
        crc ^= byte << 8
        for _ in range(8):
            crc = ((crc << 1) ^ 0x1021) if crc & 0x8000 else (crc << 1)
            crc &= 0xFFFF
    return crc


def stuff(raw: bytes) -> bytes:
    """Escape every flag and escape byte: ``ESC, byte ^ 0x20``."""
    out = bytearray()
    for byte in raw:
        if byte in (FLAG, ESC):
            out += bytes((ESC, byte ^ ESC_XOR))
        else:
            out.append(byte)
    return bytes(out)


def encode_frame(ftype: int, payload: bytes) -> bytes:
    """A whole frame as sent: flag, then type, length, payload and CRC (big-endian), stuffed."""
    if not 0 <= ftype <= 0xFF:
        raise ValueError(f"frame type must be a byte, not {ftype!r}")
    if len(payload) > 0xFF:
        raise ValueError(f"a payload holds at most 255 bytes, not {len(payload)}")
    body = bytes((ftype, len(payload))) + payload
    crc = crc16(body)
    return bytes((FLAG,)) + stuff(body + bytes((crc >> 8, crc & 0xFF)))


# -- payloads ---------------------------------------------------------------------------

@dataclass(frozen=True)
class Segment:
    """One rate segment as the link carries it.

    Attributes
    ----------
    duration : int
        Clock cycles (ticks) the rates hold.
    rates : tuple of int
        Rate register value of each channel (fixed point, pulses per tick x ``2**frac_bits``).
    last : bool
        The program ends with this segment: after it every rate goes to zero and playback stops.
    """

    duration: int
    rates: tuple[int, ...]
    last: bool = False


def check_segment(segment: Segment, link: LinkParams, where: str = "segment") -> None:
    """Refuse a segment the board would reject as a format error (message names the field)."""
    hw = link.hw
    if len(segment.rates) != link.n:
        raise ValueError(f"{where}: {len(segment.rates)} rates for {link.n} channels")
    if not link.min_duration <= segment.duration < (1 << 32):
        raise ValueError(f"{where}: duration {segment.duration} cycles; allowed: "
                         f"{link.min_duration} to {(1 << 32) - 1} cycles")
    for name, rate in zip(hw.names, segment.rates, strict=True):
        if not hw.rate_min <= rate <= hw.rate_max:
            raise ValueError(f"{where}: rate {rate} of channel {name!r} does not fit the "
                             f"{hw.rate_bits}-bit rate register ({hw.rate_min} to {hw.rate_max})")


def segment_payload(seq: int, segment: Segment, link: LinkParams) -> bytes:
    """Payload of a segment frame: seq, flags, duration, then each rate, little-endian."""
    check_segment(segment, link)
    out = bytearray((seq & _SEQ_MASK).to_bytes(2, "little"))
    out.append(SEG_LAST if segment.last else 0)
    out += segment.duration.to_bytes(4, "little")
    for rate in segment.rates:
        out += rate.to_bytes(link.rate_bytes, "little", signed=True)
    return bytes(out)


def encode_segment(seq: int, segment: Segment, link: LinkParams) -> bytes:
    """A segment frame, ready to send."""
    return encode_frame(FrameType.SEGMENT, segment_payload(seq, segment, link))


def encode_command(ftype: FrameType, seq: int) -> bytes:
    """An ARM, DISARM or START frame with its sequence number."""
    if ftype not in (FrameType.ARM, FrameType.DISARM, FrameType.START):
        raise ValueError(f"{ftype!r} is not a command")
    return encode_frame(ftype, (seq & _SEQ_MASK).to_bytes(2, "little"))


def encode_telemetry_request(channel: int) -> bytes:
    """A telemetry request for one channel."""
    return encode_frame(FrameType.TELEMETRY, bytes((channel,)))


@dataclass(frozen=True)
class ChannelFaults:
    """A FAULT frame's setting: ``channel`` gets the whole fault set ``faults``."""

    channel: int
    faults: Faults


def fault_payload(seq: int, setting: ChannelFaults, link: LinkParams) -> bytes:
    """Payload of a FAULT frame: seq, channel, the set byte, the storm period, little-endian.

    Raises
    ------
    ValueError
        For a channel the board does not have (the board would refuse the frame).
    """
    if not 0 <= setting.channel < link.n:
        raise ValueError(f"fault channel {setting.channel}; allowed: 0 to {link.n - 1}")
    faults = setting.faults
    return ((seq & _SEQ_MASK).to_bytes(2, "little") + bytes((setting.channel, fault_set_byte(faults)))
            + faults.storm_period.to_bytes(STORM_BYTES, "little"))


def fault_set_byte(faults: Faults) -> int:
    """A fault set's yes/no fields as the ``set`` byte of a FAULT frame (and of the telemetry)."""
    return sum(1 << bit for bit, name in enumerate(FAULT_SET_BITS) if getattr(faults, name))


def faults_of(set_byte: int, storm_period: int) -> Faults:
    """The fault set a ``set`` byte and a storm period encode (unknown bits ignored)."""
    return Faults(storm_period=storm_period,
                  **{name: bool(set_byte >> bit & 1) for bit, name in enumerate(FAULT_SET_BITS)})


def encode_fault(seq: int, setting: ChannelFaults, link: LinkParams) -> bytes:
    """A FAULT frame, ready to send."""
    return encode_frame(FrameType.FAULT, fault_payload(seq, setting, link))


def parse_fault(payload: bytes, link: LinkParams) -> tuple[int, ChannelFaults | None]:
    """Sequence number and setting of a FAULT payload (None when a field is out of range)."""
    seq = int.from_bytes(payload[0:2], "little")
    channel, bits = payload[2], payload[3]
    storm = int.from_bytes(payload[4: 4 + STORM_BYTES], "little")
    if channel >= link.n or bits >> len(FAULT_SET_BITS):
        return seq, None
    try:
        faults = faults_of(bits, storm)
    except ValueError:  # a storm period too wide for the fault stage
        return seq, None
    return seq, ChannelFaults(channel, faults)


def check_ignore(cycles: int) -> None:
    """Refuse an ignore window the board would reject as a format error."""
    limit = (1 << min(IGNORE_CYCLES_BITS, 8 * IGNORE_BYTES)) - 1
    if not isinstance(cycles, int) or not 1 <= cycles <= limit:
        raise ValueError(f"ignore window of {cycles!r} cycles; allowed: 1 to {limit} cycles")


def encode_ignore(seq: int, cycles: int) -> bytes:
    """An IGNORE frame: strobes detected in the ``cycles`` cycles from the one it holds are not taken."""
    check_ignore(cycles)
    return encode_frame(FrameType.IGNORE, (seq & _SEQ_MASK).to_bytes(2, "little")
                        + cycles.to_bytes(IGNORE_BYTES, "little"))


def parse_ignore(payload: bytes) -> tuple[int, int | None]:
    """Sequence number and window length of an IGNORE payload (None when out of range)."""
    seq = int.from_bytes(payload[0:2], "little")
    cycles = int.from_bytes(payload[2: 2 + IGNORE_BYTES], "little")
    try:
        check_ignore(cycles)
    except ValueError:
        return seq, None
    return seq, cycles


# -- telemetry --------------------------------------------------------------------------

@dataclass(frozen=True)
class Telemetry:
    """A telemetry reply, field by field (``docs/link.md``).

    ``values`` holds every field of :attr:`LinkParams.telemetry_fields` by name; the
    properties read the packed ones.
    """

    values: dict[str, int]

    def __getattr__(self, name: str) -> int:
        try:
            return self.__dict__["values"][name]
        except KeyError:
            raise AttributeError(name) from None

    def _bits(self, byte: str, spec: tuple[int, int]) -> int:
        shift, width = spec
        return (self.values[byte] >> shift) & ((1 << width) - 1)

    @property
    def play(self) -> PlayState:
        return PlayState(self._bits("state", STATE_BITS["play"]))

    @property
    def armed(self) -> bool:
        return bool(self._bits("state", STATE_BITS["armed"]))

    @property
    def arm_pin(self) -> bool:
        return bool(self._bits("state", STATE_BITS["arm_pin"]))

    @property
    def host_absent(self) -> bool:
        return bool(self._bits("state", STATE_BITS["host_absent"]))

    @property
    def flags(self) -> dict[str, bool]:
        return {name: bool((self.values["flags"] >> i) & 1) for i, name in enumerate(FLAG_BITS)}

    @property
    def rejected(self) -> dict[Reason, int]:
        return {reason: self.values[f"rej_{reason.name.lower()}"] for reason in Reason}

    @property
    def faults(self) -> Faults:
        """The fault set in force on :attr:`channel` (``fault_set`` and ``storm_period``)."""
        return faults_of(self.values["fault_set"], self.values["storm_period"])


def parse_telemetry(payload: bytes, link: LinkParams) -> Telemetry:
    """Read a telemetry reply's payload."""
    expected = link.payload_len(FrameType.TELEMETRY_REPLY)
    if len(payload) != expected:
        raise ValueError(f"telemetry payload of {len(payload)} bytes; expected {expected}")
    values, offset = {}, 0
    for f in link.telemetry_fields:
        values[f.name] = int.from_bytes(payload[offset: offset + f.size], "little", signed=f.signed)
        offset += f.size
    return Telemetry(values)


def pack_telemetry(values: dict[str, int], link: LinkParams) -> bytes:
    """The payload of a telemetry reply holding ``values`` (missing fields are zero)."""
    out = bytearray()
    for f in link.telemetry_fields:
        value = values.get(f.name, 0)
        if not f.signed:
            value &= (1 << (8 * f.size)) - 1
        out += value.to_bytes(f.size, "little", signed=f.signed)
    return bytes(out)


# -- decoder ----------------------------------------------------------------------------

@dataclass(frozen=True)
class Frame:
    """A frame with a good CRC, as the decoder ends it.

    Attributes
    ----------
    type : int
        Frame type byte.
    payload : bytes
        Unstuffed payload.
    first, last : int
        Indices (in the order fed) of its flag byte and of its last byte.
    cycle : int or None
        Cycle at which the decoder ends it (the last byte's cycle plus one).
    payload_cycle : int or None
        Cycle at which the decoder presents its first payload byte.
    """

    type: int
    payload: bytes
    first: int
    last: int
    cycle: int | None = None
    payload_cycle: int | None = None


@dataclass(frozen=True)
class Rejection:
    """A frame (or a run of stray bytes) the decoder dropped, and why.

    ``first`` and ``last`` are the indices of the bytes it covers; ``cycle`` is when the
    board counts it; ``by_link`` marks a rejection by the command layer (a frame whose CRC
    matched but whose fields, sequence number or timing were refused).
    """

    reason: Reason
    first: int
    last: int
    cycle: int | None = None
    by_link: bool = False


_FRAME_STATES = ("TYPE", "LEN", "PAYLOAD", "CRC1", "CRC2")


class FrameDecoder:
    """Byte-by-byte frame decoder: the rules of ``docs/link.md``, section "Decoder".

    Parameters
    ----------
    lengths : dict
        Frame types this side accepts, with the payload length each must have.
    timeout_cyc : int, optional
        A frame with a gap of more than this many cycles between two bytes is dropped as
        truncated (the board's rule). Needs the cycle of each byte; None: no timeout.
    """

    def __init__(self, lengths: dict[int, int], timeout_cyc: int | None = None) -> None:
        self._lengths = dict(lengths)
        self._timeout = timeout_cyc
        self.state = "IDLE"
        self._esc = False
        self._index = -1
        self._last_cycle: int | None = None
        self._first = 0
        self._type = 0
        self._length = 0
        self._payload = bytearray()
        self._crc_hi = 0
        self._payload_cycle: int | None = None
        #: ``[first, last]`` byte indices each decoder rejection covers, including the
        #: bytes skipped after it (a noise run, or a bad frame's tail), in order.
        self.spans: list[list[int]] = []
        self._open: list[int] | None = None

    @property
    def in_frame(self) -> bool:
        return self.state in _FRAME_STATES

    def expire(self, cycle: int) -> list[Frame | Rejection]:
        """Apply the timeout up to ``cycle`` (a byte arriving at ``cycle`` not included)."""
        if self._timeout is None or self._last_cycle is None:
            return []
        if cycle - self._last_cycle <= self._timeout or self.state == "IDLE":
            return []
        out: list[Frame | Rejection] = []
        if self.in_frame:
            out.append(Rejection(Reason.TRUNCATED, self._first, self._index,
                                 self._last_cycle + self._timeout + 1))
            self.spans.append([self._first, self._index])
        self.state = "IDLE"
        self._esc = False
        self._open = None
        return out

    def feed(self, byte: int, cycle: int | None = None, framing_error: bool = False) -> list[Frame | Rejection]:
        """Take one byte (with the cycle it arrives, for the timeout); return what ended."""
        out = self.expire(cycle) if cycle is not None else []
        self._index += 1
        self._last_cycle = cycle
        end = None if cycle is None else cycle + 1
        index = self._index

        def reject(reason: Reason, first: int) -> None:
            out.append(Rejection(reason, first, index, end))
            self._open = [first, index]
            self.spans.append(self._open)

        if self._open is not None and self.state in ("NOISE", "SKIP") and not (byte == FLAG and not framing_error):
            self._open[1] = index

        if framing_error:
            if self.in_frame:
                reject(Reason.LINE, self._first)
                self.state = "SKIP"
            elif self.state == "IDLE":
                reject(Reason.NOISE, index)
                self.state = "NOISE"
            return out
        if byte == FLAG:
            if self.in_frame:
                out.append(Rejection(Reason.TRUNCATED, self._first, index - 1, end))
                self.spans.append([self._first, index - 1])
            self._open = None
            self.state = "TYPE"
            self._esc = False
            self._first = index
            self._payload = bytearray()
            self._payload_cycle = None
            return out
        if not self.in_frame:
            if self.state == "IDLE":
                reject(Reason.NOISE, index)
                self.state = "NOISE"
            return out
        if byte == ESC:
            if self._esc:
                reject(Reason.FORMAT, self._first)
                self.state = "SKIP"
            else:
                self._esc = True
            return out
        if self._esc:
            self._esc = False
            if byte not in (FLAG ^ ESC_XOR, ESC ^ ESC_XOR):
                reject(Reason.FORMAT, self._first)
                self.state = "SKIP"
                return out
            byte ^= ESC_XOR
        if self.state == "TYPE":
            if byte not in self._lengths:
                reject(Reason.FORMAT, self._first)
                self.state = "SKIP"
                return out
            self._type = byte
            self.state = "LEN"
        elif self.state == "LEN":
            if byte != self._lengths[self._type]:
                reject(Reason.FORMAT, self._first)
                self.state = "SKIP"
                return out
            self._length = byte
            self.state = "PAYLOAD" if byte else "CRC1"
        elif self.state == "PAYLOAD":
            if not self._payload:
                self._payload_cycle = end
            self._payload.append(byte)
            if len(self._payload) == self._length:
                self.state = "CRC1"
        elif self.state == "CRC1":
            self._crc_hi = byte
            self.state = "CRC2"
        else:
            self.state = "IDLE"
            received = (self._crc_hi << 8) | byte
            body = bytes((self._type, self._length)) + bytes(self._payload)
            if crc16(body) == received:
                out.append(Frame(self._type, bytes(self._payload), self._first, index, end, self._payload_cycle))
            else:
                reject(Reason.CRC, self._first)
        return out


def parse_segment(payload: bytes, link: LinkParams) -> tuple[int, Segment | None]:
    """Sequence number and segment of a segment payload (None when a field is out of range)."""
    seq = int.from_bytes(payload[0:2], "little")
    flags = payload[2]
    duration = int.from_bytes(payload[3:7], "little")
    rates = []
    for ch in range(link.n):
        at = 7 + ch * link.rate_bytes
        rates.append(int.from_bytes(payload[at: at + link.rate_bytes], "little", signed=True))
    segment = Segment(duration, tuple(rates), bool(flags & SEG_LAST))
    hw = link.hw
    ok = (flags & ~SEG_LAST) == 0 and duration >= link.min_duration and all(
        hw.rate_min <= r <= hw.rate_max for r in rates)
    return seq, segment if ok else None


# -- segment player ---------------------------------------------------------------------

_NONE, _STAGE, _ZERO = 0, 1, 2


class PlayerModel:
    """The segment player, cycle by cycle: ``docs/link.md``, section "Playback".

    Inputs for each cycle are given to :meth:`step`; :meth:`advance_to` runs quiet
    cycles, jumping over stretches where nothing but the segment countdown changes.

    Attributes
    ----------
    commits : list of (int, tuple of int)
        ``(cycle, rates)``: a rate commit at ``cycle``, so the rates are live from ``cycle + 1``.
    arm_changes : list of (int, bool)
        The arm output's level from that cycle on.
    underrun_cycles : list of int
        Cycles at which an underrun was counted.
    loads : list of (int, int)
        ``(cycle, duration)`` of every segment committed.
    boundaries : list of int
        Cycles at which a playing segment ended (or playback began).
    """

    def __init__(self, link: LinkParams) -> None:
        self.link = link
        self.n = link.n
        self.t = 0
        self.state = PlayState.IDLE
        self.left = 0
        self.staged = False
        self.st_dur = 0
        self.st_last = False
        self.cur_last = False
        self.queued = 0
        self.need_zero = link.underrun == "rest"
        self.job = _NONE
        self.job_t0 = 0
        self.job_seg: Segment | None = None
        self.arm = False
        self.played = 0
        self.underruns = 0
        self.fifo: list[Segment] = []
        self.shadow = list(link.hw.rates)
        self.live = list(link.hw.rates)
        self.commits: list[tuple[int, tuple[int, ...]]] = []
        self.arm_changes: list[tuple[int, bool]] = []
        self.underrun_cycles: list[int] = []
        self.loads: list[tuple[int, int]] = []
        self.boundaries: list[int] = []

    @property
    def level(self) -> int:
        """Segments waiting: queued in the FIFO plus the one staged."""
        return self.queued + int(self.staged)

    @property
    def room(self) -> bool:
        return self.queued < self.link.fifo_depth

    def _stage_ok(self) -> bool:
        playing = self.state == PlayState.PLAYING
        return (self.job == _NONE and self.queued > 0 and not self.staged
                and not (self.cur_last and playing)
                and (not playing or self.left >= self.link.stage_cyc))

    def _quiet(self) -> bool:
        if self.job != _NONE or self._stage_ok() or self.need_zero:
            return False
        if self.state == PlayState.PLAYING:
            return self.left > 0
        if self.state == PlayState.STARVED:
            return not self.staged
        return True

    def advance_to(self, cycle: int) -> None:
        """Run every cycle before ``cycle`` with no inputs."""
        while self.t < cycle:
            if self._quiet():
                jump = cycle - self.t
                if self.state == PlayState.PLAYING:
                    jump = min(jump, self.left)
                    self.left -= jump
                self.t += jump
            else:
                self.step()

    def step(self, *, commit: bool = False, start: bool = False, arm_on: bool = False,
             stop: bool = False, segment: Segment | None = None) -> None:
        """Run cycle ``self.t`` with these inputs; ``segment`` is the one ``commit`` queues."""
        t, n, link = self.t, self.n, self.link
        rest = link.underrun == "rest"
        state0 = self.state
        # Writer decision at t (registers at t).
        decide = _NONE
        if self.job == _NONE:
            if self._stage_ok():
                decide = _STAGE
            elif self.need_zero:
                decide = _ZERO
        # The running job's shadow writes at t.
        stage_done = False
        if self.job == _STAGE:
            j = t - self.job_t0
            seg = self.job_seg
            if j == 1:
                self.st_dur, self.st_last = seg.duration, seg.last
            elif 2 <= j <= n + 1:
                self.shadow[j - 2] = seg.rates[j - 2]
            if j == n + 1:
                stage_done = True
        elif self.job == _ZERO:
            j = t - self.job_t0
            self.shadow[j - 1] = 0
        # Boundary and commit at t.
        load = end = underrun = False
        if not stop:
            if self.state == PlayState.PLAYING and self.left == 0:
                self.boundaries.append(t)
                if self.staged:
                    load = True
                elif self.cur_last:
                    end = True
                else:
                    underrun = True
            elif self.state == PlayState.STARVED and self.staged:
                load = True
        do_commit = load or end or (underrun and rest)
        if do_commit:
            self.live = list(self.shadow)
            self.commits.append((t, tuple(self.live)))
        # Next-state values.
        arm = self.arm
        if stop:
            self.state = PlayState.IDLE
            self.left = 0
            self.staged = False
            self.cur_last = False
            self.queued = 0
            self.fifo.clear()
            self.job = _NONE
            self.job_seg = None
            self.need_zero = rest
            arm = False
        else:
            if load:
                self.loads.append((t, self.st_dur))
                self.left = self.st_dur - 1
                self.cur_last = self.st_last
                self.staged = False
                self.played = (self.played + 1) % _WRAP32
                self.state = PlayState.PLAYING
            elif end:
                self.state = PlayState.IDLE
                self.cur_last = False
            elif underrun:
                self.underruns = min(self.underruns + 1, _COUNT_MAX)
                self.underrun_cycles.append(t)
                self.state = PlayState.STARVED
            elif self.state == PlayState.PLAYING:
                self.left -= 1
            if stage_done:
                self.job = _NONE
                self.staged = True
                self.queued -= 1
            elif self.job == _ZERO and t - self.job_t0 == n:
                self.job = _NONE
            if decide == _STAGE:
                self.job, self.job_t0 = _STAGE, t
                self.job_seg = self.fifo.pop(0)
                self.need_zero = False
            elif decide == _ZERO:
                self.job, self.job_t0 = _ZERO, t
                self.need_zero = False
            if load:
                self.need_zero = rest or self.cur_last
            if start and state0 == PlayState.IDLE:
                self.state = PlayState.PLAYING
                self.left = 0
            if start or arm_on:
                arm = True
            if commit:
                if segment is None:
                    raise ValueError("a commit needs its segment")
                self.queued += 1
                self.fifo.append(segment)
        if arm != self.arm:
            self.arm = arm
            self.arm_changes.append((t + 1, arm))
        self.t = t + 1


# -- the board's link -------------------------------------------------------------------

@dataclass(frozen=True)
class Applied:
    """A frame the board applied, at ``cycle`` (``seq`` None for a telemetry request).

    ``channel`` is that of a telemetry request or a fault setting; ``faults`` the setting
    of a FAULT frame, ``ignore`` the window length of an IGNORE frame.
    """

    cycle: int
    type: int
    seq: int | None
    segment: Segment | None = None
    channel: int | None = None
    frame: Frame | None = None
    faults: Faults | None = None
    ignore: int | None = None


@dataclass
class LinkCounters:
    """The link's counters as the telemetry reports them."""

    next_seq: int = 0
    accepted: int = 0
    rejected: dict[Reason, int] = field(default_factory=lambda: {r: 0 for r in Reason})

    def count(self, reason: Reason) -> None:
        self.rejected[reason] = min(self.rejected[reason] + 1, _COUNT_MAX)


class LinkModel:
    """The board's side of the link: decoder, command layer and segment player.

    Feed it the bytes the board's UART receiver delivers, each with the cycle it is
    valid (:func:`rx_cycle` computes that from the wire); then :meth:`finish`.

    Attributes
    ----------
    player : PlayerModel
        Playback state and its rate commits.
    counters : LinkCounters
        Sequence number and frame counters.
    applied : list of Applied
        Every frame applied, in order.
    rejections : list of Rejection
        Every rejection, in order, with the reason the board counts.
    replies : list of (int, dict)
        For each telemetry request applied: its cycle and the link's fields of the reply
        (those the link model knows; the emulator's come from its own model).
    fault_changes : list of FaultChange
        Each FAULT frame applied at cycle ``e``, as the emulator's stimulus: the channel's
        set holds from ``e + FAULT_DELAY``.
    ignore_windows : list of (int, int)
        Each IGNORE frame applied at ``e``: the window ``(e + FAULT_DELAY, cycles)``.
    """

    def __init__(self, link: LinkParams) -> None:
        self.link = link
        self.player = PlayerModel(link)
        self.decoder = FrameDecoder(board_lengths(link), link.timeout_cyc)
        self.counters = LinkCounters()
        self.applied: list[Applied] = []
        self.rejections: list[Rejection] = []
        self.replies: list[tuple[int, dict[str, int]]] = []
        self.fault_changes: list[FaultChange] = []
        self.ignore_windows: list[tuple[int, int]] = []
        self._reply_cycle: int | None = None

    def feed(self, byte: int, cycle: int, framing_error: bool = False) -> None:
        """A byte from the UART receiver, valid at ``cycle``."""
        for event in self.decoder.feed(byte, cycle, framing_error):
            self._end(event)

    def feed_all(self, arrivals: Iterable[tuple[int, int]]) -> None:
        """``(cycle, byte)`` pairs, in order."""
        for cycle, byte in arrivals:
            self.feed(byte, cycle)

    def finish(self, cycle: int) -> None:
        """Run up to ``cycle`` (not included): timeouts, then playback."""
        for event in self.decoder.expire(cycle):
            self._end(event)
        self.player.advance_to(cycle)

    def _end(self, event: Frame | Rejection) -> None:
        cycle = event.cycle
        if isinstance(event, Rejection):
            self.player.advance_to(cycle)
            self.counters.count(event.reason)
            self.rejections.append(event)
            return
        link, player, counters = self.link, self.player, self.counters
        ftype = FrameType(event.type)
        room = True
        if ftype == FrameType.SEGMENT:
            player.advance_to(event.payload_cycle)
            room = player.room
        player.advance_to(cycle)
        seq = int.from_bytes(event.payload[0:2], "little") if ftype in SEQUENCED else None
        segment = setting = window = None
        bad = False
        if ftype == FrameType.SEGMENT:
            seq, segment = parse_segment(event.payload, link)
            bad = segment is None
        elif ftype == FrameType.FAULT:
            seq, setting = parse_fault(event.payload, link)
            bad = setting is None
        elif ftype == FrameType.IGNORE:
            seq, window = parse_ignore(event.payload)
            bad = window is None
        elif ftype == FrameType.TELEMETRY:
            bad = event.payload[0] >= link.n
        reason = None
        if bad:
            reason = Reason.FORMAT
        elif seq is not None and seq != counters.next_seq:
            reason = Reason.SEQUENCE
        elif ftype == FrameType.SEGMENT and not room:
            reason = Reason.FULL
        elif ftype == FrameType.TELEMETRY and self._reply_cycle is not None and \
                cycle - self._reply_cycle < link.reply_busy_cyc:
            reason = Reason.BUSY
        if reason is not None:
            counters.count(reason)
            self.rejections.append(Rejection(reason, event.first, event.last, cycle, by_link=True))
            player.step()
            return
        channel = event.payload[0] if ftype == FrameType.TELEMETRY else None
        if ftype == FrameType.TELEMETRY:
            self._reply_cycle = cycle
            self.replies.append((cycle, self.link_fields(channel, cycle)))
        if setting is not None:
            channel = setting.channel
            self.fault_changes.append(FaultChange(cycle + FAULT_DELAY, setting.channel, setting.faults))
        if window is not None:
            self.ignore_windows.append((cycle + FAULT_DELAY, window))
        self.applied.append(Applied(cycle, int(ftype), seq, segment, channel, event,
                                    setting.faults if setting is not None else None, window))
        counters.accepted = (counters.accepted + 1) % _WRAP32
        if seq is not None:
            counters.next_seq = (counters.next_seq + 1) & _SEQ_MASK
        player.step(commit=ftype == FrameType.SEGMENT, segment=segment,
                    start=ftype == FrameType.START, arm_on=ftype == FrameType.ARM,
                    stop=ftype == FrameType.DISARM)

    def link_fields(self, channel: int | None = None, cycle: int | None = None) -> dict[str, int]:
        """The telemetry fields the link and the player hold, as they stand now.

        With a ``channel``: also the channel and its fault set in force at ``cycle``
        (default: every setting applied so far), as the reply encodes them.
        """
        p, c = self.player, self.counters
        fields = {
            "next_seq": c.next_seq, "play": int(p.state), "armed": int(p.arm), "level": p.level,
            "free": self.link.fifo_depth - p.queued, "played": p.played, "underruns": p.underruns,
            "accepted": c.accepted,
        }
        fields.update({f"rej_{r.name.lower()}": v for r, v in c.rejected.items()})
        if channel is not None:
            faults = self.faults_at(channel, cycle)
            fields.update(channel=channel, fault_set=fault_set_byte(faults), storm_period=faults.storm_period)
        return fields

    def faults_at(self, channel: int, cycle: int | None = None) -> Faults:
        """The fault set in force on ``channel`` at ``cycle`` (default: after every setting applied)."""
        out = Faults()
        for change in self.fault_changes:
            if change.channel == channel and (cycle is None or change.cycle <= cycle):
                out = change.faults
        return out

    def stimulus(self, cycles: int, strobe_edges: Sequence[int]) -> Stimulus:
        """The emulator's stimulus for a run of ``cycles`` cycles: :func:`link_stimulus`
        with this link's fault changes and ignore windows (run :meth:`finish` first)."""
        return link_stimulus(self.player, cycles, tuple(strobe_edges), fault_changes=self.fault_changes,
                             ignore_windows=self.ignore_windows)

    def telemetry_stimulus(self, cycles: int, strobe_edges: Sequence[int]) -> Stimulus:
        """:meth:`stimulus` without the output faults (silence, stuck, swap, storm; ``no_rest``
        stays): the reference model's output pulses of it are the emitter's, which the
        telemetry counts (``docs/link.md``, "Faults"), and its status and books are the same."""
        changes = [FaultChange(c.cycle, c.channel, Faults(no_rest=c.faults.no_rest)) for c in self.fault_changes]
        return link_stimulus(self.player, cycles, tuple(strobe_edges), fault_changes=changes,
                             ignore_windows=self.ignore_windows)

    def segments_applied(self) -> list[Segment]:
        """The segments accepted into the FIFO, in order."""
        return [a.segment for a in self.applied if a.segment is not None]


# -- wire timing ------------------------------------------------------------------------

def rx_cycle(start_cycle: int, bit_cyc: int) -> int:
    """Cycle the board's receiver offers a byte whose start bit falls at ``start_cycle``.

    Two synchronizer flip-flops, half a bit to the start bit's middle, nine bits more to
    the stop bit's middle, and one cycle to register the byte (``docs/link.md``, "UART").
    """
    return start_cycle + 9 * bit_cyc + bit_cyc // 2 + 3


@dataclass(frozen=True)
class WireByte:
    """A byte on the wire: its value and the cycle its start bit falls."""

    value: int
    start: int


def schedule(chunks: Sequence[tuple[bytes, int]], bit_cyc: int, first: int = 0) -> list[WireByte]:
    """Bytes sent back to back, with an idle gap (in cycles) before each chunk.

    Parameters
    ----------
    chunks : sequence of (bytes, int)
        Data and the idle cycles on the line before it (after the previous byte's stop bit).
    bit_cyc : int
        Cycles per bit.
    first : int
        Cycle at which the line may first leave idle.
    """
    out = []
    t = first
    for data, gap in chunks:
        t += gap
        for value in data:
            out.append(WireByte(value, t))
            t += BITS_PER_BYTE * bit_cyc
    return out


def arrivals(wire: Sequence[WireByte], bit_cyc: int) -> list[tuple[int, int]]:
    """``(cycle, byte)`` as the board's receiver offers them."""
    return [(rx_cycle(w.start, bit_cyc), w.value) for w in wire]


# -- into the emulator's model ----------------------------------------------------------

def link_stimulus(player: PlayerModel, cycles: int, strobe_edges: tuple[int, ...], *,
                  fault_changes: Sequence[FaultChange] = (),
                  ignore_windows: Sequence[tuple[int, int]] = ()) -> Stimulus:
    """The link's effect as the emulator's stimulus: rate changes and arm changes from the
    player, and the fault changes and ignore windows of the FAULT and IGNORE frames
    applied (:attr:`LinkModel.fault_changes`, :attr:`LinkModel.ignore_windows`).

    The arm pin is taken as held high, so the emulator's ``arm`` input is the player's
    arm output. Settings from cycle ``cycles`` on are left out, as are rate changes.
    """
    changes = []
    live = list(player.link.hw.rates)
    for cycle, rates in player.commits:
        if cycle + 1 >= cycles:
            break
        for ch, rate in enumerate(rates):
            if rate != live[ch]:
                changes.append(RateChange(cycle + 1, ch, rate))
                live[ch] = rate
    arm = tuple((c, level) for c, level in player.arm_changes if c < cycles)
    return Stimulus(cycles=cycles, strobe_edges=tuple(strobe_edges), rate_changes=tuple(changes),
                    arm_changes=arm or ((0, False),),
                    fault_changes=tuple(c for c in fault_changes if c.cycle < cycles),
                    ignore_windows=tuple(w for w in ignore_windows if w[0] < cycles))


def reply_values(fields: dict[str, int], at: RunResult, *, arm_pin: bool = True) -> dict[str, int]:
    """Every field of a telemetry reply: the link model's ``fields`` (one entry of
    :attr:`LinkModel.replies`) with the emulator's status, pulse counts and the channel's
    books from ``at``, the reference model's result of a run up to the request's cycle
    (stimulus: :meth:`LinkModel.telemetry_stimulus` of that many cycles, whose output
    pulses are the emitter's). ``arm_pin`` is the arm pin's level.

    :func:`pack_telemetry` of it is the payload the board must send.
    """
    status, channel = at.status, fields["channel"]
    state = {"play": fields["play"], "armed": fields["armed"], "arm_pin": int(arm_pin),
             "host_absent": int(status.host_absent)}
    pos, neg = at.counts(channel)
    books = at.channels[channel]
    values = dict(fields)
    for name in ("play", "armed"):
        del values[name]
    values.update(
        state=sum(value << STATE_BITS[name][0] for name, value in state.items()),
        flags=sum(int(getattr(status, name)) << bit for bit, name in enumerate(FLAG_BITS)),
        strobes=status.strobes, period=status.period, overruns=status.overruns, clamps=status.clamps,
        deferrals=status.deferrals, saturations=status.saturations, ignored=status.ignored,
        pos=pos % _WRAP32, neg=neg % _WRAP32, pend_pos=books.pend_pos, pend_neg=books.pend_neg, owed=books.owed,
    )
    return values


def asked(segments: Sequence[Segment], n: int) -> list[int]:
    """Sum of rate x duration of each channel over the segments (fixed point, exact)."""
    total = [0] * n
    for seg in segments:
        for ch in range(n):
            total[ch] += seg.rates[ch] * seg.duration
    return total


# -- programs into segments -------------------------------------------------------------

def fit_segments(pairs: Sequence[tuple[int, Sequence[int]]], link: LinkParams) -> tuple[list[Segment], int]:
    """Segments the board takes, with the same integral as ``pairs`` at every fitted boundary.

    A segment shorter than :attr:`LinkParams.min_duration` is merged with the segments
    after it (or, at the end, before it) into a span of at least four times that length,
    and the span is split again into three segments of whole rates whose integral over
    the span is exactly the original's, channel by channel, and whose total length is
    the same (:func:`_respan`). Elsewhere the segments are sent unchanged.

    Returns
    -------
    list of Segment
        The segments, the last one flagged ``last``.
    int
        How many spans were refitted.
    """
    dmin = link.min_duration
    items = [(int(d), tuple(int(r) for r in rates)) for d, rates in pairs]
    if not items:
        raise ValueError("a program has at least one segment")
    out: list[tuple[int, tuple[int, ...]]] = []
    refits = 0
    i = 0
    while i < len(items):
        d, rates = items[i]
        if d >= dmin:
            out.append((d, rates))
            i += 1
            continue
        # Gather a span of at least 4 x dmin, forward first, then backward from what is out.
        span = [items[i]]
        i += 1
        while sum(s[0] for s in span) < 4 * dmin and i < len(items):
            span.append(items[i])
            i += 1
        while sum(s[0] for s in span) < 4 * dmin and out:
            span.insert(0, out.pop())
        refits += 1
        out.extend(_respan(span, link))
    segments = [Segment(d, r) for d, r in out]
    segments[-1] = Segment(segments[-1].duration, segments[-1].rates, True)
    for index, seg in enumerate(segments):
        check_segment(seg, link, f"segment {index}")
    return segments, refits


def _respan(span: list[tuple[int, tuple[int, ...]]], link: LinkParams) -> list[tuple[int, tuple[int, ...]]]:
    """Split a span into three segments with the same exact integral, channel by channel.

    Lengths ``a = dmin``, ``c = dmin + 1`` and ``m = total - a - c``. A channel whose
    integral over the span is ``I = x * total + b`` (``0 <= b < total``) gets rates
    ``x + p``, ``x + q`` and ``x``, with ``p * a + q * c = b``: ``a`` and ``c`` are
    coprime, so ``q = b / c mod a`` and ``p = (b - q * c) / a`` are whole numbers.
    """
    dmin = link.min_duration
    total = sum(d for d, _ in span)
    a, c = dmin, dmin + 1
    m = total - a - c
    if m < dmin:
        raise ValueError(f"a program of {total} cycles is too short for the link: segments are at "
                         f"least {dmin} cycles, and a short one needs {3 * dmin + 1} cycles around it")
    rates_a, rates_c, rates_m = [], [], []
    for ch in range(link.n):
        integral = sum(d * r[ch] for d, r in span)
        x, b = divmod(integral, total)
        q = (b * pow(c, -1, a)) % a
        p = (b - q * c) // a
        rates_a.append(x + p)
        rates_c.append(x + q)
        rates_m.append(x)
    return [(a, tuple(rates_a)), (c, tuple(rates_c)), (m, tuple(rates_m))]


__all__ = [
    "Applied", "ChannelFaults", "Frame", "FrameDecoder", "LinkCounters", "LinkModel", "PlayerModel", "Rejection",
    "Segment", "Telemetry", "WireByte", "arrivals", "asked", "board_lengths", "check_ignore", "check_segment",
    "crc16", "encode_command", "encode_fault", "encode_frame", "encode_ignore", "encode_segment",
    "encode_telemetry_request", "fault_payload", "fault_set_byte", "faults_of", "fit_segments", "host_lengths",
    "link_stimulus", "pack_telemetry", "parse_fault", "parse_ignore", "parse_segment", "parse_telemetry",
    "reply_values", "rx_cycle", "schedule", "segment_payload", "stuff",
]

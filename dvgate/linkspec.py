"""The host link's specification: frame format, payload layouts and the link's integers.

Everything the gateware (``dvgate.gateware.link`` and friends), the pure-Python model
(``dvgate.sim.link_model``) and the streamer (``dvgate.stream``) must agree on lives
here, as plain Python: byte values, frame types, rejection reasons, payload layouts,
and :class:`LinkParams`, the integers derived from the config's ``[link]`` section.
The frame format is described for people in ``docs/link.md``.

This module imports nothing from Amaranth, so the model stays independent of the
gateware.
"""

from __future__ import annotations

import enum
from dataclasses import dataclass
from typing import TYPE_CHECKING, Literal

from pydantic import BaseModel, ConfigDict, Field

from dvgate.config import Duration, Quantity, section
from dvgate.errors import UserError
from dvgate.params import EVENT_COUNT_BITS, IGNORE_CYCLES_BITS, STORM_PERIOD_BITS, HardwareParams

if TYPE_CHECKING:
    from dvgate.config import Config

#: First byte of every frame; never appears anywhere else on the wire.
FLAG = 0x7E
#: Escape byte: the next byte is sent XOR :data:`ESC_XOR`.
ESC = 0x7D
ESC_XOR = 0x20
#: Byte the board sends after a reply to give every reply the same length.
FILLER = 0xFF
#: Bits per byte on the wire: one start, eight data, one stop (8N1).
BITS_PER_BYTE = 10
#: Fewest clock cycles per bit the receiver can sample in the middle of.
MIN_BIT_CYC = 4
#: Largest baud-rate error the divider may leave (a UART tolerates a few percent).
MAX_BAUD_ERROR = 0.02


class FrameType(enum.IntEnum):
    """The byte after the flag: what the frame carries."""

    #: Host to board: one rate segment (sequenced).
    SEGMENT = 0x01
    #: Host to board: enable the outputs (sequenced).
    ARM = 0x02
    #: Host to board: disable the outputs, stop playback, drop queued segments (sequenced).
    DISARM = 0x03
    #: Host to board: arm and start playback on the same cycle (sequenced).
    START = 0x04
    #: Host to board: ask for a telemetry reply about one channel (not sequenced).
    TELEMETRY = 0x05
    #: Host to board: one channel's whole fault set (sequenced).
    FAULT = 0x06
    #: Host to board: ignore the strobes for a window of cycles (sequenced).
    IGNORE = 0x07
    #: Board to host: the reply to :attr:`TELEMETRY`.
    TELEMETRY_REPLY = 0x85


#: Types whose frames carry a sequence number and are applied exactly once.
SEQUENCED = (FrameType.SEGMENT, FrameType.ARM, FrameType.DISARM, FrameType.START, FrameType.FAULT,
             FrameType.IGNORE)


class Reason(enum.IntEnum):
    """Why a frame was rejected; the index of its counter in the telemetry."""

    #: The CRC did not match.
    CRC = 0
    #: A frame cut short: no byte for the timeout, or a flag byte inside it.
    TRUNCATED = 1
    #: Unknown type, wrong length, a bad escape, or a value outside its field.
    FORMAT = 2
    #: Bytes outside any frame (one count per run of them).
    NOISE = 3
    #: A byte with a bad stop bit inside a frame.
    LINE = 4
    #: A sequenced frame whose number is not the one expected (a repeat, or one lost before it).
    SEQUENCE = 5
    #: A segment with the FIFO full.
    FULL = 6
    #: A telemetry request while the previous reply is still being sent.
    BUSY = 7


class PlayState(enum.IntEnum):
    """Segment playback state, as the telemetry reports it."""

    IDLE = 0
    PLAYING = 1
    STARVED = 2


#: Bits of the telemetry's ``state`` byte.
STATE_BITS = {"play": (0, 2), "armed": (2, 1), "arm_pin": (3, 1), "host_absent": (4, 1)}
#: Bits of the telemetry's ``flags`` byte (the emulator's sticky flags).
FLAG_BITS = ("overrun", "clamped", "deferred", "saturated")
#: Segment ``flags`` byte: this segment ends the program (rates go to zero after it).
SEG_LAST = 0x01

#: Width of the sequence number, the FIFO counters and the rejection counters.
SEQ_BITS = 16
COUNT_BITS = EVENT_COUNT_BITS
#: Bits of a duration; a FIFO word holds a duration and the ``last`` flag above it.
DURATION_BITS = 32

#: FAULT frame's ``set`` byte: the fault set's yes/no fields, bit 0 first (the rest must be 0).
FAULT_SET_BITS = ("silence_pos", "silence_neg", "stuck_pos", "stuck_neg", "swap", "no_rest", "storm_neg")
#: Bytes of a FAULT frame's ``storm_period`` (cycles; 0 is no storm).
STORM_BYTES = (STORM_PERIOD_BITS + 7) // 8
#: Bytes of an IGNORE frame's ``cycles``.
IGNORE_BYTES = (IGNORE_CYCLES_BITS + 7) // 8
#: Cycles from a FAULT or IGNORE frame's application (cycle ``e``) to the cycle its
#: setting holds from: the link writes the emulator's port at ``e + 1``, which takes
#: effect a cycle later (``docs/link.md``, "Faults").
FAULT_DELAY = 2


@dataclass(frozen=True)
class PayloadField:
    """One field of a payload: name, size in bytes, signed or not. Little-endian."""

    name: str
    size: int
    signed: bool = False


class LinkSettings(BaseModel):
    """The ``[link]`` section of an emulator config, as written."""

    model_config = ConfigDict(extra="forbid", frozen=True, validate_default=True)

    baud: int = Field(default=115200, ge=300, le=12_000_000)
    underrun: Literal["hold", "rest"] = "rest"
    fifo_depth: int = Field(default=64, ge=2, le=4096)
    timeout: Duration = Field(default="10 ms")


@dataclass(frozen=True)
class LinkParams:
    """Integer description of the host link of one emulator.

    Attributes
    ----------
    hw : HardwareParams
        The emulator the link feeds.
    bit_cyc : int
        Clock cycles per bit on the wire (``round(clock / baud)``).
    timeout_cyc : int
        A frame with no byte for this many cycles is dropped as truncated.
    fifo_depth : int
        Segments the FIFO holds (not counting the one staged for the next boundary).
    underrun : str
        ``"hold"``: an underrun keeps the last rates; ``"rest"``: the rates go to zero.
    """

    hw: HardwareParams
    bit_cyc: int
    timeout_cyc: int
    fifo_depth: int
    underrun: str

    def __post_init__(self) -> None:
        if self.bit_cyc < MIN_BIT_CYC:
            raise ValueError(f"bit_cyc must be at least {MIN_BIT_CYC}, not {self.bit_cyc}")
        if self.timeout_cyc < 2 * BITS_PER_BYTE * self.bit_cyc:
            raise ValueError(f"timeout_cyc must be at least two byte times "
                             f"({2 * BITS_PER_BYTE * self.bit_cyc}), not {self.timeout_cyc}")
        if self.fifo_depth < 2:
            raise ValueError(f"fifo_depth must be at least 2, not {self.fifo_depth}")
        if self.underrun not in ("hold", "rest"):
            raise ValueError(f"underrun must be 'hold' or 'rest', not {self.underrun!r}")

    @property
    def n(self) -> int:
        """Channel count."""
        return self.hw.n

    @property
    def rate_bytes(self) -> int:
        """Bytes of one rate in a segment frame (two's complement, little-endian)."""
        return (self.hw.rate_bits + 7) // 8

    @property
    def owed_bytes(self) -> int:
        """Bytes of the owed amount in a telemetry reply."""
        return (self.hw.owed_width + 7) // 8

    @property
    def word_bits(self) -> int:
        """Width of a FIFO word: a rate, or a duration with the ``last`` flag."""
        return max(DURATION_BITS + 1, self.hw.rate_bits)

    @property
    def segment_words(self) -> int:
        """FIFO words per segment: the duration, then one rate per channel."""
        return self.n + 1

    @property
    def stage_cyc(self) -> int:
        """Cycles from the start of staging a segment to the first cycle it may be committed."""
        return self.n + 2

    @property
    def zero_cyc(self) -> int:
        """Cycles from deciding to clear the shadow rates to the writer being free again."""
        return self.n + 1

    @property
    def min_duration(self) -> int:
        """Shortest segment, in cycles: room to clear the shadows, then stage the next one."""
        return self.zero_cyc + 1 + self.stage_cyc

    @property
    def reply_bytes(self) -> int:
        """Bytes of every telemetry reply on the wire: the longest stuffed frame, padded.

        The board follows each reply with :data:`FILLER` bytes up to this length, so a
        reply takes the same time whatever its escapes.
        """
        return 1 + 2 * (self.payload_len(FrameType.TELEMETRY_REPLY) + 4)

    @property
    def reply_busy_cyc(self) -> int:
        """Cycles after a telemetry request is applied during which another one is refused.

        The padded reply's time on the wire and a little more: a host that waits for the
        whole reply (filler included) before asking again is never refused.
        """
        return self.reply_bytes * self.byte_cyc + 8

    @property
    def byte_cyc(self) -> int:
        """Cycles one byte takes on the wire."""
        return BITS_PER_BYTE * self.bit_cyc

    def payload_len(self, ftype: int) -> int | None:
        """The payload length a frame of type ``ftype`` must have (None: unknown type)."""
        lengths = {
            FrameType.SEGMENT: 7 + self.n * self.rate_bytes,
            FrameType.ARM: 2,
            FrameType.DISARM: 2,
            FrameType.START: 2,
            FrameType.TELEMETRY: 1,
            FrameType.FAULT: 4 + STORM_BYTES,
            FrameType.IGNORE: 2 + IGNORE_BYTES,
            FrameType.TELEMETRY_REPLY: sum(f.size for f in self.telemetry_fields),
        }
        return lengths.get(ftype)

    @property
    def max_payload(self) -> int:
        """Longest payload of any frame."""
        return max(self.payload_len(t) for t in FrameType if self.payload_len(t) is not None)

    @property
    def telemetry_fields(self) -> tuple[PayloadField, ...]:
        """The telemetry reply's payload, in order."""
        return telemetry_fields(self.owed_bytes)


def telemetry_fields(owed_bytes: int) -> tuple[PayloadField, ...]:
    """Fields of the telemetry reply: the board's status, then one channel's books and fault set.

    ``fault_set`` and ``storm_period`` are the channel's fault set in force, as a FAULT
    frame's ``set`` byte (:data:`FAULT_SET_BITS`) and ``storm_period`` encode it.
    """
    fields = [
        PayloadField("next_seq", 2),
        PayloadField("state", 1),
        PayloadField("flags", 1),
        PayloadField("level", 2),
        PayloadField("free", 2),
        PayloadField("played", 4),
        PayloadField("underruns", 2),
        PayloadField("strobes", 4),
        PayloadField("period", 4),
        PayloadField("overruns", 2),
        PayloadField("clamps", 2),
        PayloadField("deferrals", 2),
        PayloadField("saturations", 2),
        PayloadField("accepted", 4),
    ]
    fields += [PayloadField(f"rej_{reason.name.lower()}", 2) for reason in Reason]
    fields += [
        PayloadField("ignored", 2),
        PayloadField("channel", 1),
        PayloadField("pos", 4),
        PayloadField("neg", 4),
        PayloadField("pend_pos", 2),
        PayloadField("pend_neg", 2),
        # The channel's fault set in force, encoded as in a FAULT frame's payload.
        PayloadField("fault_set", 1),
        PayloadField("storm_period", STORM_BYTES),
        # Last: the one field whose size depends on the config, so every offset before it
        # is fixed (and the top of the gateware's shift register is its sign extension).
        PayloadField("owed", owed_bytes, signed=True),
    ]
    return tuple(fields)


def board_lengths(link: LinkParams) -> dict[int, int]:
    """Frame types the board accepts, with the payload length each must have."""
    types = (FrameType.SEGMENT, FrameType.ARM, FrameType.DISARM, FrameType.START, FrameType.TELEMETRY,
             FrameType.FAULT, FrameType.IGNORE)
    return {int(t): link.payload_len(t) for t in types}


def host_lengths(link: LinkParams) -> dict[int, int]:
    """Frame types the host accepts (the board's replies), with their payload lengths."""
    return {int(FrameType.TELEMETRY_REPLY): link.payload_len(FrameType.TELEMETRY_REPLY)}


def bit_cycles(clock_hz: float, baud: int) -> int:
    """Clock cycles per bit for ``baud`` (the divider the UART uses)."""
    return max(1, round(clock_hz / baud))


def link_settings(cfg: Config) -> LinkSettings:
    """The config's ``[link]`` section, validated (defaults when absent)."""
    return section(cfg, "link", LinkSettings)


def link_params(cfg: Config) -> LinkParams:
    """Validate the config's ``[link]`` section and derive the link's integers.

    Raises
    ------
    UserError
        Naming the field, the value and what is allowed.
    """
    settings = link_settings(cfg)
    clock = cfg.clock_hz
    bit_cyc = bit_cycles(clock, settings.baud)
    if bit_cyc < MIN_BIT_CYC:
        _fail(cfg, "link.baud", settings.baud,
              f"at most {clock / MIN_BIT_CYC:.6g} at this clock ({MIN_BIT_CYC} clock cycles per bit)")
    error = abs(clock / bit_cyc - settings.baud) / settings.baud
    if error > MAX_BAUD_ERROR:
        _fail(cfg, "link.baud", settings.baud,
              f"a rate the clock divides to within {MAX_BAUD_ERROR:.0%} "
              f"(this one is off by {error:.1%}; {clock / bit_cyc:.6g} is the nearest)")
    timeout = settings.timeout
    if not isinstance(timeout, Quantity):  # pragma: no cover - pydantic always converts
        raise TypeError(timeout)
    floor = 2 * BITS_PER_BYTE * bit_cyc
    try:
        timeout_cyc = cfg.cycles("link.timeout", timeout, minimum=floor)
    except UserError as error:
        raise UserError(f"{cfg.source}: {error}") from None
    return LinkParams(hw=cfg.hw, bit_cyc=bit_cyc, timeout_cyc=timeout_cyc,
                      fifo_depth=settings.fifo_depth, underrun=settings.underrun)


def _fail(cfg: Config, field: str, value: object, allowed: str) -> None:
    raise UserError(f"{cfg.source}: {field} = {value!r}: allowed: {allowed}")

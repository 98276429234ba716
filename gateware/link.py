"""The host link's command layer: frames in, segments and commands out, telemetry back.

Rules: ``docs/link.md``. Between the UART receiver and transmitter sit the frame
decoder and encoder; this component reads each frame's payload as it arrives, checks
its fields, its sequence number and the FIFO's room, and applies it only when the
whole frame is good. The pure-Python twin is ``dvgate.sim.link_model.LinkModel``.

A FAULT or IGNORE frame applied at cycle ``e`` drives the emulator's fault port (or its
ignore port) at ``e + 1``, from registers, so its setting holds from ``e + 2``.
"""

from amaranth.hdl import Cat, Module, Signal, signed, unsigned
from amaranth.lib import data, stream, wiring
from amaranth.lib.wiring import In, Out

from dvgate.gateware.faults import FaultLayout
from dvgate.gateware.frame_rx import REASON_BITS, FrameDecoder
from dvgate.gateware.frame_tx import FrameEncoder
from dvgate.gateware.rates import addr_bits
from dvgate.gateware.uart_rx import RxByte
from dvgate.linkspec import (
    COUNT_BITS,
    DURATION_BITS,
    FAULT_SET_BITS,
    IGNORE_BYTES,
    SEG_LAST,
    SEQ_BITS,
    STORM_BYTES,
    FrameType,
    LinkParams,
    Reason,
    board_lengths,
)
from dvgate.params import IGNORE_CYCLES_BITS, STORM_PERIOD_BITS

_COUNT_MAX = (1 << COUNT_BITS) - 1


def telemetry_layout(link: LinkParams) -> data.StructLayout:
    """The telemetry reply's payload as a struct: fields in order, little-endian bytes."""
    return data.StructLayout({
        f.name: (signed if f.signed else unsigned)(8 * f.size) for f in link.telemetry_fields
    })


class HostLink(wiring.Component):
    """Decode frames, apply the good ones exactly once, count the others, answer telemetry.

    A frame is applied on the cycle its decoder ends it, and only when its CRC matched,
    every field is in range (segment flags, duration of at least ``min_duration``, rates
    that fit the rate register, a channel that exists, no unknown fault bit, an ignore
    window of at least one cycle), its sequence number is the one expected (segments,
    commands, fault settings), the FIFO had room when its payload began
    (segments), and no telemetry reply is still in its busy time (telemetry requests).
    Anything else is counted under one :class:`dvgate.linkspec.Reason` and has no effect.

    Parameters
    ----------
    link : LinkParams
        The link's integers.

    Attributes
    ----------
    i : stream.Signature(RxByte, always_ready=True), in
        Bytes from the UART receiver.
    o : stream.Signature(8), out
        Bytes for the UART transmitter.
    w_data, w_en, w_commit, w_rollback : out
        The segment FIFO's write port.
    room : Signal(1), in
        The FIFO can take another segment.
    start, arm_on, stop : Signal(1), out
        One-cycle commands for the player.
    tm_channel : Signal(8), out
        Channel of the last telemetry request (selects the channel fields of ``tm``).
    tm : telemetry_layout(link), in
        The board's telemetry as it stands; the link fills its own fields itself
        (``next_seq``, ``accepted``, the rejection counters and ``channel``).
    fault_addr, fault_data, fault_we : out
        The emulator's fault port: an applied FAULT frame's channel and whole fault set,
        written (``fault_we``) on the cycle after the frame is applied.
    ignore_we, ignore_cycles : out
        The emulator's ignore port: an applied IGNORE frame's window, written on the cycle
        after the frame is applied.
    next_seq : Signal(16), out
        Sequence number the next segment, command or fault setting must carry.
    accepted : Signal(32), out
        Frames applied (wraps).
    rejected : ArrayLayout(16, 8), out
        Frames rejected, by reason (saturating).
    reject_stb : Signal(1), out
        A frame was rejected this cycle.
    """

    def __init__(self, link: LinkParams) -> None:
        self._link = link
        self._layout = telemetry_layout(link)
        super().__init__({
            "i": In(stream.Signature(RxByte, always_ready=True)),
            "o": Out(stream.Signature(8)),
            "w_data": Out(link.word_bits),
            "w_en": Out(1),
            "w_commit": Out(1),
            "w_rollback": Out(1),
            "room": In(1),
            "start": Out(1),
            "arm_on": Out(1),
            "stop": Out(1),
            "tm_channel": Out(8),
            "tm": In(self._layout),
            "fault_addr": Out(addr_bits(link.hw)),
            "fault_data": Out(FaultLayout),
            "fault_we": Out(1),
            "ignore_we": Out(1),
            "ignore_cycles": Out(IGNORE_CYCLES_BITS),
            "next_seq": Out(SEQ_BITS),
            "accepted": Out(32),
            "rejected": Out(data.ArrayLayout(COUNT_BITS, len(Reason))),
            "reject_stb": Out(1),
        })
        # The arguments of FAULT and IGNORE frames are shifted into the duration's register.
        if 8 * max(2 + STORM_BYTES, IGNORE_BYTES) > DURATION_BITS:
            raise ValueError("the FAULT and IGNORE arguments must fit the duration register")
        self.decoder = FrameDecoder(board_lengths(link), link.timeout_cyc)
        self.encoder = FrameEncoder(link.payload_len(FrameType.TELEMETRY_REPLY), pad_to=link.reply_bytes)

    def elaborate(self, platform) -> Module:
        m = Module()
        link = self._link
        hw = link.hw
        rate_bits = hw.rate_bits
        rb = link.rate_bytes

        m.submodules.decoder = dec = self.decoder
        m.submodules.encoder = enc = self.encoder
        wiring.connect(m, wiring.flipped(self.i), dec.i)
        wiring.connect(m, enc.o, wiring.flipped(self.o))

        seq      = Signal(SEQ_BITS)
        bad      = Signal()
        room     = Signal()
        dur      = Signal(DURATION_BITS)
        last     = Signal()
        acc      = Signal(8 * rb)
        sub      = Signal(range(rb))
        snapshot = Signal(self._layout)
        busy     = Signal(range(link.reply_busy_cyc))
        reason   = Signal(REASON_BITS)
        count    = Signal()
        apply    = Signal()

        value    = dec.byte
        idx      = dec.byte_idx
        ftype    = dec.type
        is_seg   = ftype == FrameType.SEGMENT
        is_tm    = ftype == FrameType.TELEMETRY
        is_fault = ftype == FrameType.FAULT
        is_ign   = ftype == FrameType.IGNORE
        is_seq   = is_seg | ftype.matches(FrameType.ARM, FrameType.DISARM, FrameType.START,
                                          FrameType.FAULT, FrameType.IGNORE)
        dur_full = Cat(dur[8:], value)
        # A FAULT frame's channel, set byte and storm period, and an IGNORE frame's cycles,
        # end in the top bytes of ``dur`` (shifted in from payload byte 2 on).
        f_base   = DURATION_BITS - 8 * (2 + STORM_BYTES)
        f_chan   = dur[f_base: f_base + 8]
        f_set    = dur[f_base + 8: f_base + 16]
        f_storm  = dur[f_base + 16:]
        i_cycles = dur[DURATION_BITS - 8 * IGNORE_BYTES:]
        acc_full = Cat(acc[8:], value)
        top      = acc_full[rate_bits - 1:]

        # -- payload bytes, latched tentatively ------------------------------------------
        with m.If(dec.byte_stb):
            with m.If(idx == 0):
                m.d.sync += [seq[:8].eq(value), bad.eq(0), room.eq(self.room)]
                with m.If(is_tm):
                    m.d.sync += [self.tm_channel.eq(value), bad.eq(value >= hw.n)]
            with m.If(idx == 1):
                m.d.sync += seq[8:].eq(value)
            with m.If(is_seg):
                with m.If(idx == 2):
                    m.d.sync += last.eq(value[0])
                    with m.If((value & ~SEG_LAST) != 0):
                        m.d.sync += bad.eq(1)
                with m.If((idx >= 3) & (idx <= 6)):
                    m.d.sync += dur.eq(dur_full)
                with m.If(idx == 6):
                    m.d.sync += sub.eq(0)
                    m.d.comb += [self.w_data.eq(Cat(dur_full, last)), self.w_en.eq(room)]
                    with m.If(dur_full < link.min_duration):
                        m.d.sync += bad.eq(1)
                with m.If(idx >= 7):
                    m.d.sync += acc.eq(acc_full)
                    with m.If(sub == rb - 1):
                        m.d.sync += sub.eq(0)
                        m.d.comb += [self.w_data.eq(acc_full[:rate_bits]), self.w_en.eq(room)]
                        # The bytes above the rate register must only repeat its sign.
                        with m.If((top != 0) & (top != (1 << len(top)) - 1)):
                            m.d.sync += bad.eq(1)
                    with m.Else():
                        m.d.sync += sub.eq(sub + 1)
            with m.If((is_fault | is_ign) & (idx >= 2)):
                m.d.sync += dur.eq(dur_full)
            with m.If(is_fault):
                with m.If((idx == 2) & (value >= hw.n)):
                    m.d.sync += bad.eq(1)
                with m.If((idx == 3) & ((value >> len(FAULT_SET_BITS)) != 0)):
                    m.d.sync += bad.eq(1)
                if 8 * STORM_BYTES > STORM_PERIOD_BITS:
                    storm_full = dur_full[DURATION_BITS - 8 * STORM_BYTES:]
                    with m.If((idx == 3 + STORM_BYTES) & ((storm_full >> STORM_PERIOD_BITS) != 0)):
                        m.d.sync += bad.eq(1)
            with m.If(is_ign & (idx == 1 + IGNORE_BYTES)):
                cycles_full = dur_full[DURATION_BITS - 8 * IGNORE_BYTES:]
                with m.If(cycles_full == 0):
                    m.d.sync += bad.eq(1)
                if 8 * IGNORE_BYTES > IGNORE_CYCLES_BITS:
                    with m.If((cycles_full >> IGNORE_CYCLES_BITS) != 0):
                        m.d.sync += bad.eq(1)

        # -- end of a frame: apply it, or count why not ------------------------------------
        with m.If(busy != 0):
            m.d.sync += busy.eq(busy - 1)
        with m.If(dec.end_stb):
            with m.If(~dec.end_ok):
                m.d.comb += [reason.eq(dec.end_reason), count.eq(1)]
            with m.Elif(bad):
                m.d.comb += [reason.eq(Reason.FORMAT), count.eq(1)]
            with m.Elif(is_seq & (seq != self.next_seq)):
                m.d.comb += [reason.eq(Reason.SEQUENCE), count.eq(1)]
            with m.Elif(is_seg & ~room):
                m.d.comb += [reason.eq(Reason.FULL), count.eq(1)]
            with m.Elif(is_tm & ((busy != 0) | enc.busy)):
                m.d.comb += [reason.eq(Reason.BUSY), count.eq(1)]
            with m.Else():
                m.d.comb += apply.eq(1)
        m.d.comb += [
            self.reject_stb.eq(count),
            self.w_commit.eq(apply & is_seg),
            self.w_rollback.eq(dec.end_stb & ~(apply & is_seg)),
            self.start.eq(apply & (ftype == FrameType.START)),
            self.arm_on.eq(apply & (ftype == FrameType.ARM)),
            self.stop.eq(apply & (ftype == FrameType.DISARM)),
        ]
        # The fault and ignore ports: strobes from registers, data straight from ``dur``,
        # which no payload byte changes on the cycle after a frame ends.
        m.d.sync += [
            self.fault_we.eq(apply & is_fault),
            self.ignore_we.eq(apply & is_ign),
        ]
        m.d.comb += [
            self.fault_addr.eq(f_chan),
            self.fault_data.storm_period.eq(f_storm),
            self.ignore_cycles.eq(i_cycles),
        ]
        for bit, name in enumerate(FAULT_SET_BITS):
            m.d.comb += getattr(self.fault_data, name).eq(f_set[bit])
        with m.If(count):
            for r in Reason:
                with m.If((reason == r) & (self.rejected[r] != _COUNT_MAX)):
                    m.d.sync += self.rejected[r].eq(self.rejected[r] + 1)
        with m.If(apply):
            m.d.sync += self.accepted.eq(self.accepted + 1)
            with m.If(is_seq):
                m.d.sync += self.next_seq.eq(self.next_seq + 1)
            with m.If(is_tm):
                m.d.sync += [snapshot.eq(self.tm), busy.eq(link.reply_busy_cyc - 1)]
                m.d.sync += [
                    snapshot.next_seq.eq(self.next_seq),
                    snapshot.accepted.eq(self.accepted),
                    snapshot.channel.eq(self.tm_channel),
                ]
                for r in Reason:
                    m.d.sync += getattr(snapshot, f"rej_{r.name.lower()}").eq(self.rejected[r])
                m.d.comb += [
                    enc.start.eq(1),
                    enc.type.eq(FrameType.TELEMETRY_REPLY),
                    enc.length.eq(link.payload_len(FrameType.TELEMETRY_REPLY)),
                ]

        # The reply's bytes straight from the snapshot, which stays still while it is sent.
        m.d.comb += enc.data.eq(snapshot.as_value().word_select(enc.idx, 8))
        return m

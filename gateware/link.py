"""The host link's command layer: frames in, segments and commands out, telemetry back.

Rules: ``docs/link.md``. Between the UART receiver and transmitter sit the frame
decoder and encoder; this component reads each frame's payload as it arrives, checks
its fields, its sequence number and the FIFO's room, and applies it only when the
whole frame is good. The pure-Python twin is ``dvgate.sim.link_model.LinkModel``.

A FAULT or IGNORE frame applied at cycle ``e`` drives the emulator's fault port (or its
ignore port) at ``e + 1``, from registers, so its setting holds from ``e + 2``.
"""

from amaranth.hdl import Cat, Module, Mux, Signal, signed, unsigned
from amaranth.lib import data, memory, stream, wiring
from amaranth.lib.wiring import In, Out

from dvgate.gateware.faults import FaultLayout
from dvgate.gateware.frame_rx import REASON_BITS, FrameDecoder
from dvgate.gateware.frame_tx import FrameEncoder
from dvgate.gateware.ram import NO_RW_CHECK, read_data, sync_read
from dvgate.gateware.rates import addr_bits
from dvgate.gateware.segments import fifo_lanes
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
#: Bytes of a segment's duration; its ``flags`` byte goes into the FIFO word's next lane.
DURATION_BYTES = DURATION_BITS // 8

#: Words of the link's counter memory (16 bits each, in the telemetry's order):
#: ``accepted`` (low half, high half), then one rejection counter per :class:`Reason`.
ACCEPTED_WORD = 0
COUNTER_WORDS = 2 + len(Reason)
#: Word of the telemetry's copy that holds ``next_seq`` (after the counters' copies).
NEXT_SEQ_WORD = COUNTER_WORDS
#: The telemetry fields the link keeps in its counter memory, in payload order.
COUNTER_FIELDS = ("accepted", *(f"rej_{r.name.lower()}" for r in Reason))
#: The telemetry fields the link reads from outside while it sends a reply (``ext``).
EXTERNAL_FIELDS = ("pos", "neg")


def reject_word(reason: Reason) -> int:
    """The counter memory's word that counts ``reason``."""
    return 2 + int(reason)


def field_offsets(link: LinkParams) -> dict[str, tuple[int, int]]:
    """Each telemetry field's ``(offset, size)`` in bytes in the reply's payload."""
    out, at = {}, 0
    for f in link.telemetry_fields:
        out[f.name] = (at, f.size)
        at += f.size
    return out


def _span(offsets: dict[str, tuple[int, int]], names: tuple[str, ...]) -> tuple[int, int]:
    """``(first byte, byte count)`` of fields that follow each other in the payload."""
    first = offsets[names[0]][0]
    at = first
    for name in names:
        if offsets[name][0] != at:
            raise ValueError(f"telemetry field {name!r} does not follow {names[0]!r}'s group")
        at += offsets[name][1]
    return first, at - first


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

    The telemetry reply describes the cycle its request is applied (``tm_stb``). Small in
    logic: the frame counters live in block RAM (``counters``) and are copied for the
    reply into a second one, each by a walker or, if it changes first, by its change; the
    pulse counts come from outside, byte by byte (``ext_*``); every other field is taken
    into a shift register that moves on one byte per byte sent.

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
    w_data, w_en, w_next, w_commit, w_rollback : out
        The segment FIFO's write port (a byte into its lane of a word).
    room : Signal(1), in
        The FIFO can take another segment.
    start, arm_on, stop : Signal(1), out
        One-cycle commands for the player.
    tm_channel : Signal(8), out
        Channel of the last telemetry request (selects the channel fields of ``tm``).
    tm : telemetry_layout(link), in
        The board's telemetry as it stands; the link fills its own fields itself
        (``next_seq``, ``accepted``, the rejection counters and ``channel``) and reads
        ``pos`` and ``neg`` through ``ext_*`` instead.
    tm_stb : Signal(1), out
        A telemetry request is applied this cycle: the instant the reply describes.
    ext_idx : Signal(8), out
        While a reply is sent: the payload byte wanted now.
    ext_step : Signal(1), out
        ``ext_idx`` moves on to ``ext_idx + 1`` at the next cycle (for a read ahead).
    ext_take : Signal(1), out
        The payload byte at ``ext_idx`` was sent.
    ext_data : Signal(8), in
        The payload byte at ``ext_idx`` when it is a byte of ``pos`` or ``neg``.
    fault_addr, fault_data, fault_we : out
        The emulator's fault port: an applied FAULT frame's channel and whole fault set,
        written (``fault_we``) on the cycle after the frame is applied.
    ignore_we, ignore_cycles : out
        The emulator's ignore port: an applied IGNORE frame's window, written on the cycle
        after the frame is applied.
    next_seq : Signal(16), out
        Sequence number the next segment, command or fault setting must carry.
    apply_stb : Signal(1), out
        A frame is applied this cycle.
    reject_stb : Signal(1), out
        A frame is rejected this cycle, for ``reason``.
    reason : Signal(3), out
        With ``reject_stb``: a :class:`dvgate.linkspec.Reason`.
    counters : Memory
        Frames applied (``accepted``, 32 bits, wraps) and rejected by reason (16 bits,
        saturating), as 16-bit words (:data:`ACCEPTED_WORD`, :func:`reject_word`); each
        count is written one cycle after its frame ends.
    """

    def __init__(self, link: LinkParams) -> None:
        self._link = link
        self._layout = telemetry_layout(link)
        super().__init__({
            "i": In(stream.Signature(RxByte, always_ready=True)),
            "o": Out(stream.Signature(8)),
            "w_data": Out(8 * fifo_lanes(link)),
            "w_en": Out(fifo_lanes(link)),
            "w_next": Out(1),
            "w_commit": Out(1),
            "w_rollback": Out(1),
            "room": In(1),
            "start": Out(1),
            "arm_on": Out(1),
            "stop": Out(1),
            "tm_channel": Out(8),
            "tm": In(self._layout),
            "tm_stb": Out(1),
            "ext_idx": Out(8),
            "ext_step": Out(1),
            "ext_take": Out(1),
            "ext_data": In(8),
            "fault_addr": Out(addr_bits(link.hw)),
            "fault_data": Out(FaultLayout),
            "fault_we": Out(1),
            "ignore_we": Out(1),
            "ignore_cycles": Out(IGNORE_CYCLES_BITS),
            "next_seq": Out(SEQ_BITS),
            "apply_stb": Out(1),
            "reject_stb": Out(1),
            "reason": Out(REASON_BITS),
        })
        offsets = field_offsets(link)
        self._counter_span = _span(offsets, COUNTER_FIELDS)
        self._ext_span = _span(offsets, EXTERNAL_FIELDS)
        if self._counter_span[1] != 2 * COUNTER_WORDS:
            raise ValueError("the counter fields must fill the counter memory's words")
        # The walker copies the counters within 2 COUNTER_WORDS cycles of a request; the
        # reply reads the copy only after its first ``c_first + 3`` bytes have left.
        if self._counter_span[0] + 3 < 2 * COUNTER_WORDS + 3:
            raise ValueError("the counters must come later in the telemetry payload")
        self.counters = memory.Memory(shape=COUNT_BITS, depth=COUNTER_WORDS, init=[], attrs=NO_RW_CHECK)
        self._frozen = memory.Memory(shape=COUNT_BITS, depth=COUNTER_WORDS + 1, init=[], attrs=NO_RW_CHECK)
        # The arguments of FAULT and IGNORE frames go into one 32-bit word, byte by byte.
        if max(2 + STORM_BYTES, IGNORE_BYTES) > 4:
            raise ValueError("the FAULT and IGNORE arguments must fit one 32-bit word")
        # Block RAM although tiny; its one read is on the cycle a frame ends, when no byte
        # is written (see ``NO_RW_CHECK``).
        self._args = memory.Memory(shape=32, depth=2, init=[], attrs={"ram_style": "block", **NO_RW_CHECK})
        self.decoder = FrameDecoder(board_lengths(link), link.timeout_cyc)
        reply_len = link.payload_len(FrameType.TELEMETRY_REPLY)
        self.encoder = FrameEncoder(reply_len, pad_to=link.reply_bytes, frame=(FrameType.TELEMETRY_REPLY, reply_len))

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

        seq_ok   = Signal()
        bad      = Signal()
        room     = Signal()
        nonzero  = Signal()
        short    = Signal()
        sign     = Signal()
        sub      = Signal(range(rb))
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
        # A FAULT frame's channel, set byte and storm period, and an IGNORE frame's cycles:
        # payload bytes 2 on, each into its byte lane of a memory word (one word per frame
        # type), read all the time.
        m.submodules.args = args = self._args
        a_wr     = args.write_port(granularity=8)
        a_rd     = sync_read(m, args)
        arg      = read_data(m, a_rd, a_wr)
        f_chan   = arg[0:8]
        f_set    = arg[8:16]
        f_storm  = arg[16:16 + 8 * STORM_BYTES]
        i_cycles = arg[:8 * IGNORE_BYTES]
        lane     = (idx - 2)[:2]
        m.d.comb += [a_wr.addr.eq(is_ign), a_rd.addr.eq(is_ign), a_wr.data.eq(value.replicate(4))]
        sign_byte, sign_bit = divmod(rate_bits - 1, 8)
        min_byte = Signal(8)
        with m.Switch(idx):
            for k in range(DURATION_BYTES):
                with m.Case(3 + k):
                    m.d.comb += min_byte.eq((link.min_duration >> 8 * k) & 0xFF)
        m.d.comb += self.w_data.eq(value.replicate(len(self.w_en)))

        # -- payload bytes, latched tentatively ------------------------------------------
        with m.If(dec.byte_stb):
            with m.If(idx == 0):
                m.d.sync += [seq_ok.eq(value == self.next_seq[:8]), bad.eq(0), room.eq(self.room)]
                with m.If(is_tm):
                    m.d.sync += [self.tm_channel.eq(value), bad.eq(value >= hw.n)]
            with m.If(idx == 1):
                # Compared as it comes: ``next_seq`` only changes when a frame is applied.
                m.d.sync += seq_ok.eq(seq_ok & (value == self.next_seq[8:]))
            # A segment's bytes go into the FIFO word by word, each byte into its lane: the
            # duration's four, then ``flags`` (``last`` is its bit 0) above them, then each
            # rate's bytes (the bits above the rate register are never read).
            with m.If(is_seg):
                with m.If(idx == 2):
                    m.d.comb += self.w_en.eq(room << DURATION_BYTES)
                    with m.If((value & ~SEG_LAST) != 0):
                        m.d.sync += bad.eq(1)
                with m.If((idx >= 3) & (idx <= 6)):
                    m.d.comb += self.w_en.eq(room << (idx - 3)[:2])
                    # Duration below the minimum, compared byte by byte from the lowest.
                    m.d.sync += short.eq((value < min_byte) | ((value == min_byte) & short & (idx != 3)))
                with m.If(idx == 6):
                    m.d.sync += sub.eq(0)
                    m.d.comb += self.w_next.eq(room)
                    with m.If((value < min_byte) | ((value == min_byte) & short)):
                        m.d.sync += bad.eq(1)
                with m.If(idx >= 7):
                    m.d.comb += self.w_en.eq(room << sub)
                    # The bits above the rate register must only repeat its sign.
                    with m.If(sub == sign_byte):
                        m.d.sync += sign.eq(value[sign_bit])
                        with m.If((value[sign_bit:] != 0) & (value[sign_bit:] != (1 << (8 - sign_bit)) - 1)):
                            m.d.sync += bad.eq(1)
                    with m.If((sub > sign_byte) & (value != Mux(sign, 0xFF, 0))):
                        m.d.sync += bad.eq(1)
                    with m.If(sub == rb - 1):
                        m.d.sync += sub.eq(0)
                        m.d.comb += self.w_next.eq(room)
                    with m.Else():
                        m.d.sync += sub.eq(sub + 1)
            with m.If((is_fault | is_ign) & (idx >= 2)):
                m.d.comb += a_wr.en.eq(1 << lane)
                # Whether the value so far is zero, and its top byte's bits beyond the field.
                m.d.sync += nonzero.eq((nonzero & (idx != 2)) | (value != 0))
            with m.If(is_fault):
                with m.If((idx == 2) & (value >= hw.n)):
                    m.d.sync += bad.eq(1)
                with m.If((idx == 3) & ((value >> len(FAULT_SET_BITS)) != 0)):
                    m.d.sync += bad.eq(1)
                if 8 * STORM_BYTES > STORM_PERIOD_BITS:
                    with m.If((idx == 3 + STORM_BYTES) & ((value >> (STORM_PERIOD_BITS % 8)) != 0)):
                        m.d.sync += bad.eq(1)
            with m.If(is_ign & (idx == 1 + IGNORE_BYTES)):
                with m.If(~(nonzero & (idx != 2)) & (value == 0)):
                    m.d.sync += bad.eq(1)
                if 8 * IGNORE_BYTES > IGNORE_CYCLES_BITS:
                    with m.If((value >> (IGNORE_CYCLES_BITS % 8)) != 0):
                        m.d.sync += bad.eq(1)

        # -- end of a frame: apply it, or count why not ------------------------------------
        with m.If(busy != 0):
            m.d.sync += busy.eq(busy - 1)
        with m.If(dec.end_stb):
            with m.If(~dec.end_ok):
                m.d.comb += [reason.eq(dec.end_reason), count.eq(1)]
            with m.Elif(bad):
                m.d.comb += [reason.eq(Reason.FORMAT), count.eq(1)]
            with m.Elif(is_seq & ~seq_ok):
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
        # The fault and ignore ports: strobes from registers, data from the arguments' word,
        # read on the cycle the frame ends (when no payload byte is written) and shown on
        # the next.
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
        m.d.comb += [self.apply_stb.eq(apply), self.reason.eq(reason), self.tm_stb.eq(apply & is_tm)]
        with m.If(apply & is_seq):
            m.d.sync += self.next_seq.eq(self.next_seq + 1)
        with m.If(apply & is_tm):
            m.d.sync += busy.eq(link.reply_busy_cyc - 1)
            m.d.comb += enc.start.eq(1)

        # -- counters: one memory, read, added to and written back --------------------------
        # A frame's count is read on the cycle it ends and written on the next. A carry out
        # of ``accepted``'s low half is added to its high half one cycle later: the next
        # frame ends two cycles after an applied one at the earliest (its last byte comes
        # two cycles after the applied frame's last; a timeout needs far longer), so two
        # updates never touch the same word on consecutive cycles.
        m.submodules.counters = counters = self.counters
        m.submodules.frozen = frozen = self._frozen
        c_wr   = counters.write_port()
        c_upd  = sync_read(m, counters)
        c_rd   = sync_read(m, counters)
        f_wr   = frozen.write_port()
        f_rd   = sync_read(m, frozen)

        upd    = Signal()
        word   = Signal(range(COUNTER_WORDS))
        p_upd  = Signal()
        p_word = Signal.like(word)
        old    = read_data(m, c_upd, c_wr)
        full   = old == _COUNT_MAX
        carry  = p_upd & (p_word == ACCEPTED_WORD) & full
        write  = p_upd & ~((p_word >= reject_word(Reason(0))) & full)
        # Words whose value at the last telemetry request is in ``frozen`` already.
        copied = Signal(COUNTER_WORDS)
        cow    = write & ~copied.bit_select(p_word, 1)

        with m.If(carry):
            m.d.comb += [upd.eq(1), word.eq(ACCEPTED_WORD + 1)]
        with m.Elif(apply):
            m.d.comb += [upd.eq(1), word.eq(ACCEPTED_WORD)]
        with m.Elif(count):
            m.d.comb += [upd.eq(1), word.eq(2 + reason)]
        m.d.sync += [p_upd.eq(upd), p_word.eq(word)]
        m.d.comb += [
            c_upd.addr.eq(word),
            c_wr.addr.eq(p_word),
            c_wr.data.eq(old + 1),
            c_wr.en.eq(write),
        ]

        # The telemetry's copy, in ``frozen``: a word's first change after the request
        # copies its old value there (``cow``); a walker copies the others, one a cycle,
        # from the cycle after the request. A word the walker read as it changed (so its
        # value read is not to be trusted) is copied by the change itself and skipped.
        walk   = Signal(range(COUNTER_WORDS + 1), init=COUNTER_WORDS)
        r_v    = Signal()
        r_word = Signal.like(word)
        issue  = Signal()
        w_addr = Signal.like(word)
        with m.If(r_v & cow):  # the copy port is taken: read the word again
            m.d.comb += [issue.eq(1), w_addr.eq(r_word)]
        with m.Elif(walk != COUNTER_WORDS):
            m.d.comb += [issue.eq(1), w_addr.eq(walk)]
            m.d.sync += walk.eq(walk + 1)
        m.d.sync += [r_v.eq(issue), r_word.eq(w_addr)]
        m.d.comb += c_rd.addr.eq(w_addr)
        walked = read_data(m, c_rd, c_wr)
        with m.If(apply & is_tm):
            # ``next_seq`` at the request (no count is written on this cycle: the frame
            # before ended two cycles ago at the latest).
            m.d.comb += [f_wr.addr.eq(NEXT_SEQ_WORD), f_wr.data.eq(self.next_seq), f_wr.en.eq(1)]
        with m.Elif(cow):
            m.d.comb += [f_wr.addr.eq(p_word), f_wr.data.eq(old), f_wr.en.eq(1)]
        with m.Elif(r_v & ~copied.bit_select(r_word, 1)):
            m.d.comb += [f_wr.addr.eq(r_word), f_wr.data.eq(walked), f_wr.en.eq(1)]
            m.d.sync += copied.bit_select(r_word, 1).eq(1)
        with m.If(write):
            m.d.sync += copied.bit_select(p_word, 1).eq(1)
        with m.If(apply & is_tm):
            m.d.sync += [copied.eq(0), walk.eq(0), r_v.eq(0)]

        # -- the reply -----------------------------------------------------------------------
        # Everything the reply describes is taken on the cycle the request is applied: the
        # link's counters and ``next_seq`` by the copy above, ``pos`` and ``neg`` outside
        # (``ext``), every other byte into a shift register that moves on one byte per byte
        # sent.
        c_first, c_len = self._counter_span
        x_first, x_len = self._ext_span
        fields = field_offsets(link)
        s_first = fields["next_seq"][0]
        tm_bytes = self.tm.as_value()
        own = {"channel": self.tm_channel}
        shifted = []
        for name, (at, size) in fields.items():
            if name in COUNTER_FIELDS or name in EXTERNAL_FIELDS or name == "next_seq":
                continue
            if name in own:
                shifted.append(own[name][:8 * size])
            else:
                shifted.append(tm_bytes[8 * at: 8 * (at + size)])
        held = Signal(sum(len(v) for v in shifted))

        # Memories are read a byte ahead, at ``idx + 1`` on the cycles ``idx`` moves on
        # (``step``), and hold their word otherwise: no path from the byte sent (which
        # decides an escape, so whether ``idx`` moves) to a read address.
        idx = enc.idx
        nidx = Signal(8)
        m.d.comb += nidx.eq(idx + 1)
        in_seq    = (idx >= s_first) & (idx < s_first + 2)
        in_counts = (idx >= c_first) & (idx < c_first + c_len)
        in_ext    = (idx >= x_first) & (idx < x_first + x_len)
        from_held = ~in_seq & ~in_counts & ~in_ext
        n_seq     = (nidx >= s_first) & (nidx < s_first + 2)
        n_word    = Signal(8)
        m.d.comb += [
            n_word.eq(Mux(n_seq, NEXT_SEQ_WORD, (nidx - c_first) >> 1)),
            f_rd.addr.eq(n_word),
            self.ext_idx.eq(idx),
            self.ext_step.eq(enc.step),
            f_rd.en.eq(enc.step),
            self.ext_take.eq(enc.take),
        ]
        counted = read_data(m, f_rd, f_wr)
        half = Mux(in_seq, (idx - s_first)[0], (idx - c_first)[0])
        with m.If(apply & is_tm):
            m.d.sync += held.eq(Cat(*shifted))
        with m.Elif(enc.take & from_held):
            m.d.sync += held.eq(held[8:])
        with m.If(in_seq | in_counts):
            m.d.comb += enc.data.eq(Mux(half, counted[8:], counted[:8]))
        with m.Elif(in_ext):
            m.d.comb += enc.data.eq(self.ext_data)
        with m.Else():
            m.d.comb += enc.data.eq(held[:8])
        return m

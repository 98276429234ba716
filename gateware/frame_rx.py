"""Frame decoder: bytes from the UART to checked frames, byte by byte.

Rules: ``docs/link.md``, sections "Frames" and "Decoder". The pure-Python twin is
``dvgate.sim.link_model.FrameDecoder``; the fuzz tests hold the two equal.
"""

from amaranth.hdl import Module, Mux, Signal
from amaranth.lib import crc, enum, stream, wiring
from amaranth.lib.wiring import In, Out

from dvgate.gateware.uart_rx import RxByte
from dvgate.linkspec import ESC, ESC_XOR, FLAG, Reason

#: Width of a rejection reason.
REASON_BITS = max(r.value for r in Reason).bit_length()


class DecodeState(enum.Enum, shape=3):
    """Where the decoder is in the byte stream."""

    IDLE = 0
    NOISE = 1
    SKIP = 2
    TYPE = 3
    LEN = 4
    PAYLOAD = 5
    CRC1 = 6
    CRC2 = 7


class FrameDecoder(wiring.Component):
    """Unstuff, delimit and check frames; present payload bytes as they come.

    Every byte starts its effect on the cycle after it is offered: a payload byte is
    presented then (``byte_stb``), and a frame's end (``end_stb``) comes on the cycle
    after its last CRC byte, with ``end_ok`` high when the CRC matched. A rejection ends
    a frame the same way with ``end_ok`` low and the reason; a run of stray bytes outside
    any frame ends once, on its first byte, with reason ``NOISE``. A frame with no byte
    for ``timeout_cyc`` cycles ends as ``TRUNCATED`` on the cycle after the timeout.

    Consumers latch payload bytes tentatively and act only on ``end_stb & end_ok``.

    Parameters
    ----------
    lengths : dict of int to int
        Frame types this side accepts, with the payload length each must have (1 to 255).
    timeout_cyc : int
        Inter-byte timeout, cycles (at least 2).

    Attributes
    ----------
    i : stream.Signature(RxByte, always_ready=True), in
        Bytes from the UART receiver.
    type : Signal(8), out
        Type of the current frame (valid from its first payload byte to its end).
    byte, byte_idx : Signal(8), out
        A payload byte and its index in the payload.
    byte_stb : Signal(1), out
        ``byte`` is new this cycle.
    end_stb : Signal(1), out
        A frame ended this cycle (or stray bytes were dropped).
    end_ok : Signal(1), out
        With ``end_stb``: the frame's CRC matched.
    end_reason : Signal(3), out
        With ``end_stb`` and not ``end_ok``: a :class:`dvgate.linkspec.Reason`.
    """

    def __init__(self, lengths: dict[int, int], timeout_cyc: int) -> None:
        if not lengths or any(not 1 <= v <= 255 or not 0 <= k <= 255 for k, v in lengths.items()):
            raise ValueError(f"lengths must map type bytes to payload lengths 1 to 255, not {lengths!r}")
        if timeout_cyc < 2:
            raise ValueError(f"timeout_cyc must be at least 2, not {timeout_cyc!r}")
        self._lengths = dict(lengths)
        self._timeout = timeout_cyc
        super().__init__({
            "i": In(stream.Signature(RxByte, always_ready=True)),
            "type": Out(8),
            "byte": Out(8),
            "byte_idx": Out(8),
            "byte_stb": Out(1),
            "end_stb": Out(1),
            "end_ok": Out(1),
            "end_reason": Out(REASON_BITS),
        })

    def elaborate(self, platform) -> Module:
        m = Module()
        m.submodules.crc = check = crc.catalog.CRC16_CCITT_FALSE(data_width=8).create()

        state    = Signal(DecodeState)
        esc      = Signal()
        quiet    = Signal(range(self._timeout + 1))
        count    = Signal(8)
        hi_ok    = Signal()
        expected = Signal(8)
        known    = Signal()
        value    = Signal(8)
        # Only known types are kept: as many low bits as the largest needs, the rest zero.
        kept     = Signal(max(self._lengths).bit_length())

        got      = self.i.valid
        raw      = self.i.payload.data
        in_frame = state.as_value() >= DecodeState.TYPE.value
        escaped  = (raw == (FLAG ^ ESC_XOR)) | (raw == (ESC ^ ESC_XOR))

        m.d.sync += [self.byte_stb.eq(0), self.end_stb.eq(0)]
        m.d.comb += self.type.eq(kept)
        m.d.comb += [
            value.eq(Mux(esc, raw ^ ESC_XOR, raw)),
            check.data.eq(value),
            known.eq(0),
            expected.eq(0),
        ]
        for ftype, size in self._lengths.items():
            with m.If(value == ftype):
                m.d.comb += known.eq(1)
            with m.If(kept == ftype):
                m.d.comb += expected.eq(size)

        def end(ok: bool, reason: Reason) -> list:
            return [self.end_stb.eq(1), self.end_ok.eq(ok), self.end_reason.eq(reason)]

        with m.If(got):
            m.d.sync += quiet.eq(0)
        with m.Elif(quiet != self._timeout):
            m.d.sync += quiet.eq(quiet + 1)

        with m.If(got):
            with m.If(self.i.payload.framing_error):
                with m.If(in_frame):
                    m.d.sync += [*end(False, Reason.LINE), state.eq(DecodeState.SKIP)]
                with m.Elif(state == DecodeState.IDLE):
                    m.d.sync += [*end(False, Reason.NOISE), state.eq(DecodeState.NOISE)]
            with m.Elif(raw == FLAG):
                with m.If(in_frame):
                    m.d.sync += end(False, Reason.TRUNCATED)
                m.d.sync += [state.eq(DecodeState.TYPE), esc.eq(0)]
                m.d.comb += check.start.eq(1)
            with m.Elif(~in_frame):
                with m.If(state == DecodeState.IDLE):
                    m.d.sync += [*end(False, Reason.NOISE), state.eq(DecodeState.NOISE)]
            with m.Elif(raw == ESC):
                with m.If(esc):
                    m.d.sync += [*end(False, Reason.FORMAT), state.eq(DecodeState.SKIP), esc.eq(0)]
                with m.Else():
                    m.d.sync += esc.eq(1)
            with m.Elif(esc & ~escaped):
                m.d.sync += [*end(False, Reason.FORMAT), state.eq(DecodeState.SKIP), esc.eq(0)]
            with m.Else():
                m.d.sync += esc.eq(0)
                with m.Switch(state):
                    with m.Case(DecodeState.TYPE):
                        with m.If(known):
                            m.d.comb += check.valid.eq(1)
                            m.d.sync += [kept.eq(value), state.eq(DecodeState.LEN)]
                        with m.Else():
                            m.d.sync += [*end(False, Reason.FORMAT), state.eq(DecodeState.SKIP)]
                    with m.Case(DecodeState.LEN):
                        with m.If(value == expected):
                            m.d.comb += check.valid.eq(1)
                            m.d.sync += [count.eq(0), state.eq(DecodeState.PAYLOAD)]
                        with m.Else():
                            m.d.sync += [*end(False, Reason.FORMAT), state.eq(DecodeState.SKIP)]
                    with m.Case(DecodeState.PAYLOAD):
                        m.d.comb += check.valid.eq(1)
                        m.d.sync += [
                            self.byte.eq(value),
                            self.byte_idx.eq(count),
                            self.byte_stb.eq(1),
                            count.eq(count + 1),
                        ]
                        # The length was checked against the type's: ``expected`` is it.
                        with m.If(count == expected - 1):
                            m.d.sync += state.eq(DecodeState.CRC1)
                    with m.Case(DecodeState.CRC1):
                        m.d.sync += [hi_ok.eq(value == check.crc[8:16]), state.eq(DecodeState.CRC2)]
                    with m.Case(DecodeState.CRC2):
                        ok = hi_ok & (value == check.crc[0:8])
                        m.d.sync += [*end(ok, Reason.CRC), state.eq(DecodeState.IDLE)]
        with m.Elif(quiet == self._timeout - 1):
            with m.If(in_frame):
                m.d.sync += end(False, Reason.TRUNCATED)
            m.d.sync += [state.eq(DecodeState.IDLE), esc.eq(0)]
        return m

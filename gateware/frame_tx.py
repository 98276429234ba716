"""Frame encoder: a payload read byte by byte, sent as a stuffed frame with its CRC.

Format: ``docs/link.md``, section "Frames".
"""

from amaranth.hdl import Module, Mux, Signal
from amaranth.lib import crc, stream, wiring
from amaranth.lib.wiring import In, Out

from dvgate.linkspec import ESC, ESC_XOR, FILLER, FLAG


class FrameEncoder(wiring.Component):
    """Send flag, type, length, payload and CRC-16 (big-endian), escaping as it goes.

    The payload is not held here: while sending, the encoder shows the index of the
    payload byte it needs on ``idx`` and reads ``data`` in the same cycle. ``take`` marks
    the cycle it is done with that byte (``idx`` moves on at the next one), so a parent
    may read its payload from a shift register, or from a memory one cycle ahead: at
    ``idx + 1``, enabled by ``step``.

    With ``pad_to``, the frame is followed by filler bytes (:data:`FILLER`, outside any
    frame) until ``pad_to`` bytes have been sent in all, so every frame takes the same
    time on the wire whatever its escapes.

    Parameters
    ----------
    max_len : int
        Longest payload (1 to 255).
    pad_to : int, optional
        Bytes to send per frame, filler included (at least the longest stuffed frame,
        ``1 + 2 * (max_len + 4)``).
    frame : (int, int), optional
        Send only frames of this type and payload length (``type`` and ``length`` are then
        not read): no registers for them, and comparisons with constants.

    Attributes
    ----------
    start : Signal(1), in
        Begin a frame of type ``type`` and ``length`` payload bytes (ignored while busy).
    type, length : Signal(8), in
        Sampled with ``start``.
    idx : Signal(8), out
        Index of the payload byte wanted.
    data : Signal(8), in
        The payload byte at ``idx``.
    take : Signal(1), out
        The payload byte at ``idx`` has been sent (with its escape): ``idx`` moves on.
    step : Signal(1), out
        ``idx`` moves on to ``idx + 1`` at the next cycle (for a read ahead).
    o : stream.Signature(8), out
        Bytes for the UART transmitter.
    busy : Signal(1), out
        A frame is being sent.
    """

    def __init__(self, max_len: int, pad_to: int | None = None, frame: tuple[int, int] | None = None) -> None:
        if not 1 <= max_len <= 255:
            raise ValueError(f"max_len must be 1 to 255, not {max_len!r}")
        if frame is not None and not (0 <= frame[0] <= 255 and 1 <= frame[1] <= max_len):
            raise ValueError(f"frame must be a type byte and a length of 1 to {max_len}, not {frame!r}")
        self._frame = frame
        if pad_to is not None and pad_to < 1 + 2 * (max_len + 4):
            raise ValueError(f"pad_to must be at least {1 + 2 * (max_len + 4)} bytes, not {pad_to!r}")
        self._max_len = max_len
        self._pad_to = pad_to
        super().__init__({
            "start": In(1),
            "type": In(8),
            "length": In(8),
            "idx": Out(8),
            "data": In(8),
            "take": Out(1),
            "step": Out(1),
            "o": Out(stream.Signature(8)),
            "busy": Out(1),
        })

    def elaborate(self, platform) -> Module:
        m = Module()
        m.submodules.crc = gen = crc.catalog.CRC16_CCITT_FALSE(data_width=8).create()

        if self._frame is None:
            ftype, length = Signal(8), Signal(8)
        else:
            ftype, length = self._frame
        count   = Signal(range(max(self._pad_to or 0, 1 + 2 * (self._max_len + 4)) + 1))
        j       = Signal(9)
        escaped = Signal()
        value   = Signal(8)
        special = Signal()

        step = self.step
        m.d.comb += [
            self.idx.eq(j - 2),
            special.eq((value == FLAG) | (value == ESC)),
            gen.data.eq(value),
        ]
        with m.If(j == 0):
            m.d.comb += value.eq(ftype)
        with m.Elif(j == 1):
            m.d.comb += value.eq(length)
        with m.Elif(j == length + 2):
            m.d.comb += value.eq(gen.crc[8:16])
        with m.Elif(j == length + 3):
            m.d.comb += value.eq(gen.crc[0:8])
        with m.Else():
            m.d.comb += value.eq(self.data)

        sent = self.o.valid & self.o.ready
        with m.If(sent):
            m.d.sync += count.eq(count + 1)
        with m.FSM():
            with m.State("IDLE"):
                with m.If(self.start):
                    m.d.sync += [j.eq(0), escaped.eq(0), count.eq(0)]
                    if self._frame is None:
                        m.d.sync += [ftype.eq(self.type), length.eq(self.length)]
                    m.d.comb += gen.start.eq(1)
                    m.next = "FLAG"
            with m.State("FLAG"):
                m.d.comb += [self.busy.eq(1), self.o.valid.eq(1), self.o.payload.eq(FLAG)]
                with m.If(sent):
                    m.next = "BODY"
            with m.State("BODY"):
                m.d.comb += [
                    self.busy.eq(1),
                    self.o.valid.eq(1),
                    self.o.payload.eq(Mux(escaped, value ^ ESC_XOR, Mux(special, ESC, value))),
                ]
                with m.If(sent):
                    with m.If(special & ~escaped):
                        m.d.sync += escaped.eq(1)
                    with m.Else():
                        m.d.sync += [escaped.eq(0), j.eq(j + 1)]
                        m.d.comb += [step.eq(1), gen.valid.eq(j < length + 2),
                                     self.take.eq((j >= 2) & (j < length + 2))]
                        with m.If(j == length + 3):
                            m.next = "PAD" if self._pad_to is not None else "IDLE"
            if self._pad_to is not None:
                with m.State("PAD"):
                    done = count == self._pad_to
                    m.d.comb += [self.busy.eq(~done), self.o.valid.eq(~done), self.o.payload.eq(FILLER)]
                    with m.If(done):
                        m.next = "IDLE"
        return m

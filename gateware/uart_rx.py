"""UART receiver: 8N1 bytes from a pin, sampled in the middle of each bit.

Timing rules: ``docs/link.md``, section "UART".
"""

from amaranth.hdl import Cat, Module, Signal
from amaranth.lib import data, stream, wiring
from amaranth.lib.wiring import In, Out

from dvgate.linkspec import MIN_BIT_CYC


class RxByte(data.Struct):
    """A received byte and whether its stop bit was missing."""

    data: 8
    framing_error: 1


class UartRx(wiring.Component):
    """Receive one start bit, eight data bits (least significant first) and one stop bit.

    The pin goes through two flip-flops (it is asynchronous to the clock). A start bit
    whose synchronized falling edge is seen at cycle ``d`` is sampled again at
    ``d + bit_cyc // 2``; a level that went back high there was a glitch and is ignored.
    Data bit ``i`` is sampled at ``d + bit_cyc // 2 + (i + 1) * bit_cyc`` and the stop
    bit at ``d + bit_cyc // 2 + 9 * bit_cyc``; the byte is offered on the next cycle. With
    the pin falling at cycle ``t0`` (so ``d = t0 + 2``), the byte is valid at
    ``t0 + 9 * bit_cyc + bit_cyc // 2 + 3``. The receiver looks for the next start bit
    right after the stop bit's sample, so bytes may follow each other with one stop bit.

    A low stop bit gives the byte with ``framing_error`` set, and the receiver then waits
    for the line to go high (a break) before it looks for a start bit again.

    Parameters
    ----------
    bit_cyc : int
        Clock cycles per bit (the clock frequency over the baud rate), at least 4.

    Attributes
    ----------
    rx : Signal(1), in
        The receive pin; idles high.
    o : stream.Signature(RxByte, always_ready=True), out
        One transfer per received byte (``valid`` is high for one cycle).
    """

    rx: In(1, init=1)
    o: Out(stream.Signature(RxByte, always_ready=True))

    def __init__(self, bit_cyc: int) -> None:
        if not isinstance(bit_cyc, int) or bit_cyc < MIN_BIT_CYC:
            raise ValueError(f"bit_cyc must be an integer of at least {MIN_BIT_CYC}, not {bit_cyc!r}")
        self._bit_cyc = bit_cyc
        super().__init__()

    def elaborate(self, platform) -> Module:
        m = Module()
        bit_cyc = self._bit_cyc

        s1    = Signal(init=1)
        s2    = Signal(init=1)
        timer = Signal(range(bit_cyc))
        bit   = Signal(range(10))
        shift = Signal(8)

        m.d.sync += [s1.eq(self.rx), s2.eq(s1), self.o.valid.eq(0)]

        with m.FSM():
            with m.State("IDLE"):
                with m.If(~s2):
                    m.d.sync += [timer.eq(bit_cyc // 2 - 1), bit.eq(0)]
                    m.next = "BITS"
            with m.State("BITS"):
                sample = timer == 0
                with m.If(~sample):
                    m.d.sync += timer.eq(timer - 1)
                with m.Else():
                    m.d.sync += [timer.eq(bit_cyc - 1), bit.eq(bit + 1)]
                    with m.If(bit == 0):
                        with m.If(s2):
                            m.next = "IDLE"  # the start bit did not last: a glitch
                    with m.Elif(bit == 9):
                        m.d.sync += [
                            self.o.valid.eq(1),
                            self.o.payload.data.eq(shift),
                            self.o.payload.framing_error.eq(~s2),
                        ]
                        # A low stop bit: wait for the line to return high first.
                        m.next = "IDLE"
                        with m.If(~s2):
                            m.next = "BREAK"
                    with m.Else():
                        m.d.sync += shift.eq(Cat(shift[1:], s2))
            with m.State("BREAK"):
                with m.If(s2):
                    m.next = "IDLE"
        return m

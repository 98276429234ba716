"""UART transmitter: 8N1 bytes onto a pin, back to back when offered in time.

Timing rules: ``docs/link.md``, section "UART".
"""

from amaranth.hdl import Cat, Module, Signal
from amaranth.lib import stream, wiring
from amaranth.lib.wiring import In, Out

from dvgate.linkspec import MIN_BIT_CYC


class UartTx(wiring.Component):
    """Send one start bit, eight data bits (least significant first) and one stop bit.

    A byte taken at cycle ``t`` drives the start bit from ``t + 1``; every bit lasts
    ``bit_cyc`` cycles, so the stop bit ends at ``t + 10 * bit_cyc``. The transmitter is
    ready again on that last cycle, so bytes offered in time follow each other with
    exactly one stop bit between them: the highest rate the baud rate allows.

    Parameters
    ----------
    bit_cyc : int
        Clock cycles per bit, at least 4.

    Attributes
    ----------
    i : stream.Signature(8), in
        Bytes to send.
    tx : Signal(1), out
        The transmit pin (a register); idles high.
    """

    i: In(stream.Signature(8))
    tx: Out(1, init=1)

    def __init__(self, bit_cyc: int) -> None:
        if not isinstance(bit_cyc, int) or bit_cyc < MIN_BIT_CYC:
            raise ValueError(f"bit_cyc must be an integer of at least {MIN_BIT_CYC}, not {bit_cyc!r}")
        self._bit_cyc = bit_cyc
        super().__init__()

    def elaborate(self, platform) -> Module:
        m = Module()
        bit_cyc = self._bit_cyc

        busy  = Signal()
        shift = Signal(9)
        left  = Signal(range(10))
        timer = Signal(range(bit_cyc))

        last_cycle = busy & (left == 0) & (timer == 0)
        m.d.comb += self.i.ready.eq(~busy | last_cycle)

        with m.If(self.i.valid & self.i.ready):
            m.d.sync += [
                self.tx.eq(0),
                shift.eq(Cat(self.i.payload, 1)),
                left.eq(9),
                timer.eq(bit_cyc - 1),
                busy.eq(1),
            ]
        with m.Elif(busy):
            with m.If(timer != 0):
                m.d.sync += timer.eq(timer - 1)
            with m.Elif(left != 0):
                m.d.sync += [
                    self.tx.eq(shift[0]),
                    shift.eq(shift[1:]),
                    left.eq(left - 1),
                    timer.eq(bit_cyc - 1),
                ]
            with m.Else():
                m.d.sync += busy.eq(0)
        return m

"""Rate registers: one shadow and one live rate per channel, committed together.

Cycle rules: ``docs/timing.md``, section "Cycles and stimulus" (rate changes).
"""

from __future__ import annotations

from amaranth.hdl import Module, Signal, signed
from amaranth.lib import data, wiring
from amaranth.lib.wiring import In, Out
from amaranth.utils import ceil_log2

from dvgate.params import HardwareParams


def addr_bits(params: HardwareParams) -> int:
    """Width of the rate register address (at least 1 bit)."""
    return max(1, ceil_log2(params.n))


class RateRegisters(wiring.Component):
    """Shadow rates written one at a time, copied to the live rates all at once.

    A write at cycle ``k`` sets ``shadow[addr]`` from ``k + 1``; a commit at cycle ``k``
    sets every live rate from its shadow from ``k + 1``, a write in the same cycle
    included. Both reset to the config's initial rates. An address past the last
    channel writes nothing.

    Parameters
    ----------
    params : HardwareParams
        Channel count, rate width and initial rates.

    Attributes
    ----------
    addr : Signal(addr_bits), in
        Channel index to write.
    data : Signal(signed(rate_bits)), in
        Rate to write, fixed point.
    we : Signal(1), in
        Write ``data`` to ``shadow[addr]`` this cycle.
    commit : Signal(1), in
        Copy every shadow to the live rates this cycle.
    rates : ArrayLayout(signed(rate_bits), n), out
        Live rates (registers).
    """

    def __init__(self, params: HardwareParams) -> None:
        self._params = params
        layout = data.ArrayLayout(signed(params.rate_bits), params.n)
        super().__init__({
            "addr": In(addr_bits(params)),
            "data": In(signed(params.rate_bits)),
            "we": In(1),
            "commit": In(1),
            "rates": Out(layout, init=list(params.rates)),
        })

    def elaborate(self, platform) -> Module:
        m = Module()
        p = self._params
        for i in range(p.n):
            shadow = Signal(signed(p.rate_bits), init=p.rates[i], name=f"shadow{i}")
            incoming = Signal(signed(p.rate_bits), name=f"shadow{i}_next")
            write = self.we & (self.addr == i)
            m.d.comb += incoming.eq(shadow)
            with m.If(write):
                m.d.comb += incoming.eq(self.data)
            m.d.sync += shadow.eq(incoming)
            with m.If(self.commit):
                m.d.sync += self.rates[i].eq(incoming)
        return m

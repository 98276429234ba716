"""The emulator with its host link: UART, frames, segment FIFO and player, fault settings, telemetry.

Ports: the emulator's strobe and outputs, an arm pin, the serial pins and status lines
for LEDs. Rules: ``docs/link.md`` (the link) and ``docs/timing.md`` (the emulator).
"""

from pathlib import Path

from amaranth.hdl import Cat, Module
from amaranth.lib import data, wiring
from amaranth.lib.wiring import In, Out

from dvgate.gateware.link import HostLink, field_offsets
from dvgate.gateware.pulse_counts import PulseCounters
from dvgate.gateware.segments import SegmentPlayer
from dvgate.gateware.top import Emulator, component_verilog
from dvgate.gateware.uart_rx import UartRx
from dvgate.gateware.uart_tx import UartTx
from dvgate.linkspec import FAULT_SET_BITS, FLAG_BITS, LinkParams


class LinkedTop(wiring.Component):
    """:class:`~dvgate.gateware.top.Emulator` fed by segments and fault settings over a UART.

    The outputs are armed when the host has armed them *and* the ``arm`` pin is high
    (tie it high on a board without an arm switch). Each output line's pulses are
    counted (rising edges of the logical line) for the telemetry, which also reports the
    emulator's ``ignored`` counter and the requested channel's fault set in force.

    Parameters
    ----------
    link : LinkParams
        The emulator (``link.hw``) and its link.

    Attributes
    ----------
    strobe : Signal(1), in
        Raw strobe pin.
    arm : Signal(1), in
        Arm switch; outputs are enabled only while it is high and the host has armed them.
    rx : Signal(1), in
        Serial receive pin (idles high).
    tx : Signal(1), out
        Serial transmit pin (idles high).
    <name>_pos, <name>_neg : Signal(1), out
        Output lines of each channel, physical level.
    armed, playing, starved, link_error : Signal(1), out
        Status for LEDs: outputs armed; playing a program; out of segments (underrun);
        a frame was rejected (sticky until reset).
    emulator, player, host, counters : components
        The parts (for testbenches).
    """

    def __init__(self, link: LinkParams) -> None:
        self._link = link
        hw = link.hw
        members = {
            "strobe": In(1),
            "arm": In(1),
            "rx": In(1, init=1),
            "tx": Out(1, init=1),
        }
        for name in hw.names:
            members[f"{name}_pos"] = Out(1, init=int(hw.active_low))
            members[f"{name}_neg"] = Out(1, init=int(hw.active_low))
        members.update({"armed": Out(1), "playing": Out(1), "starved": Out(1), "link_error": Out(1)})
        super().__init__(members)
        self.emulator = Emulator(hw)
        self.player = SegmentPlayer(link)
        self.host = HostLink(link)
        self.uart_rx = UartRx(link.bit_cyc)
        self.uart_tx = UartTx(link.bit_cyc)
        base = field_offsets(link)["pos"][0]
        # The counters set each total aside within 2 n cycles of the request; the reply
        # reaches ``pos`` only after its first ``base + 3`` bytes have left.
        if (base + 3) * link.byte_cyc <= 2 * hw.n + 2:
            raise ValueError(f"{hw.n} channels are too many for the pulse counters at {link.bit_cyc} cycles per bit")
        self.counters = PulseCounters(hw.n, base)

    def elaborate(self, platform) -> Module:
        m = Module()
        link = self._link
        hw = link.hw

        m.submodules.emulator = emu = self.emulator
        m.submodules.player = player = self.player
        m.submodules.host = host = self.host
        m.submodules.uart_rx = urx = self.uart_rx
        m.submodules.uart_tx = utx = self.uart_tx
        m.submodules.counters = counters = self.counters

        wiring.connect(m, urx.o, host.i)
        wiring.connect(m, host.o, utx.i)
        m.d.comb += [
            urx.rx.eq(self.rx),
            self.tx.eq(utx.tx),
            *host_to_player(host, player),
            emu.strobe.eq(self.strobe),
            emu.arm.eq(player.arm & self.arm),
            emu.rate_addr.eq(player.rate_addr),
            emu.rate_data.eq(player.rate_data),
            emu.rate_we.eq(player.rate_we),
            emu.rate_commit.eq(player.rate_commit),
            emu.fault_addr.eq(host.fault_addr),
            emu.fault_data.eq(host.fault_data),
            emu.fault_we.eq(host.fault_we),
            emu.ignore_we.eq(host.ignore_we),
            emu.ignore_cycles.eq(host.ignore_cycles),
            self.armed.eq(player.arm & self.arm),
            self.playing.eq(player.play != 0),
            self.starved.eq(player.play == 2),
        ]
        with m.If(host.reject_stb):
            m.d.sync += self.link_error.eq(1)

        # Pulses started on each line: rising edges of the logical lines. A pulse counts
        # from the cycle its line is high, the cycle the emitter's pending count drops.
        pend_pos, pend_neg, owed, lines = [], [], [], []
        for i, name in enumerate(hw.names):
            em = emu.emitters[i]
            pos_port, neg_port = emu.output_ports(i)
            m.d.comb += [
                getattr(self, f"{name}_pos").eq(pos_port),
                getattr(self, f"{name}_neg").eq(neg_port),
            ]
            lines += [em.pos, em.neg]
            pend_pos.append(em.pend_pos)
            pend_neg.append(em.pend_neg)
            owed.append(emu.accumulators[i].owed)
        m.d.comb += [
            counters.lines.eq(Cat(*lines)),
            counters.snap.eq(host.tm_stb),
            counters.channel.eq(host.tm_channel),
            counters.idx.eq(host.ext_idx),
            counters.step.eq(host.ext_step),
            counters.take.eq(host.ext_take),
            host.ext_data.eq(counters.data),
        ]

        tm = host.tm
        # The state byte: play (bits 0-1), armed by the host, arm pin, host absent (STATE_BITS).
        m.d.comb += [
            tm.state.eq(Cat(player.play, player.arm, self.arm, emu.host_absent)),
            tm.flags.eq(Cat(*(getattr(emu.flags, name) for name in FLAG_BITS))),
            tm.level.eq(player.level),
            tm.free.eq(player.free),
            tm.played.eq(player.played),
            tm.underruns.eq(player.underruns),
            tm.strobes.eq(emu.strobes),
            tm.period.eq(emu.period),
            tm.overruns.eq(emu.overruns),
            tm.clamps.eq(emu.clamps),
            tm.deferrals.eq(emu.deferrals),
            tm.saturations.eq(emu.saturations),
            tm.ignored.eq(emu.ignored),
        ]
        # Only the instant of an applied request matters, when the channel is below n: its
        # low bits select, the last channel stands for every other value.
        # The fault set is the one in force (a FAULT frame applied at ``e`` holds from
        # ``e + 2``, and the next frame ends two cycles later at the earliest).
        def books(i: int) -> list:
            return [tm.pend_pos.eq(pend_pos[i]), tm.pend_neg.eq(pend_neg[i]), tm.owed.eq(owed[i]),
                    *fault_fields(tm, emu.fault_stages[i].faults)]

        with m.Switch(host.tm_channel[:(hw.n - 1).bit_length()]):
            for i in range(hw.n - 1):
                with m.Case(i):
                    m.d.comb += books(i)
            with m.Default():
                m.d.comb += books(hw.n - 1)
        return m


def fault_fields(tm: data.View, faults: data.View) -> list:
    """The statements that put a fault set into the telemetry's ``fault_set`` and
    ``storm_period``, encoded as in a FAULT frame.

    Parameters
    ----------
    tm : View of telemetry_layout
        The link's ``tm`` input.
    faults : View of FaultLayout
        The fault set (a fault stage's ``faults``).
    """
    return [tm.fault_set.eq(Cat(*(getattr(faults, name) for name in FAULT_SET_BITS))),
            tm.storm_period.eq(faults.storm_period)]


def host_to_player(host: HostLink, player: SegmentPlayer) -> list:
    """The statements that join the link's command layer to the segment player.

    One place for them: the linked top and the link's test benches wire the two alike.
    """
    return [
        player.w_data.eq(host.w_data),
        player.w_en.eq(host.w_en),
        player.w_next.eq(host.w_next),
        player.w_commit.eq(host.w_commit),
        player.w_rollback.eq(host.w_rollback),
        host.room.eq(player.room),
        player.start.eq(host.start),
        player.arm_on.eq(host.arm_on),
        player.stop.eq(host.stop),
    ]


def write_linked_verilog(link: LinkParams, path: str | Path | None = None) -> str:
    """Verilog of the emulator with its host link, top module ``dvgate_linked``.

    Parameters
    ----------
    link : LinkParams
        The emulator and its link.
    path : str or Path, optional
        Also write the text to this file.

    Returns
    -------
    str
        The Verilog source.
    """
    return component_verilog(LinkedTop(link), "dvgate_linked", path)

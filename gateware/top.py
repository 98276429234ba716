"""The emulator's top: one strobe detector, rate registers and a pulse pair per channel.

Cycle rules: ``docs/timing.md``. Port names are a contract (board builds, host link,
testbenches): ``strobe``, ``arm``, ``rate_*``, ``fault_*``, ``ignore_*``,
``<name>_pos``/``<name>_neg`` and the status ports.
"""

import re
from pathlib import Path

from amaranth.back import verilog
from amaranth.hdl import Module, Mux, Signal, Value, signed
from amaranth.lib import data, wiring
from amaranth.lib.wiring import In, Out

from dvgate.gateware.accumulator import RateAccumulator
from dvgate.gateware.emitter import PulseEmitter
from dvgate.gateware.faults import FaultLayout, FaultStage
from dvgate.gateware.rates import RateRegisters, addr_bits
from dvgate.gateware.strobe import StrobeDetector
from dvgate.params import EVENT_COUNT_BITS, IGNORE_CYCLES_BITS, STROBE_COUNT_BITS, HardwareParams

_EVENT_MAX = (1 << EVENT_COUNT_BITS) - 1
#: A channel name must make valid port names (``<name>_pos``).
_NAME_RE = re.compile(r"^[A-Za-z][0-9A-Za-z_]*$")


class StatusFlags(data.Struct):
    """Sticky event flags, set since reset; each rises at a taken strobe (:func:`status_logic`)."""

    overrun: 1
    clamped: 1
    deferred: 1
    saturated: 1


def status_logic(m: Module, top: wiring.Component, take: Value, overrun: Signal, clamped: Signal,
                 deferred: Signal, sat_evt: Signal, *, late_events: bool = False) -> Signal:
    """The sticky flags and event counters of a top, added to ``m``'s ``sync`` domain.

    The contract (rules: ``docs/timing.md``, "Status"):

    - ``overrun``, ``clamped``, ``deferred`` are events of taken strobes: in a cycle
      where any of their bits is 1, the flag of that name is set and its counter counts
      one (16 bits, saturating). They are counted as given: the caller drives them only
      in the cycle a strobe is taken (nothing here gates them with ``take``).
    - ``sat_evt`` bit ``i`` is 1 when channel ``i``'s owed update of this cycle saturates
      (``owed(k+1)`` held at a limit). It marks the channel in the ``clipped`` register,
      ``clipped(k+1) = (clipped(k) & ~take(k)) | sat_evt(k)``. A cycle with ``take`` and
      any mark set counts one saturation and sets ``flags.saturated``; so a mark made in
      a strobe's own cycle belongs to the next taken strobe, and marks outlast disarming
      and strobes that are not taken.
    - An event at cycle ``k`` shows from ``k + 1``. Every flag and counter is a
      register; with ``late_events`` it is a register plus the events of the cycle before,
      which come from registers too (the same values, cycle for cycle). The shared
      datapath's top uses that: its events come late in a strobe's cycle from every
      emitter, and their OR then waits for the next one.

    Parameters
    ----------
    m : Module
        The top's module; the ``clipped`` register and the updates go in its ``sync``
        domain (so the register is named ``clipped`` in the top).
    top : wiring.Component
        Has the ports ``flags`` (:class:`StatusFlags`) and ``overruns``, ``clamps``,
        ``deferrals``, ``saturations`` (each ``Signal(16)``), which this logic drives.
    take : Value, 1 bit
        A strobe is taken this cycle (``stb & armed & ~ignoring``).
    overrun, clamped, deferred : Signal(n)
        Per channel: the strobe taken this cycle found the emitter busy; its accepted
        hand-over was clamped; it was deferred.
    sat_evt : Signal(n)
        Per channel: this cycle's owed update saturates.
    late_events : bool
        Register the events as they come (one bit per channel) and count them a cycle
        later; the ports then add the registered events to the counts.

    Returns
    -------
    Signal(n)
        The ``clipped`` marks (one bit per channel): the channels whose owed amount
        saturated since the last taken strobe.
    """
    clipped = Signal(len(sat_evt), name="clipped")
    m.d.sync += clipped.eq(Mux(take, 0, clipped) | sat_evt)
    # A taken strobe reports the marks made before its own cycle.
    saturated = take & clipped.any()
    events = [
        (overrun.any(), top.flags.overrun, top.overruns),
        (clamped.any(), top.flags.clamped, top.clamps),
        (deferred.any(), top.flags.deferred, top.deferrals),
        (saturated, top.flags.saturated, top.saturations),
    ]
    vectors = {"overrun": overrun, "clamped": clamped, "deferred": deferred, "saturated": saturated}
    for (event, flag, counter), name in zip(events, vectors, strict=True):
        if late_events:
            # Last cycle's events (per channel, before any OR), and the counts before them.
            vector = vectors[name]
            held = Signal(len(vector), name=f"{name}_event")
            counted = Signal.like(counter, name=f"{name}_count")
            stuck = Signal(name=f"{name}_flag")
            m.d.sync += held.eq(vector)
            event = held.any()
            m.d.comb += [flag.eq(stuck | event), counter.eq(counted + (event & (counted != _EVENT_MAX)))]
            flag, counter = stuck, counted
        # The count saturates by adding 0 at the top, not by a second condition on the
        # event: the event alone enables the register (it comes late on a strobe's cycle).
        with m.If(event):
            m.d.sync += [flag.eq(1), counter.eq(counter + (counter != _EVENT_MAX))]
    return clipped


def check_names(params: HardwareParams) -> None:
    """Refuse channel names that cannot name ports, or that repeat."""
    names = params.names
    for name in names:
        if not _NAME_RE.match(name):
            raise ValueError(
                f"channel name {name!r} cannot name a port: use a letter, then letters, "
                "digits or '_'")
    if len(set(names)) != len(names):
        raise ValueError(f"channel names must differ, not {list(names)!r}")


def port_members(params: HardwareParams, *, rates: bool = True) -> dict[str, wiring.Member]:
    """The signature members of an emulator top, in port order (see :class:`Emulator`).

    Parameters
    ----------
    params : HardwareParams
        The emulator.
    rates : bool
        Include the rate register port (``rate_*``); the shared datapath has none.
    """
    members = {"strobe": In(1), "arm": In(1)}
    if rates:
        members.update({
            "rate_addr": In(addr_bits(params)),
            "rate_data": In(signed(params.rate_bits)),
            "rate_we": In(1),
            "rate_commit": In(1),
        })
    members.update({
        "fault_addr": In(addr_bits(params)),
        "fault_data": In(FaultLayout),
        "fault_we": In(1),
        "ignore_we": In(1),
        "ignore_cycles": In(IGNORE_CYCLES_BITS),
    })
    for name in params.names:
        members[f"{name}_pos"] = Out(1)
        members[f"{name}_neg"] = Out(1)
    members.update({
        "strobes": Out(STROBE_COUNT_BITS),
        "period": Out(STROBE_COUNT_BITS),
        "host_absent": Out(1),
        "flags": Out(StatusFlags),
        "overruns": Out(EVENT_COUNT_BITS),
        "clamps": Out(EVENT_COUNT_BITS),
        "deferrals": Out(EVENT_COUNT_BITS),
        "saturations": Out(EVENT_COUNT_BITS),
        "ignored": Out(EVENT_COUNT_BITS),
    })
    return members


def strobe_detector(params: HardwareParams) -> StrobeDetector:
    """The strobe detector of a top: the config's edge, glitch filter and absence timeout."""
    return StrobeDetector(edge_rising=params.edge_rising, min_width_cyc=params.min_width_cyc,
                          absence_cyc=params.absence_cyc)


def ignore_logic(m: Module, top: wiring.Component, stb: Value) -> tuple[Signal, Signal]:
    """The ignore window of a top (its ``ignore_we``/``ignore_cycles`` ports) and its ``ignored`` count.

    The window counts down the cycles left; a write replaces it. Strobes detected in it
    are counted (16 bits, saturating), armed or not.

    Returns
    -------
    tuple of Signal(1)
        The window is open this cycle (a strobe now is not taken), and whether it is open
        the next cycle.
    """
    ignore_left = Signal(IGNORE_CYCLES_BITS, name="ignore_left")
    # ``ignore_left != 0`` kept as its own register: the strobe's take then waits for no
    # 32-bit test.
    ignoring    = Signal(name="ignore_open")
    open_next   = Signal()
    # An if, not a Mux: in a Verilog simulation that leaves the port undriven the window
    # then stays closed (as before this register), rather than turning every strobe to x.
    with m.If(top.ignore_we):
        m.d.comb += open_next.eq(top.ignore_cycles != 0)
    with m.Else():
        m.d.comb += open_next.eq(ignoring & (ignore_left != 1))
    m.d.sync += ignoring.eq(open_next)
    with m.If(top.ignore_we):
        m.d.sync += ignore_left.eq(top.ignore_cycles)
    with m.Elif(ignoring):
        m.d.sync += ignore_left.eq(ignore_left - 1)
    with m.If(stb & ignoring & (top.ignored != _EVENT_MAX)):
        m.d.sync += top.ignored.eq(top.ignored + 1)
    return ignoring, open_next


class Emulator(wiring.Component):
    """Pulse-output accelerometer emulator for ``params.n`` channels.

    Latency from the strobe pin's active edge to the first output edge is
    ``params.latency_cyc`` (``min_width_cyc + 2``) cycles on every channel.

    Parameters
    ----------
    params : HardwareParams
        The emulator's integers.

    Attributes
    ----------
    strobe : Signal(1), in
        Raw strobe pin, physical level (active low when ``edge_rising`` is False).
    arm : Signal(1), in
        Outputs enabled; registered once (``armed(k+1) = arm(k)``).
    rate_addr : Signal(max(1, ceil_log2(n))), in
        Channel whose shadow rate ``rate_we`` writes.
    rate_data : Signal(signed(rate_bits)), in
        Rate to write, fixed point.
    rate_we : Signal(1), in
        Write ``rate_data`` to the shadow of ``rate_addr``.
    rate_commit : Signal(1), in
        Copy every shadow to the live rates (a write in the same cycle included).
    fault_addr : Signal(max(1, ceil_log2(n))), in
        Channel whose fault set ``fault_we`` writes.
    fault_data : FaultLayout, in
        The channel's whole fault set; in force from the cycle after the write.
    fault_we : Signal(1), in
        Write ``fault_data`` as the fault set of ``fault_addr``.
    ignore_we : Signal(1), in
        Start an ignore window next cycle, replacing the one in force.
    ignore_cycles : Signal(32), in
        Length of the window ``ignore_we`` starts: strobes detected in the next
        ``ignore_cycles`` cycles are not taken.
    <name>_pos, <name>_neg : Signal(1), out
        Output lines of each channel, physical level (logical XOR ``active_low``);
        idle while not armed.
    strobes, period : Signal(32), out
        Strobe count and the cycles between the last two strobes.
    host_absent : Signal(1), out
        No strobe for ``absence_cyc`` cycles.
    flags : StatusFlags, out
        Sticky ``overrun``, ``clamped``, ``deferred``, ``saturated``.
    overruns, clamps, deferrals : Signal(16), out
        Taken strobes at which any channel had the event; saturating.
    saturations : Signal(16), out
        Taken strobes at which some channel's owed amount had saturated since the
        previous taken strobe; saturating (:func:`status_logic`).
    ignored : Signal(16), out
        Strobes detected inside an ignore window (armed or not); saturating.
    detector : StrobeDetector
        The strobe detector (for testbenches).
    rate_regs : RateRegisters
        The rate registers (for testbenches and the host link).
    accumulators : list of RateAccumulator
        One per channel, in port order (for testbenches).
    emitters : list of PulseEmitter
        One per channel, in port order (for testbenches).
    fault_stages : list of FaultStage
        One per channel, in port order: the fault set and the output registers.
    """

    def __init__(self, params: HardwareParams) -> None:
        check_names(params)
        self._params = params
        super().__init__(port_members(params))

        # Built here, not in elaborate(), so testbenches can reach their signals.
        self.detector = strobe_detector(params)
        self.rate_regs = RateRegisters(params)
        self.accumulators = [RateAccumulator(params) for _ in params.names]
        self.emitters = [PulseEmitter(params) for _ in params.names]
        self.fault_stages = [FaultStage(params) for _ in params.names]

    def output_ports(self, channel: int) -> tuple[Signal, Signal]:
        """The physical ``(pos, neg)`` output ports of channel ``channel``."""
        name = self._params.names[channel]
        return getattr(self, f"{name}_pos"), getattr(self, f"{name}_neg")

    def elaborate(self, platform) -> Module:
        m = Module()
        p = self._params

        m.submodules.detector = det = self.detector
        m.submodules.rate_regs = regs = self.rate_regs

        armed       = Signal()
        stb         = Signal()
        take        = Signal()
        ignoring, _ = ignore_logic(m, self, det.stb)
        overrun     = Signal(p.n)
        clamped     = Signal(p.n)
        deferred    = Signal(p.n)
        sat_evt     = Signal(p.n)

        m.d.sync += armed.eq(self.arm)
        m.d.comb += [
            det.pin.eq(self.strobe),
            stb.eq(det.stb),
            take.eq(stb & armed & ~ignoring),
            self.strobes.eq(det.strobes),
            self.period.eq(det.period),
            self.host_absent.eq(det.host_absent),
            regs.addr.eq(self.rate_addr),
            regs.data.eq(self.rate_data),
            regs.we.eq(self.rate_we),
            regs.commit.eq(self.rate_commit),
        ]

        for i, (name, acc, em, fs) in enumerate(zip(p.names, self.accumulators, self.emitters,
                                                    self.fault_stages, strict=True)):
            m.submodules[f"{name}_acc"] = acc
            m.submodules[f"{name}_emit"] = em
            m.submodules[f"{name}_fault"] = fs
            pos_port, neg_port = self.output_ports(i)
            m.d.comb += [
                acc.rate.eq(regs.rates[i]),
                acc.take.eq(take),
                acc.prepare.eq(det.stb_next),
                acc.armed.eq(armed),
                acc.accept.eq(em.accept),
                acc.no_rest.eq(fs.faults.no_rest),
                em.load.eq(acc.load),
                em.new_pos.eq(acc.new_pos),
                em.new_neg.eq(acc.new_neg),
                em.armed.eq(armed),
                # armed(k+1) = arm(k): the output registers see the next armed value.
                em.armed_next.eq(self.arm),
                fs.we.eq(self.fault_we & (self.fault_addr == i)),
                fs.data.eq(self.fault_data),
                fs.line_pos_next.eq(em.line_pos_next),
                fs.line_neg_next.eq(em.line_neg_next),
                fs.armed_next.eq(self.arm),
                # The pins come straight from the fault stage's registers.
                pos_port.eq(fs.pos ^ p.active_low),
                neg_port.eq(fs.neg ^ p.active_low),
                overrun[i].eq(take & em.busy),
                clamped[i].eq(acc.clamp_evt),
                deferred[i].eq(acc.defer_evt),
                sat_evt[i].eq(acc.sat_evt),
            ]

        status_logic(m, self, take, overrun, clamped, deferred, sat_evt)
        return m


def write_verilog(params: HardwareParams, path: str | Path | None = None) -> str:
    """Verilog of the emulator's top (of ``params.datapath``), module ``dvgate_top``.

    Parameters
    ----------
    params : HardwareParams
        The emulator.
    path : str or Path, optional
        Also write the text to this file.

    Returns
    -------
    str
        The Verilog source.
    """
    from dvgate.gateware.shared_top import emulator_top  # it builds on this module

    return component_verilog(emulator_top(params), "dvgate_top", path)


def component_verilog(component: wiring.Component, name: str, path: str | Path | None = None) -> str:
    """Verilog of ``component`` as module ``name`` (ports from its signature), also written to ``path``."""
    text = verilog.convert(component, name=name)
    if path is not None:
        Path(path).write_text(text)
    return text

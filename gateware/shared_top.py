"""The emulator's top with the shared owed datapath (``datapath = "shared"``).

The same outputs, cycle for cycle, as :class:`dvgate.gateware.top.Emulator` with the same
rates (``docs/timing.md``); what differs is the port contract:

- there is no rate port: every channel keeps the config's rate;
- ``arm`` is taken :attr:`HardwareParams.arm_lead` cycles ahead: the level driven at cycle
  ``k`` is ``armed`` from ``k + arm_lead + 1`` (the per-channel top: from ``k + 1``), and
  changes of ``arm`` must be at least :attr:`HardwareParams.arm_spacing` cycles apart.

The strobe-to-pulse latency is the same, ``min_width_cyc + 2`` cycles.
"""

from __future__ import annotations

from amaranth.hdl import Cat, Module, Signal
from amaranth.lib import wiring

from dvgate.gateware.faults import FaultStage
from dvgate.gateware.shared_emitter import SharedEmitter
from dvgate.gateware.shared_owed import SharedOwed
from dvgate.gateware.top import Emulator, check_names, ignore_logic, port_members, status_logic, strobe_detector
from dvgate.params import HardwareParams


class SharedEmulator(wiring.Component):
    """Pulse-output accelerometer emulator whose channels share one owed datapath.

    Parameters
    ----------
    params : HardwareParams
        With ``datapath == "shared"``.

    Attributes
    ----------
    The ports of :class:`dvgate.gateware.top.Emulator` without ``rate_*``, and:

    detector : StrobeDetector
    owed : SharedOwed
        The shared datapath (its block RAMs hold the owed amounts).
    emitters : list of SharedEmitter
    fault_stages : list of FaultStage
    """

    def __init__(self, params: HardwareParams) -> None:
        if params.datapath != "shared":
            raise ValueError("SharedEmulator needs params with datapath 'shared'")
        check_names(params)
        self._params = params
        super().__init__(port_members(params, rates=False))
        self.detector = strobe_detector(params)
        self.owed = SharedOwed(params)
        self.emitters = [SharedEmitter(params) for _ in params.names]
        self.fault_stages = [FaultStage(params) for _ in params.names]

    # The same ports, named after the channels, as the per-channel top.
    output_ports = Emulator.output_ports

    def elaborate(self, platform) -> Module:
        m = Module()
        p = self._params
        lead = p.arm_lead

        m.submodules.detector = det = self.detector
        m.submodules.owed = owed = self.owed

        # arm_line[j] holds ``armed`` of cycle k + lead - j.
        arm_line = Signal(lead + 1)
        m.d.sync += arm_line.eq(Cat(self.arm, arm_line[:-1]))
        armed      = arm_line[lead]
        armed_next = arm_line[lead - 1]

        take     = Signal()
        ignoring, ignoring_next = ignore_logic(m, self, det.stb)
        overrun  = Signal(p.n)
        clamped  = Signal(p.n)
        deferred = Signal(p.n)
        m.d.comb += [
            det.pin.eq(self.strobe),

            self.strobes.eq(det.strobes),
            self.period.eq(det.period),
            self.host_absent.eq(det.host_absent),
            owed.ahead_valid.eq(det.ahead_valid),
            owed.ahead.eq(det.ahead),
            owed.in_view.eq(det.in_view),
            owed.armed_ahead.eq(arm_line[0]),
        ]

        # ``stb & armed & ~ignoring``, as a register: the emitters' logic then starts from flip-flops.
        m.d.sync += take.eq(det.stb_next & armed_next & ~ignoring_next)

        for i, (name, em, fs) in enumerate(zip(p.names, self.emitters, self.fault_stages, strict=True)):
            m.submodules[f"{name}_emit"] = em
            m.submodules[f"{name}_fault"] = fs
            pos_port, neg_port = self.output_ports(i)
            m.d.comb += [
                em.take.eq(take),
                em.hand_pos.eq(owed.hand_pos[i]),
                em.hand_neg.eq(owed.hand_neg[i]),
                em.rest.eq(~fs.faults.no_rest),
                em.snap.eq(owed.snap[i]),
                em.snap_acc.eq(owed.snap_acc[i]),
                em.fold.eq(owed.fold[i]),
                em.fold_pos.eq(owed.fold_pos),
                em.fold_neg.eq(owed.fold_neg),
                em.acc_we.eq(owed.acc_we[i]),
                em.acc_in.eq(owed.acc_bits),
                owed.em_tp[i].eq(em.tp),
                owed.em_tn[i].eq(em.tn),
                owed.em_lp[i].eq(em.lp),
                owed.em_lp_rest[i].eq(em.lp_rest),
                owed.em_cleared[i].eq(em.cleared),
                em.armed.eq(armed),
                em.armed_next.eq(armed_next),
                owed.load[i].eq(em.load),
                fs.we.eq(self.fault_we & (self.fault_addr == i)),
                fs.data.eq(self.fault_data),
                fs.line_pos_next.eq(em.line_pos_next),
                fs.line_neg_next.eq(em.line_neg_next),
                fs.armed_next.eq(armed_next),
                pos_port.eq(fs.pos ^ p.active_low),
                neg_port.eq(fs.neg ^ p.active_low),
                overrun[i].eq(take & em.busy),
                clamped[i].eq(em.load & owed.hand_clmp[i]),
                deferred[i].eq(take & ~em.accept),
            ]
        status_logic(m, self, take, overrun, clamped, deferred, owed.clip, late_events=True)
        return m


def emulator_top(params: HardwareParams) -> wiring.Component:
    """The emulator's top for ``params``: :class:`SharedEmulator` or :class:`~dvgate.gateware.top.Emulator`."""
    if params.datapath == "shared":
        return SharedEmulator(params)
    return Emulator(params)

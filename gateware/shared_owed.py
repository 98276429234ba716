"""Shared owed datapath: one pipeline computes every channel's hand-over in turn.

The per-channel design adds each rate to its owed register every cycle. Here the owed
amounts live in block RAM and one pipeline visits channel ``i`` at every cycle
``v == i (mod P)`` (``P = params.shared_slots``), moving the channel's owed amount from
its last *anchor* cycle ``a`` to a *target* cycle ``t`` in one step. Cycle rules:
``docs/timing.md``; the step, exactly as the model's cycle-by-cycle rule gives it:

- The rates are constant (the config's), so between two events the owed amount moves in
  one direction and the per-cycle saturation is a clip of the end value:
  ``owed(t) = clip(X + (t - a) * rate)``, with ``(t - a) * rate`` read from a table in
  block RAM (a constant per channel and step length).
- A hand-over of ``n`` accepted at the anchor strobe ``a`` subtracts ``n * 2**F`` first.
  That first step cannot pass a limit (a rate is at most one pulse per cycle and ``n``
  has the sign of the owed amount), so ``owed(t) = clip(X - n * 2**F + (t - a) * rate)``.
- While disarmed the owed amount is 0; arming at ``e`` restarts it from 0 at ``e``.
  The ``armed_ahead`` input is ``armed`` :attr:`HardwareParams.arm_lead` cycles ahead, and
  arm changes are at least :attr:`HardwareParams.arm_spacing` cycles apart, so a visit
  sees at most one change between its anchor and the newest armed value it knows.

The visit at ``v`` serves the *window* of cycles ``[v + Q, v + P + Q)`` (``Q`` =
:data:`SHARED_DEPTH`): its target is the strobe in that window when the detector has one
in view (``ahead``), else ``v + P + Q``. Windows of one channel tile the time line, and a
strobe in a window is in view at the visit (the glitch filter lasts at least ``P + Q``
cycles), so every strobe is the target of one visit per channel, whose hand-over
(``hand_pos``/``hand_neg``, ``hand_clmp``, and the emitter's accept bits) is ready ``Q``
cycles after the visit. A strobe in view that never comes (the
pin fell) is a target nothing is handed over at. Whether a strobe's hand-over was accepted
is only known at the strobe; a visit whose anchor strobe is still ahead leaves the channel
alone (the next visit, ``P`` cycles later, moves it on).

The saturation a visit finds (the end value past a limit) is reported as a pulse on
``clip``, before the strobe that ends its stretch: the status counts saturations per
taken strobe (``docs/timing.md``, "Status").

The owed amount is stored raw, in three chunks that a skewed adder updates one per cycle,
with a code saying whether it is to be read as raw, 0, or the upper or lower limit, so no
clip is applied to the stored bits.

The emitters' pending counts are kept here as well (``_books``; the emitters,
``gateware/shared_emitter.py``, keep flags): each visit that moves a channel on folds in
the pulses it started and the hand-over it loaded since the last one, writes back whether
each line has a pulse pending, and, for a strobe target, whether its hand-over fits the
backlog.
"""

from __future__ import annotations

from amaranth.hdl import Cat, Module, Mux, Signal, Value, signed
from amaranth.lib import data, memory, wiring
from amaranth.lib.wiring import In, Out

from dvgate.gateware.accumulator import ask_lines, ask_parts, ask_select, net_shape
from dvgate.gateware.ram import NO_RW_CHECK, SyncRead, sync_read
from dvgate.params import SHARED_DEPTH, HardwareParams

#: How a stored owed amount reads: as stored, as 0, as the upper or the lower limit.
RAW, ZERO, UPPER, LOWER = 0, 1, 2, 3
#: Block RAM, and no read-during-write logic: a channel's words are never read in a cycle
#: that writes them (see the module docstring; the reads are ``sync_read``'s).
_RAM_ATTRS = {"ram_style": "block", **NO_RW_CHECK}


def visit_layout(params: HardwareParams) -> data.StructLayout:
    """What every stage of the pipeline carries about the visit it works on.

    ``valid``: a channel's visit (not a spare slot, not left to the next visit);
    ``slot``: the channel; ``stb``: its target is a strobe; ``zero``: the owed amount
    is 0 at the target (set from stage 2 on); ``dis``: disarmed all through the step.
    """
    return data.StructLayout({"valid": 1, "slot": range(params.shared_slots), "stb": 1, "zero": 1, "dis": 1})


def _visits(tag: Value, channel: int) -> Value:
    """The stage holding ``tag`` works on ``channel`` this cycle."""
    return tag.valid & (tag.slot == channel)


def cycle_bits(params: HardwareParams) -> int:
    """Width of the cycle numbers of anchors and targets (kept modulo ``2**width``)."""
    return (8 * params.shared_slots + 4 * SHARED_DEPTH).bit_length() + 1


def chunks(params: HardwareParams) -> tuple[int, int]:
    """Bit boundaries of the owed amount's low, middle and whole chunks: ``(L1, F)``."""
    return params.frac_bits // 2, params.frac_bits


def step_table(params: HardwareParams) -> tuple[list[int], list[int], list[int]]:
    """The products ``d * rate`` of every channel and step, split into the adder's chunks.

    Returns
    -------
    tuple of list of int
        Low, middle and whole chunks (the whole chunk in two's complement of
        ``shared_d_bits + 2`` bits) at address ``channel * 2**shared_d_bits + d``.
    """
    l1, frac = chunks(params)
    width = params.shared_d_bits + 2
    lo, mid, whole = [], [], []
    for rate in params.rates:
        for d in range(1 << params.shared_d_bits):
            product = d * rate
            lo.append(product & ((1 << l1) - 1))
            mid.append((product >> l1) & ((1 << (frac - l1)) - 1))
            whole.append((product >> frac) & ((1 << width) - 1))
    return lo, mid, whole


class SharedOwed(wiring.Component):
    """The owed amounts of every channel, and the count each strobe takes, in one pipeline.

    Parameters
    ----------
    params : HardwareParams
        With ``datapath == "shared"`` (its checks hold: window, rates, widths).

    Attributes
    ----------
    ahead_valid, ahead, in_view : in
        From the strobe detector: a strobe comes ``ahead`` cycles from now if the
        synchronized strobe stays active; a strobe is in view and has not come
        (``ahead_valid`` and ``ahead != 0``, as a register).
    armed_ahead : Signal(1), in
        ``armed`` of cycle ``k + arm_lead`` (the arm input, delayed to that point).
    load : Signal(n), in
        Per channel: the hand-over of this cycle's strobe is accepted (``take & accept``).
    hand_pos, hand_neg : Signal(n), out
        Per channel: the next strobe asks for pulses on the positive (negative) line
        beyond the rest pulses (registers, ready ``SHARED_DEPTH`` cycles after the visit
        that targets the strobe; the counts themselves stay in the pipeline).
    hand_clmp : Signal(n), out
        Per channel: ``hand_n`` was clamped (burst).
    clip : Signal(n), out
        Per channel: this cycle, a visit found that the channel's owed amount saturated
        in its stretch (one-cycle pulse).
    """

    def __init__(self, params: HardwareParams) -> None:
        if params.datapath != "shared":
            raise ValueError("SharedOwed needs params with datapath 'shared'")
        self._params = params
        super().__init__({
            "ahead_valid": In(1),
            "ahead": In(range(max(2, params.min_width_cyc))),
            "in_view": In(1),
            "armed_ahead": In(1),
            "load": In(params.n),
            "hand_pos": Out(params.n),
            "hand_neg": Out(params.n),
            "hand_clmp": Out(params.n),
            "clip": Out(params.n),
            # The emitters' counts (``gateware/shared_emitter.py``): their flags in, the
            # fold and the accept bits out.
            "em_tp": In(params.n),
            "em_tn": In(params.n),
            "em_lp": In(params.n),
            "em_lp_rest": In(params.n),
            "em_cleared": In(params.n),
            "snap": Out(params.n),
            "snap_acc": Out(params.n),
            "fold": Out(params.n),
            "fold_pos": Out(1),
            "fold_neg": Out(1),
            "acc_we": Out(params.n),
            "acc_bits": Out(4),
        })
        l1, frac = chunks(params)
        cb = cycle_bits(params)
        depth = params.n << params.shared_d_bits
        lo, mid, whole = step_table(params)
        # Tables of d * rate, and the stored state (anchor cycle and kind; code and hand-over;
        # the owed amount's three chunks), one word per channel.
        self.step_lo = memory.Memory(shape=l1, depth=depth, init=lo, attrs=_RAM_ATTRS)
        self.step_mid = memory.Memory(shape=frac - l1, depth=depth, init=mid, attrs=_RAM_ATTRS)
        self.step_whole = memory.Memory(shape=params.shared_d_bits + 2, depth=depth, init=whole,
                                        attrs=_RAM_ATTRS)
        self.anchor = memory.Memory(shape=cb + 1, depth=params.n, init=[], attrs=_RAM_ATTRS)
        self.handed = memory.Memory(shape=2 + net_shape(params).width, depth=params.n, init=[],
                                    attrs=_RAM_ATTRS)
        self.owed_lo = memory.Memory(shape=l1, depth=params.n, init=[], attrs=_RAM_ATTRS)
        self.owed_mid = memory.Memory(shape=frac - l1, depth=params.n, init=[], attrs=_RAM_ATTRS)
        self.owed_whole = memory.Memory(shape=params.owed_bits, depth=params.n, init=[], attrs=_RAM_ATTRS)
        # Each emitter's pending pulses per line, as of the last fold.
        self.counts = memory.Memory(shape=2 * count_bits(params), depth=params.n, init=[], attrs=_RAM_ATTRS)

    def elaborate(self, platform) -> Module:
        m = Module()
        p = self._params
        n, slots, q = p.n, p.shared_slots, SHARED_DEPTH
        lead, cap = p.arm_lead, p.arm_spacing
        l1, frac = chunks(p)
        cb = cycle_bits(p)
        d_bits = p.shared_d_bits
        nshape = net_shape(p)
        visit = visit_layout(p)

        for name in ("step_lo", "step_mid", "step_whole", "anchor", "handed", "owed_lo", "owed_mid",
                     "owed_whole", "counts"):
            m.submodules[name] = getattr(self, name)
        anchor_rd, anchor_wr = sync_read(m, self.anchor), self.anchor.write_port()
        handed_rd, handed_wr = sync_read(m, self.handed), self.handed.write_port()
        lo_rd, lo_wr = sync_read(m, self.owed_lo), self.owed_lo.write_port()
        mid_rd, mid_wr = sync_read(m, self.owed_mid), self.owed_mid.write_port()
        whole_rd, whole_wr = sync_read(m, self.owed_whole), self.owed_whole.write_port()
        step_lo_rd = self.step_lo.read_port(transparent_for=())
        step_mid_rd = self.step_mid.read_port(transparent_for=())
        step_whole_rd = self.step_whole.read_port(transparent_for=())
        counts_rd, counts_wr = sync_read(m, self.counts), self.counts.write_port()

        # Accepted hand-overs wait here for the visit that moves past their strobe.
        loaded = Signal(n)
        # The channels whose anchor is the strobe in view, while it is still ahead.
        pending = Signal(n)

        # --- counters: the cycle number and the cycles a visit looks ahead to ------------
        # Kept as registers so that no stage adds an offset to a cycle number first.
        now     = Signal(cb)
        now_end = Signal(cb, init=slots + q)            # v + P + Q: a window's end
        now_stb = Signal(cb, init=p.min_width_cyc - 1)  # where a strobe starting now would come
        now_arm = Signal(cb, init=lead)                 # the cycle armed_ahead speaks of
        m.d.sync += [now.eq(now + 1), now_end.eq(now_end + 1), now_stb.eq(now_stb + 1), now_arm.eq(now_arm + 1)]

        # --- the strobe in view: the cycle it comes, fixed when the filter starts counting
        stb_at = Signal(cb)
        with m.If(self.ahead_valid & (self.ahead == p.min_width_cyc - 1)):
            m.d.sync += stb_at.eq(now_stb)

        # --- the arm tracker: the newest armed value, where it changed, and how long ago --
        prev_armed = Signal()
        change_at  = Signal(cb)
        age        = Signal(range(cap + 1), init=cap)
        changed    = self.armed_ahead != prev_armed
        m.d.sync += [
            prev_armed.eq(self.armed_ahead),
            age.eq(Mux(changed, 1, Mux(age == cap, cap, age + 1))),
        ]
        with m.If(changed):
            m.d.sync += change_at.eq(now_arm)

        # --- stage 0 (cycle v): the slot and its target --------------------------------------
        slot = Signal(range(slots))
        m.d.sync += slot.eq(Mux(slot == slots - 1, 0, slot + 1))
        in_window = Signal()
        view_at   = Signal(cb)
        m.d.comb += [
            # The cycle of the strobe in view; on the filter's first active cycle ``stb_at``
            # is being set, so take its new value.
            view_at.eq(Mux(self.ahead == p.min_width_cyc - 1, now_stb, stb_at)),
            # A strobe in view at least Q cycles ahead and inside this visit's window.
            in_window.eq(self.ahead_valid & (self.ahead >= q) & (self.ahead < slots + q)),
            anchor_rd.addr.eq(slot),
        ]
        s1_valid = Signal()
        s1_slot  = Signal(range(slots))
        s1_t     = Signal(cb)
        s1_stb   = Signal()
        s1_e     = Signal(cb)
        s1_old   = Signal()
        s1_lvl   = Signal()
        s1_skip  = Signal()
        m.d.sync += [
            s1_valid.eq(slot < n),
            # ``pending`` after this cycle's update (which sets another slot's bit only).
            s1_skip.eq(pending.bit_select(slot, 1) & self.in_view),
            s1_slot.eq(slot),
            s1_t.eq(Mux(in_window, view_at, now_end)),
            s1_stb.eq(in_window),
            # The newest level holds from ``change_at`` (this cycle's change included).
            s1_e.eq(Mux(changed, now_arm, change_at)),
            s1_old.eq(~changed & (age == cap)),
            s1_lvl.eq(self.armed_ahead),
        ]

        # --- stage 1: the anchor against the target and the arm change (one subtraction
        # each, side by side) ------------------------------------------------------------
        a_abs  = anchor_rd.data[:cb]
        at_stb = anchor_rd.data[cb]
        diff_ta = Signal(cb)   # t - a
        diff_ea = Signal(cb)   # e - a
        diff_te = Signal(cb)   # t - e
        # ``x <= 0`` is ``x - 1 < 0``: the sign of one more sum, not a compare after one
        # (the differences stay far inside the cycle numbers' range).
        ea_less = Signal(cb)   # e - a - 1
        te_less = Signal(cb)   # t - e - 1
        m.d.comb += [
            diff_ta.eq(s1_t - a_abs),
            diff_ea.eq(s1_e - a_abs),
            diff_te.eq(s1_t - s1_e),
            ea_less.eq(s1_e + ~a_abs),
            te_less.eq(s1_t + ~s1_e),
            anchor_wr.addr.eq(s1_slot),
            anchor_wr.data.eq(Cat(s1_t, s1_stb)),
            # Read a stage early, so the low chunk's stage starts from registers; the owed
            # chunks two stages before their adds, so each add starts from a register that
            # holds the stored chunk as its code reads it.
            handed_rd.addr.eq(s1_slot),
            lo_rd.addr.eq(s1_slot),
        ]
        # The anchor's strobe is still ahead and still in view: its hand-over is not decided
        # yet. (A strobe that was in view and no longer is will not come: nothing is handed
        # over at it, and a new strobe may already be in this visit's window.)
        m.d.comb += anchor_wr.en.eq(s1_valid & ~s1_skip)
        # Cleared once the strobe in view comes (its hand-over is then decided) or is gone.
        with m.If(~self.in_view):
            m.d.sync += pending.eq(0)
        with m.Elif(s1_valid & ~s1_skip & s1_stb):
            m.d.sync += pending.eq(pending | (1 << s1_slot))
        r        = Signal(visit)
        r_at_stb = Signal()
        r_before = Signal()
        r_after  = Signal()
        r_lvl    = Signal()
        r_d_ta   = Signal(d_bits)
        r_d_ea   = Signal(d_bits)
        r_d_te   = Signal(d_bits)
        m.d.sync += [
            r.valid.eq(s1_valid & ~s1_skip),
            r.slot.eq(s1_slot),
            r.stb.eq(s1_stb),
            r_at_stb.eq(at_stb),
            # The change is at or before the anchor (or long ago); at or after the target.
            r_before.eq(s1_old | ea_less[-1]),
            r_after.eq(~s1_old & te_less[-1]),
            r_lvl.eq(s1_lvl),
            r_d_ta.eq(diff_ta),
            r_d_ea.eq(diff_ea),
            r_d_te.eq(diff_te),
        ]

        # --- stage 2: arming inside the step; the step's length ----------------------------
        rise_in = Signal()
        fall_in = Signal()
        dis_all = Signal()
        zero    = Signal()
        d_eff   = Signal(d_bits)
        m.d.comb += [
            rise_in.eq(~r_before & ~r_after & r_lvl),
            fall_in.eq(~r_before & ~r_after & ~r_lvl),
            dis_all.eq((r_before & ~r_lvl) | (r_after & r_lvl)),
            # Disarmed on the step's last cycle: the owed amount at the target is 0. A fall
            # inside the step still adds the armed cycles before it, to see a saturation.
            zero.eq(dis_all | fall_in),
            d_eff.eq(Mux(rise_in, r_d_te, Mux(fall_in, r_d_ea, r_d_ta))),
            step_lo_rd.addr.eq(Cat(d_eff, r.slot)),
            mid_rd.addr.eq(r.slot),
        ]
        use_hand = Signal()
        m.d.comb += use_hand.eq(loaded.bit_select(r.slot, 1) & r_at_stb & ~rise_in)
        consumed = Signal(n)
        m.d.comb += consumed.eq(Mux(r.valid, 1 << r.slot, 0))
        # A load of this cycle wins over the visit that consumes the previous one.
        m.d.sync += loaded.eq((loaded & ~consumed) | self.load)

        s2       = Signal(visit)
        s2_d     = Signal(d_bits)
        s2_hand  = Signal()
        s2_code  = Signal(2)
        s2_copy  = Signal(nshape)
        s2_lo    = Signal(l1)     # the stored low chunk as the code reads it
        code_in  = Signal(2)
        # Arming inside the step restarts the owed amount from 0.
        m.d.comb += code_in.eq(Mux(rise_in, ZERO, handed_rd.data[:2]))
        m.d.sync += [
            s2_lo.eq(_read_frac(code_in, lo_rd.data)),
            s2.eq(r),
            s2_d.eq(d_eff),
            s2_hand.eq(use_hand),
            s2_code.eq(code_in),
            s2_copy.eq(handed_rd.data[2:]),
            s2.zero.eq(zero),
            s2.dis.eq(dis_all),
        ]

        # --- stage 3: low chunk -------------------------------------------------------------
        sum_lo      = Signal(l1 + 1)
        hand_sub    = Signal(nshape)
        m.d.comb += [
            sum_lo.eq(s2_lo + step_lo_rd.data),
            hand_sub.eq(Mux(s2_hand, s2_copy, 0)),
            lo_wr.addr.eq(s2.slot),
            lo_wr.data.eq(sum_lo[:l1]),
            lo_wr.en.eq(s2.valid),
            step_mid_rd.addr.eq(Cat(s2_d, s2.slot)),
            step_whole_rd.addr.eq(Cat(s2_d, s2.slot)),
            whole_rd.addr.eq(s2.slot),
        ]
        s3       = Signal(visit)
        s3_code  = Signal(2)
        s3_c1    = Signal()
        s3_lo    = Signal(l1)
        s3_hand  = Signal(nshape)
        s3_mid   = Signal(frac - l1)   # the stored middle chunk as the code reads it
        m.d.sync += [
            s3_mid.eq(_read_frac(s2_code, mid_rd.data)),
            s3.eq(s2),
            s3_code.eq(s2_code),
            s3_c1.eq(sum_lo[l1]),
            s3_lo.eq(sum_lo[:l1]),
            s3_hand.eq(hand_sub),
        ]

        # --- stage 4: middle chunk; the whole part of the step less the hand-over -----------
        sum_mid = Signal(frac - l1 + 1)
        step_w  = Signal(signed(d_bits + 3 + nshape.width))
        m.d.comb += [
            sum_mid.eq(s3_mid + step_mid_rd.data + s3_c1),
            step_w.eq(step_whole_rd.data.as_signed() - s3_hand),
            mid_wr.addr.eq(s3.slot),
            mid_wr.data.eq(sum_mid[:frac - l1]),
            mid_wr.en.eq(s3.valid),
        ]
        s4       = Signal(visit)
        s4_whole = Signal(signed(p.owed_bits))   # the stored whole chunk as the code reads it
        s4_c2    = Signal()
        s4_lo_nz = Signal(_groups(l1))
        s4_mid   = Signal(frac - l1)
        s4_step  = Signal.like(step_w)
        m.d.sync += [
            s4.eq(s3),
            s4_whole.eq(_read_whole(s3_code, whole_rd.data, p.owed_bits)),
            s4_c2.eq(sum_mid[frac - l1]),
            # Which 4-bit groups of the fraction are not zero, from registers (the sums end
            # their cycle late); the rest of the test a stage later.
            s4_lo_nz.eq(_nonzero_groups(s3_lo)),
            s4_mid.eq(sum_mid[:frac - l1]),
            s4_step.eq(step_w),
        ]

        # --- stage 5: whole part --------------------------------------------------------------
        whole_w = p.owed_bits + 2
        hi      = Signal(signed(whole_w))
        m.d.comb += [
            hi.eq(s4_whole + s4_step + s4_c2),
            whole_wr.addr.eq(s4.slot),
            whole_wr.data.eq(hi[:p.owed_bits]),
            whole_wr.en.eq(s4.valid),
        ]
        s5       = Signal(visit)
        s5_hi    = Signal.like(hi)
        s5_nz    = Signal()
        m.d.sync += [
            s5.eq(s4),
            s5_hi.eq(hi),
            s5_nz.eq(s4_lo_nz.any() | s4_mid.any()),
        ]

        # --- stage 6: saturation and the code; the ask's comparisons --------------------------
        over  = Signal()
        under = Signal()
        m.d.comb += [
            # Past a limit when the bits above the owed register's sign disagree with it.
            over.eq(~s5_hi[-1] & s5_hi[p.owed_bits - 1:].any()),
            under.eq(s5_hi[-1] & ~s5_hi[p.owed_bits - 1:].all()),
        ]
        for i in range(n):
            m.d.comb += self.clip[i].eq(_visits(s5, i) & ~s5.dis & (over | under))
        parts = ask_parts(m, p, s5_hi, s5_nz)
        s6       = Signal(visit)
        s6_code  = Signal(2)
        s6_parts = Signal.like(parts)
        m.d.sync += [
            s6.eq(s5),
            s6_code.eq(Mux(s5.zero, ZERO, Mux(over, UPPER, Mux(under, LOWER, RAW)))),
            s6_parts.eq(parts),
        ]

        # --- stage 7: the hand-over ---------------------------------------------------------
        ask_n, ask_clmp = ask_select(m, p, s6_parts, ~s6.zero)
        ask_pos, ask_neg = ask_lines(m, p, s6_parts, ~s6.zero)
        m.d.comb += [
            handed_wr.addr.eq(s6.slot),
            handed_wr.data.eq(Cat(s6_code, ask_n)),
            handed_wr.en.eq(s6.valid),
        ]
        for i in range(n):
            with m.If(_visits(s6, i) & s6.stb):
                m.d.sync += [self.hand_pos[i].eq(ask_pos),
                             self.hand_neg[i].eq(ask_neg),
                             self.hand_clmp[i].eq(ask_clmp)]

        self._books(m, r, s2, s3, s4, s6, s2_copy, s6_parts, counts_rd, counts_wr)
        return m

    def held(self, ctx, now: int) -> list[tuple[int, int] | None]:
        """Per channel, the anchor cycle and the owed amount the block RAMs hold at ``now``.

        For a simulation (``ctx`` an Amaranth testbench context): the stored words read
        as the pipeline reads them. None for a channel whose visit is writing its words
        (cycles ``v + 2 .. v + SHARED_DEPTH - 1`` of a visit at ``v``).
        """
        p = self._params
        cb = cycle_bits(p)
        l1, frac = chunks(p)
        out: list[tuple[int, int] | None] = []
        for i in range(p.n):
            if 2 <= (now - i) % p.shared_slots <= SHARED_DEPTH - 1 and now >= i + 2:
                out.append(None)
                continue
            # Cycle numbers are kept modulo 2**cb; the anchor is the one nearest ``now``.
            a_mod = ctx.get(self.anchor.data[i]) & ((1 << cb) - 1)
            cycle = now + ((a_mod - now + (1 << (cb - 1))) % (1 << cb)) - (1 << (cb - 1))
            code = ctx.get(self.handed.data[i]) & 3
            whole = ctx.get(self.owed_whole.data[i])
            whole -= (whole >> (p.owed_bits - 1)) << p.owed_bits
            raw = ctx.get(self.owed_lo.data[i]) | (ctx.get(self.owed_mid.data[i]) << l1) | (whole << frac)
            out.append((cycle, {RAW: raw, ZERO: 0, UPPER: p.owed_max, LOWER: p.owed_min}[code]))
        return out

    def _books(self, m: Module, r: Value, s2: Value, s3: Value, s4: Value, s6: Value, s2_copy: Value,
               s6_parts: Value, counts_rd: SyncRead, counts_wr: memory.WritePort) -> None:
        """The emitters' pending counts, folded at every visit that moves the channel on.

        Stage 2 (the visit's cycle ``v + 2``) reads the emitter's flags, which clears them;
        stage 4 writes the new counts, stage 5 the emitter's flags from them, stage 7 the
        accept bits of the strobe the visit targets. A visit that leaves the channel to
        the next one (its anchor strobe still ahead) folds nothing: no hand-over can be
        loaded between its read and its writes (``docs/timing.md``, "The shared datapath").
        """
        p = self._params
        n = p.n
        cw = count_bits(p)
        rest_n = p.rest if p.scheme == "burst" else 0
        ones = (1 << cw) - 1

        # --- stage 2: read the flags ------------------------------------------------------
        for i in range(n):
            m.d.comb += [
                self.snap[i].eq(_visits(r, i)),
                self.snap_acc[i].eq(_visits(r, i) & r.stb),
            ]
        b3_tp      = Signal()
        b3_tn      = Signal()
        b3_load    = Signal()
        b3_rest    = Signal()
        b3_cleared = Signal()
        m.d.sync += [
            b3_tp.eq(self.em_tp.bit_select(r.slot, 1)),
            b3_tn.eq(self.em_tn.bit_select(r.slot, 1)),
            b3_load.eq(self.em_lp.bit_select(r.slot, 1)),
            b3_rest.eq(self.em_lp_rest.bit_select(r.slot, 1)),
            b3_cleared.eq(self.em_cleared.bit_select(r.slot, 1)),
        ]

        # --- stage 3: the loaded hand-over's pulses per line, less one ----------------------
        # (``s2_copy`` is the net count handed over at the anchor strobe: the load folded.)
        hand  = s2_copy.as_signed()
        neg   = hand[-1]
        rest  = Mux(b3_rest, rest_n, 0)
        np_m1 = Signal(cw)
        nn_m1 = Signal(cw)
        m.d.comb += [
            np_m1.eq(rest - 1 + Mux(neg, 0, hand)),
            # -hand = ~hand + 1, so rest - 1 - hand = rest + ~hand.
            nn_m1.eq(Mux(neg, rest + ~hand, rest - 1)),
            counts_rd.addr.eq(s2.slot),
        ]
        b4_np = Signal(cw)
        b4_nn = Signal(cw)
        b4_tp = Signal()
        b4_tn = Signal()
        b4_load = Signal()
        b4_cleared = Signal()
        m.d.sync += [
            b4_np.eq(Mux(b3_load, np_m1, ones)), b4_nn.eq(Mux(b3_load, nn_m1, ones)),
            b4_tp.eq(b3_tp), b4_tn.eq(b3_tn), b4_load.eq(b3_load), b4_cleared.eq(b3_cleared),
        ]

        # --- stage 4: the new counts: old + loaded - started -----------------------------------
        # Disarming voids the stored counts; what was loaded and started since still counts.
        old_p = Mux(b4_cleared, 0, counts_rd.data[:cw])
        old_n = Mux(b4_cleared, 0, counts_rd.data[cw:])
        new_p = Signal(cw)
        new_n = Signal(cw)
        m.d.comb += [
            new_p.eq(_add_cin(old_p, b4_np, ~b4_tp, cw)),
            new_n.eq(_add_cin(old_n, b4_nn, ~b4_tn, cw)),
            counts_wr.addr.eq(s3.slot),
            counts_wr.data.eq(Cat(new_p, new_n)),
            counts_wr.en.eq(s3.valid),
        ]
        b5_p = Signal(cw)
        b5_n = Signal(cw)
        m.d.sync += [b5_p.eq(new_p), b5_n.eq(new_n)]

        # --- stage 5: the emitter's flags; the total --------------------------------------
        for i in range(n):
            m.d.comb += self.fold[i].eq(_visits(s4, i))
        m.d.comb += [
            self.fold_pos.eq(b5_p != 0),
            self.fold_neg.eq(b5_n != 0),
        ]
        b6_total = Signal(cw + 1)
        m.d.sync += b6_total.eq(b5_p + b5_n)

        # --- stage 6: the room left for a hand-over's pulses beyond its rest pulses --------
        # With rest pulses, without; with no pulse started since stage 2, with one. And
        # whether the largest count a strobe can ask for, the clamp (one for binary and
        # ternary), fits: the compare of stage 7 is then against registers only.
        rw = cw + 3
        top_ask = p.clamp if p.scheme == "burst" else 1
        bases = [p.backlog - 2 * rest_n, p.backlog - 2 * rest_n + 1, p.backlog, p.backlog + 1]
        # Each room is kept as ``nroom = -room - 1``, split at the width ``w`` of the
        # truncated amount: ``low_mag <= room`` is ``low_mag + nroom < 0``, and with
        # ``c`` the carry out of ``low_mag + nroom[:w]`` that is ``hi + c < 0`` for the
        # high part ``hi``: ``hi <= -2``, or ``hi == -1`` and no carry. Stage 7 then has
        # a ``w``-bit carry chain from registers and one level of logic after it.
        w = len(s6_parts.low_mag)
        top_ok = [Signal(name=f"room_top{k}") for k in range(4)]
        room_lo = [Signal(w, name=f"room_lo{k}") for k in range(4)]
        room_n2 = [Signal(name=f"room_n2_{k}") for k in range(4)]   # hi <= -2
        room_n1 = [Signal(name=f"room_n1_{k}") for k in range(4)]   # hi == -1
        for k, base in enumerate(bases):
            nroom = Signal(signed(rw), name=f"nroom{k}")
            hi = nroom[w:].as_signed()
            m.d.comb += nroom.eq(b6_total - (base + 1))
            m.d.sync += [
                top_ok[k].eq(b6_total <= base - top_ask),
                room_lo[k].eq(nroom[:w]),
                room_n2[k].eq(hi < -1),
                room_n1[k].eq(hi == -1),
            ]

        # --- stage 7: the accept bits of the targeted strobe --------------------------------
        # The count asked for is 0, the top one or (burst) the truncated amount, as
        # ``ask_select`` chooses it; which of them, and the bit for the first two, come
        # from registers, so only the truncated amount's carry is on the way to the emitter.
        parts = s6_parts
        some  = ~s6.zero
        bits  = []
        for k in range(4):
            fits, zero_fits = top_ok[k], room_n2[k] | room_n1[k]   # room >= 0: nroom < 0
            if p.scheme == "burst":
                compare = some & ~parts.big_p & ~parts.big_n
                carry = (parts.low_mag + room_lo[k])[w]
                base_bit = Mux(compare, room_n2[k], Mux(some, fits, zero_fits))
                bits.append(base_bit | (compare & room_n1[k] & ~carry))
            elif p.scheme == "binary":
                bits.append(fits)
            else:
                bits.append(Mux(some & (parts.big_p | parts.big_n), fits, zero_fits))
        m.d.comb += self.acc_bits.eq(Cat(*bits))
        for i in range(n):
            m.d.comb += self.acc_we[i].eq(_visits(s6, i) & s6.stb)


def count_bits(params: HardwareParams) -> int:
    """Width of an emitter's pending count of one line (``0 .. backlog``)."""
    return params.backlog.bit_length()


def _add_cin(a: Value, b: Value, cin: Value, width: int) -> Value:
    """``(a + b + cin) mod 2**width`` as one adder: the carry-in rides below the lowest bit."""
    return (Cat(1, a[:width]) + Cat(cin, b[:width]))[1:width + 1]


def _groups(width: int) -> int:
    """Number of 4-bit groups of ``width`` bits (one LUT each tests one for zero)."""
    return (width + 3) // 4


def _nonzero_groups(value: Value) -> Value:
    """One bit per 4-bit group of ``value``: the group is not zero."""
    return Cat(*(value[k:k + 4].any() for k in range(0, len(value), 4)))


def _read_frac(code: Value, bits: Value) -> Value:
    """A fraction chunk as the code reads it: the stored bits, zeros (0, lower limit) or ones."""
    return Mux(code == UPPER, (1 << len(bits)) - 1, Mux(code == RAW, bits, 0))


def _read_whole(code: Value, bits: Value, width: int) -> Value:
    """The whole chunk as the code reads it: the stored bits, 0, or a limit's whole part."""
    upper = (1 << (width - 1)) - 1
    lower = 1 << (width - 1)
    return Mux(code == RAW, bits, Mux(code == UPPER, upper, Mux(code == LOWER, lower, 0)))

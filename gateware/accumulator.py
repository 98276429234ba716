"""Rate accumulator: integrates one channel's rate and decides what each strobe hands over.

Cycle rules: ``docs/timing.md``, section "Rate accumulator".
"""

from __future__ import annotations

from amaranth.hdl import Cat, Module, Mux, Shape, Signal, Value, signed, unsigned
from amaranth.lib import data, wiring
from amaranth.lib.wiring import In, Out

from dvgate.params import HardwareParams


def count_shape(params: HardwareParams) -> Shape:
    """Shape of the pulses one strobe hands an emitter on one line.

    Parameters
    ----------
    params : HardwareParams
        The emulator.

    Returns
    -------
    Shape
        Unsigned, wide enough for ``params.per_strobe_max``.
    """
    return unsigned(params.per_strobe_max.bit_length())


def mag_shape(params: HardwareParams) -> Shape:
    """Shape of the magnitude of the net count one strobe asks for (``0 .. clamp``)."""
    return unsigned(params.clamp.bit_length() if params.scheme == "burst" else 1)


def net_shape(params: HardwareParams) -> Shape:
    """Shape of the signed net count ``n`` one strobe asks for (``-clamp .. clamp``)."""
    return signed(params.clamp.bit_length() + 1)


def ask_parts_layout(params: HardwareParams) -> data.StructLayout:
    """What a strobe's ask is chosen from (:func:`ask_parts`), so a pipeline can register it.

    ``neg``: the owed amount is negative; ``up``: burst, negative with a fraction
    (truncation toward zero adds one); ``big_p``/``big_n``: burst, past +/- the clamp,
    ternary, at least one / at most minus one; ``low_n``: burst, the truncated whole part;
    ``low_mag``: its magnitude; ``low_zero``: burst, it is 0.
    """
    return data.StructLayout({"neg": 1, "up": 1, "big_p": 1, "big_n": 1, "low_n": net_shape(params),
                              "low_mag": mag_shape(params), "low_zero": 1})


def ask_parts(m: Module, params: HardwareParams, whole: Value, frac_nz: Value) -> data.View:
    """The comparisons a strobe's ask needs, from an owed amount (first half of :func:`ask_logic`).

    Parameters
    ----------
    m : Module
        Where the (combinational) logic goes.
    params : HardwareParams
        Scheme and clamp.
    whole : Value
        Signed whole part (floor) of the owed amount, before any saturation: a value past
        a limit asks for the same count as the saturated one (``owed_bits`` leaves room
        above the clamp, and the sign decides binary and ternary).
    frac_nz : Value
        The owed amount's fraction is not zero.
    """
    parts = Signal(ask_parts_layout(params))
    neg   = whole[-1]
    m.d.comb += parts.neg.eq(neg)
    if params.scheme == "burst":
        # Truncation toward zero: a negative amount with a fraction is one less whole.
        # The clamp tests look at the low bits only (short compares): past the clamp's
        # width, any bit that differs from the sign is past the clamp.
        clamp = params.clamp
        cb    = clamp.bit_length()
        up    = neg & frac_nz
        mag_n = Signal(len(whole))  # -whole - 1 for a negative amount: ~whole
        m.d.comb += [
            mag_n.eq(~whole),
            parts.up.eq(up),
            parts.low_n.eq(whole[:net_shape(params).width] + up),
            # |whole + up| (for a negative amount ~whole + 1 - up), in the clamp's width.
            parts.low_mag.eq(Mux(neg, mag_n, whole)[:cb] + (neg & ~up)),
            # Truncated to 0: the whole part is 0, or -1 with a fraction.
            parts.low_zero.eq((whole == 0) | ((whole == -1) & frac_nz)),
            # whole > clamp
            parts.big_p.eq(~neg & (whole[cb:].any() | (whole[:cb] > clamp))),
            # whole < -clamp - up, that is ~whole >= clamp + up
            parts.big_n.eq(neg & (mag_n[cb:].any() | Mux(up, mag_n[:cb] > clamp, mag_n[:cb] >= clamp))),
        ]
    elif params.scheme == "ternary":  # at least one whole pulse either way (-1 with no fraction is -one)
        m.d.comb += [
            parts.big_p.eq(whole >= 1),
            parts.big_n.eq((whole < -1) | ((whole == -1) & ~frac_nz)),
        ]
    return parts


def ask_select(m: Module, params: HardwareParams, parts: data.View, armed: Value) -> tuple[Signal, Signal]:
    """The net count a strobe asks for, and whether it is clamped (second half of :func:`ask_logic`).

    ``armed`` low means the owed amount is 0, whatever ``parts`` say.
    """
    ask_n    = Signal(net_shape(params))
    ask_clmp = Signal()
    if params.scheme == "burst":
        m.d.comb += [
            ask_clmp.eq(armed & (parts.big_p | parts.big_n)),
            ask_n.eq(Mux(~armed, 0, Mux(parts.big_p, params.clamp, Mux(parts.big_n, -params.clamp, parts.low_n)))),
        ]
    elif params.scheme == "binary":
        m.d.comb += ask_n.eq(Mux(~armed | ~parts.neg, 1, -1))
    else:
        m.d.comb += ask_n.eq(Mux(~armed, 0, Mux(parts.big_p, 1, Mux(parts.big_n, -1, 0))))
    return ask_n, ask_clmp


def ask_lines(m: Module, params: HardwareParams, parts: data.View, armed: Value) -> tuple[Signal, Signal]:
    """Whether the ask of :func:`ask_select` has pulses on the positive line, on the negative.

    The sign of a count that is not 0, from the parts alone (a few levels of logic, no
    count): for the burst scheme ``low_zero`` says whether the truncated amount is 0.
    """
    pos = Signal()
    neg = Signal()
    if params.scheme == "burst":
        m.d.comb += [
            pos.eq(armed & ~parts.neg & (parts.big_p | ~parts.low_zero)),
            neg.eq(armed & parts.neg & (parts.big_n | ~parts.low_zero)),
        ]
    elif params.scheme == "binary":
        m.d.comb += [neg.eq(armed & parts.neg), pos.eq(~(armed & parts.neg))]
    else:
        m.d.comb += [pos.eq(armed & parts.big_p & ~parts.big_n), neg.eq(armed & parts.big_n)]
    return pos, neg


def ask_logic(m: Module, params: HardwareParams, whole: Value, frac_nz: Value,
              armed: Value) -> tuple[Signal, Signal]:
    """The net count a strobe asks for, and whether it is clamped, from an owed amount.

    :func:`ask_parts` then :func:`ask_select`, in one cycle.

    Returns
    -------
    tuple of Signal
        ``(n, clamped)``: the net count (:func:`net_shape`) and, for the burst scheme,
        whether the whole part was past the clamp (always 0 otherwise).
    """
    return ask_select(m, params, ask_parts(m, params, whole, frac_nz), armed)


def hand_over_lines(params: HardwareParams, neg: Value, mag: Value, no_rest: Value) -> tuple[Value, Value]:
    """Pulses a hand-over of net count ``-mag`` (``neg``) or ``mag`` puts on the positive and the negative line.

    Rest pulses (burst) on both lines unless ``no_rest``; then ``mag`` on its own line.
    """
    rest = Mux(no_rest, 0, params.rest) if params.scheme == "burst" else 0
    return rest + Mux(neg, 0, mag), rest + Mux(neg, mag, 0)


class RateAccumulator(wiring.Component):
    """The owed amount of one channel, and the count a strobe takes from it.

    Every armed cycle adds the rate (pulses per cycle, ``frac_bits`` fraction bits) to
    ``owed``; a strobe that is taken and accepted hands ``n`` net pulses to the emitter
    and takes ``n * 2**frac_bits`` from ``owed``. The register saturates at its limits.

    Parameters
    ----------
    params : HardwareParams
        Scheme, rest pulses, clamp and the widths of rate and owed.

    Attributes
    ----------
    rate : Signal(signed(rate_bits)), in
        The channel's live rate, fixed point.
    take : Signal(1), in
        A strobe is taken this cycle (strobe and armed).
    armed : Signal(1), in
        Outputs armed; while low, ``owed`` is cleared.
    accept : Signal(1), in
        From the emitter: the pulses asked for fit the backlog.
    no_rest : Signal(1), in
        Fault: a hand-over this cycle adds no rest pulses (burst).
    n : Signal(signed), out
        Net count a strobe would ask for now (combinational from ``owed``).
    new_pos, new_neg : Signal(unsigned), out
        Pulses a strobe would ask for on each line (rest pulses included).
    load : Signal(1), out
        The hand-over happens this cycle (``take & accept``).
    clamp_evt : Signal(1), out
        An accepted hand-over was clamped this cycle (burst: ``|whole part| > clamp``).
    defer_evt : Signal(1), out
        A taken strobe was deferred this cycle (the backlog would pass its limit).
    sat_evt : Signal(1), out
        ``owed`` saturates this cycle.
    owed : Signal(signed(owed_bits + frac_bits)), out
        The owed amount, fixed point (a register).
    """

    def __init__(self, params: HardwareParams) -> None:
        self._params = params
        super().__init__({
            "rate": In(signed(params.rate_bits)),
            "take": In(1),
            "armed": In(1),
            "accept": In(1),
            "no_rest": In(1),
            "prepare": In(1),
            "n": Out(net_shape(params)),
            "new_pos": Out(count_shape(params)),
            "new_neg": Out(count_shape(params)),
            "load": Out(1),
            "clamp_evt": Out(1),
            "defer_evt": Out(1),
            "sat_evt": Out(1),
            "owed": Out(signed(params.owed_width)),
        })

    def elaborate(self, platform) -> Module:
        m = Module()
        p = self._params
        frac = p.frac_bits
        owed = self.owed

        # The owed update splits at the binary point: the hand-over only changes the whole
        # part, so the fraction is a plain add whose carry joins a short whole-part sum,
        # and the saturation test looks at the whole part alone.
        rate_ext  = Signal(signed(max(p.rate_bits, frac + 1)))
        lo        = Signal(frac + 1)
        hi_w      = max(p.owed_bits, p.rate_bits - frac, len(self.n)) + 2
        hi0       = Signal(signed(hi_w))
        hi_t      = Signal(signed(hi_w))
        hi        = Signal(signed(hi_w))
        over      = Signal()
        under     = Signal()
        # The hand-over is decided one cycle ahead, from the owed amount the next cycle
        # will hold, and kept in registers: the strobe's cycle then only checks the
        # backlog. ``prepare`` (the detector's ``stb_next``) is high the cycle before every
        # strobe, and never on a strobe's own cycle, so that next owed amount is the one
        # with nothing handed over this cycle (``hi0``).
        hand_n    = Signal.like(self.n)
        hand_clmp = Signal()

        m.d.comb += [
            rate_ext.eq(self.rate),
            lo.eq(owed[:frac] + rate_ext[:frac]),
            # Two spare bits: the sum of the whole parts cannot overflow before the compare.
            hi0.eq(owed[frac:].as_signed() + rate_ext[frac:].as_signed() + lo[frac]),
            # Both outcomes of the backlog check are ready before it decides between them.
            hi_t.eq(hi0 - hand_n),
            hi.eq(Mux(self.load, hi_t, hi0)),
            # Past a limit when the bits above the owed register's sign disagree with it.
            over.eq(~hi[-1] & hi[p.owed_bits - 1:].any()),
            under.eq(hi[-1] & ~hi[p.owed_bits - 1:].all()),
            self.sat_evt.eq(self.armed & (over | under)),
        ]
        # What a strobe next cycle asks for, from the next owed amount without building it:
        # its whole part is ``hi0`` (floor) and its fraction ``lo``. A saturated next value
        # asks for the same as ``hi0`` does (``owed_bits`` leaves room above the clamp: a
        # value past a limit is clamped either way, and its sign decides binary and
        # ternary), so only the disarmed case (next owed amount 0) is set apart.
        ask_n, ask_clmp = ask_logic(m, p, hi0, lo[:frac].any(), self.armed)
        with m.If(self.prepare):
            m.d.sync += [hand_n.eq(ask_n), hand_clmp.eq(ask_clmp)]

        new_pos, new_neg = hand_over_lines(p, hand_n[-1], Mux(hand_n[-1], -hand_n, hand_n), self.no_rest)
        m.d.comb += [
            self.n.eq(hand_n),
            self.new_pos.eq(new_pos),
            self.new_neg.eq(new_neg),
            self.load.eq(self.take & self.accept),
            self.clamp_evt.eq(self.load & hand_clmp),
            self.defer_evt.eq(self.take & ~self.accept),
        ]

        with m.If(~self.armed):
            m.d.sync += owed.eq(0)
        with m.Elif(over):
            m.d.sync += owed.eq(p.owed_max)
        with m.Elif(under):
            m.d.sync += owed.eq(p.owed_min)
        with m.Else():
            m.d.sync += owed.eq(Cat(lo[:frac], hi[:p.owed_bits]))
        return m

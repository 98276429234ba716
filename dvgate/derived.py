"""Figures derived from a config: what the emulator can do, in the engineer's units.

``derived_figures`` computes them once; ``dvgate check`` prints them and the tests check
them against figures of the trade.
"""

from __future__ import annotations

from dataclasses import dataclass

from dvgate.config import Config
from dvgate.units import STANDARD_GRAVITY, format_si

#: Signals at the computer's connector besides the channels: the strobe.
STROBE_SIGNALS = 1


@dataclass(frozen=True)
class ChannelFigures:
    """What one channel can carry.

    Attributes
    ----------
    full_scale_pps : float
        Full-scale rate in pulses per second.
    full_scale : float
        Full-scale rate in SI units (m/s^2 or rad/s).
    lsb_pps : float
        One least significant bit of the rate register, in pulses per second.
    lsb : float
        The same in SI units.
    lsb_ppm : float
        The same in parts per million of full scale.
    carry_pps : float
        Most net pulses per second the scheme can carry at the nominal strobe period.
    """

    name: str
    unit: str
    full_scale_pps: float
    full_scale: float
    lsb_pps: float
    lsb: float
    lsb_ppm: float
    carry_pps: float


@dataclass(frozen=True)
class Figures:
    """Derived figures of one emulator.

    Attributes
    ----------
    latency_cyc, latency_ns : int, float
        Strobe pin's active edge to the first output edge.
    added_cyc : int
        Latency cycles beyond the glitch filter's minimum width.
    pulses_per_strobe : int
        Most pulses one channel can fit in one nominal strobe period (width plus gap each).
    wires : int
        Conductors at the computer's connector: one strobe plus two lines per channel,
        each as a signal/return pair.
    warnings : tuple of str
        Settings that work but limit the emulator (e.g. full scale beyond what the scheme
        carries at the strobe period).
    """

    channels: tuple[ChannelFigures, ...]
    clock_hz: float
    latency_cyc: int
    latency_ns: float
    added_cyc: int
    strobe_period_cyc: int
    pulses_per_strobe: int
    wires: int
    warnings: tuple[str, ...]


def wires_needed(channels: int) -> int:
    """Connector conductors: (strobe + 2 lines per channel) signals, each a signal/return pair."""
    return 2 * (STROBE_SIGNALS + 2 * channels)


def derived_figures(config: Config) -> Figures:
    """Compute every derived figure of ``config``."""
    hw = config.hw
    period = config.strobe_period_cyc
    per_strobe = period // hw.pulse_period_cyc
    if hw.scheme == "burst":
        net_per_strobe = max(0, min(hw.clamp, per_strobe - 2 * hw.rest))
    else:
        net_per_strobe = min(1, per_strobe)
    strobe_hz = config.clock_hz / period
    lsb_pps = config.clock_hz / (1 << hw.frac_bits)
    channels = []
    warnings = []
    for ch in config.channels:
        fs_pps = ch.range / ch.weight
        carry = net_per_strobe * strobe_hz
        channels.append(ChannelFigures(
            name=ch.name, unit=ch.rate_unit, full_scale_pps=fs_pps, full_scale=ch.range,
            lsb_pps=lsb_pps, lsb=lsb_pps * ch.weight, lsb_ppm=lsb_pps / fs_pps * 1e6, carry_pps=carry,
        ))
        if carry < fs_pps:
            warnings.append(
                f"channel {ch.name!r}: full scale is {fs_pps:.6g} pulses/s but the {hw.scheme} scheme carries at "
                f"most {carry:.6g} net pulses/s at one strobe every {period} cycles; a rate beyond that "
                "builds a backlog (clamped, counted and reported, never lost)")
    if per_strobe < hw.per_strobe_max and hw.scheme == "burst":
        warnings.append(
            f"a full hand-over ({hw.per_strobe_max} pulses) takes longer than one strobe period "
            f"({per_strobe} pulses fit); the next strobe will overrun")
    return Figures(
        channels=tuple(channels),
        clock_hz=config.clock_hz,
        latency_cyc=hw.latency_cyc,
        latency_ns=hw.latency_cyc / config.clock_hz * 1e9,
        added_cyc=hw.latency_cyc - hw.min_width_cyc,
        strobe_period_cyc=period,
        pulses_per_strobe=per_strobe,
        wires=wires_needed(hw.n),
        warnings=tuple(warnings),
    )


def figure_rows(config: Config, figures: Figures) -> list[tuple[str, str]]:
    """The figures as (label, text) rows, in the order ``dvgate check`` prints them."""
    hw = config.hw
    rows = [
        ("clock", f"{format_si(config.clock_hz, 'Hz')} ({1e9 / config.clock_hz:.4g} ns per cycle)"),
        ("scheme", f"{hw.scheme}, rest {hw.rest}, width {hw.width_cyc} cyc, gap {hw.gap_cyc} cyc, {hw.order}, "
                   f"{'active low' if hw.active_low else 'active high'}"),
        ("strobe", f"{'rising' if hw.edge_rising else 'falling'} edge, filter {hw.min_width_cyc} cyc, "
                   f"period {figures.strobe_period_cyc} cyc, absent after {hw.absence_cyc} cyc"),
        ("latency, strobe pin to first edge", f"{figures.latency_cyc} cycles = {figures.latency_ns:.1f} ns "
                                             f"({figures.added_cyc} cycles beyond the glitch filter)"),
        ("most pulses per strobe and channel", f"{figures.pulses_per_strobe} (width + gap, one strobe period)"),
        ("rate register", f"{hw.rate_bits} bits signed, {hw.frac_bits} fraction bits"),
        ("wires at the connector", f"{figures.wires} (strobe + 2 lines x {hw.n} channels, each a signal/return "
                                   "pair)"),
    ]
    for ch, fig in zip(config.channels, figures.channels, strict=True):
        fs = f"{fig.full_scale:.6g} {fig.unit}"
        if fig.unit == "m/s^2":
            fs += f" ({fig.full_scale / STANDARD_GRAVITY:.6g} g)"
        rows.append((f"{ch.name}: full scale", f"{fig.full_scale_pps:,.2f} pulses/s = {fs}"))
        rows.append((f"{ch.name}: resolution", f"{fig.lsb_pps:.4g} pulses/s = {fig.lsb:.4g} {fig.unit} = "
                                               f"{fig.lsb_ppm:.4g} ppm of full scale"))
        rows.append((f"{ch.name}: scheme carries", f"{fig.carry_pps:,.2f} net pulses/s at the strobe period"))
    return rows

"""The emulator as the hardware sees it: integers only, derived from a validated config.

Both the gateware (``dvgate.gateware``) and the reference model (``dvgate.sim.model``)
take a :class:`HardwareParams`; neither reads the TOML config. This module imports
nothing from Amaranth, so the model stays independent of the gateware.
"""

from __future__ import annotations

from dataclasses import dataclass, field

#: Cycles from the strobe pin to the synchronized strobe (two flip-flops).
SYNC_CYC = 2
#: Cycles from the cycle a strobe is taken to the first output edge (the output register).
OUTPUT_CYC = 1

SCHEMES = ("binary", "ternary", "burst")
ORDERS = ("interleaved", "grouped")
#: How the owed amounts are computed: a datapath per channel, or one shared by all of
#: them in turn (``dvgate.gateware.shared_owed``; constant rates only).
DATAPATHS = ("per_channel", "shared")
#: Cycles from a visit of the shared datapath to its hand-over being ready.
SHARED_DEPTH = 8

#: Width of the strobe counter, the strobe period and the since-last-strobe timer.
STROBE_COUNT_BITS = 32
#: Width of the saturating event counters (overruns, clamps, deferrals, saturations, ignored).
EVENT_COUNT_BITS = 16
#: Width of a fault set's storm period, in cycles.
STORM_PERIOD_BITS = 16
#: Width of the ignore-strobes window, in cycles.
IGNORE_CYCLES_BITS = 32


def shared_slots(n: int) -> int:
    """Cycles between two visits of one channel by the shared datapath, for ``n`` channels."""
    return max(n, SHARED_DEPTH)


def shared_d_bits(n: int) -> int:
    """Width of the step (in cycles, at most three slots) one visit of the shared datapath makes."""
    return (3 * shared_slots(n)).bit_length()


def shared_min_width(n: int) -> int:
    """Least glitch filter (cycles) of the shared datapath: every channel is visited while it holds."""
    return shared_slots(n) + SHARED_DEPTH


def shared_owed_bits_min(n: int, clamp: int) -> int:
    """Least ``owed_bits`` of the shared datapath: room for a step's whole part and a hand-over."""
    return ((1 << shared_d_bits(n)) + clamp).bit_length() + 1


def shared_pulse_min(n: int) -> int:
    """Least pulse period (width + gap, cycles) of the shared datapath for ``n`` channels."""
    return 2 * shared_slots(n) + SHARED_DEPTH


@dataclass(frozen=True)
class HardwareParams:
    """Integer description of one emulator.

    Attributes
    ----------
    clock_hz : float
        Clock frequency; one cycle is ``1 / clock_hz`` seconds.
    names : tuple of str
        Channel names, in port order (1 to 16 of them).
    edge_rising : bool
        True when the strobe's active level is high (rising edge), False for low.
    min_width_cyc : int
        Glitch filter: the synchronized strobe must stay active this many cycles.
    absence_cyc : int
        ``host_absent`` rises after this many cycles without a strobe.
    scheme : str
        ``"binary"``, ``"ternary"`` or ``"burst"``.
    rest : int
        Rest pulses per line per strobe (burst only; 0 otherwise).
    width_cyc, gap_cyc : int
        Pulse width and the least low time between two pulses of a channel, in cycles.
    order : str
        ``"interleaved"`` or ``"grouped"`` (burst only).
    active_low : bool
        Output lines idle high and pulse low.
    frac_bits : int
        Fraction bits of the rate and of the owed amount (pulses per tick).
    rate_bits : int
        Width of the signed rate register.
    owed_bits : int
        Integer bits of the signed owed amount (its width is ``owed_bits + frac_bits``).
    clamp : int
        Most net pulses one strobe hands over (burst).
    backlog : int
        Most pulses waiting in an emitter; a hand-over that would pass it is deferred.
    init_rates : tuple of int
        Rate of each channel at reset, fixed point (pulses per tick times ``2**frac_bits``).
    datapath : str
        ``"per_channel"`` or ``"shared"`` (see :data:`DATAPATHS`). The shared datapath
        keeps every channel at its initial rate, takes the ``arm`` input
        :attr:`arm_lead` cycles ahead and needs arm changes :attr:`arm_spacing` cycles
        apart, a glitch filter of at least ``shared_slots + SHARED_DEPTH`` cycles and
        pulses (width + gap) of at least :attr:`shared_pulse_min` cycles.
    """

    clock_hz: float
    names: tuple[str, ...]
    edge_rising: bool
    min_width_cyc: int
    absence_cyc: int
    scheme: str
    rest: int
    width_cyc: int
    gap_cyc: int
    order: str
    active_low: bool
    frac_bits: int
    rate_bits: int
    owed_bits: int
    clamp: int
    backlog: int
    init_rates: tuple[int, ...] = field(default=())
    datapath: str = "per_channel"

    def __post_init__(self) -> None:
        checks = [
            (1 <= len(self.names) <= 16, f"channel count must be 1 to 16, not {len(self.names)}"),
            (self.scheme in SCHEMES, f"scheme must be one of {SCHEMES}, not {self.scheme!r}"),
            (self.order in ORDERS, f"order must be one of {ORDERS}, not {self.order!r}"),
            (self.min_width_cyc >= 1, f"min_width must be at least 1 cycle, not {self.min_width_cyc}"),
            (self.absence_cyc >= 1, f"absence timeout must be at least 1 cycle, not {self.absence_cyc}"),
            (self.width_cyc >= 1, f"pulse width must be at least 1 cycle, not {self.width_cyc}"),
            (self.gap_cyc >= 1, f"pulse gap must be at least 1 cycle, not {self.gap_cyc}"),
            (self.rest >= 0, f"rest pulses must be 0 or more, not {self.rest}"),
            (self.frac_bits >= 1, f"frac_bits must be at least 1, not {self.frac_bits}"),
            (self.rate_bits >= 2, f"rate_bits must be at least 2, not {self.rate_bits}"),
            (self.clamp >= 1, f"clamp must be at least 1, not {self.clamp}"),
            (self.backlog >= self.per_strobe_max,
             f"backlog must be at least {self.per_strobe_max}, not {self.backlog}"),
            (self.owed_bits >= self.clamp.bit_length() + 2,
             f"owed_bits must be at least {self.clamp.bit_length() + 2}, not {self.owed_bits}"),
        ]
        for ok, message in checks:
            if not ok:
                raise ValueError(message)
        if len(self.init_rates) not in (0, len(self.names)):
            raise ValueError(f"init_rates needs {len(self.names)} values, not {len(self.init_rates)}")
        for name, rate in zip(self.names, self.rates, strict=True):
            if not self.rate_min <= rate <= self.rate_max:
                raise ValueError(f"initial rate of channel {name!r} ({rate}) does not fit {self.rate_bits} bits")
        if self.datapath not in DATAPATHS:
            raise ValueError(f"datapath must be one of {DATAPATHS}, not {self.datapath!r}")
        if self.datapath == "shared":
            self._check_shared()

    def _check_shared(self) -> None:
        """The shared datapath's own limits (``dvgate.gateware.shared_owed``)."""
        need = shared_min_width(self.n)
        if self.min_width_cyc < need:
            raise ValueError(f"the shared datapath needs a glitch filter (min_width) of at least {need} cycles "
                             f"for {self.n} channel(s), not {self.min_width_cyc}: every channel is visited "
                             "while the filter holds the strobe")
        for name, rate in zip(self.names, self.rates, strict=True):
            if abs(rate) > 1 << self.frac_bits:
                raise ValueError(f"the shared datapath needs rates of at most one pulse per cycle; channel {name!r} "
                                 f"has {rate / (1 << self.frac_bits):.6g}")
        if self.pulse_period_cyc < self.shared_pulse_min:
            raise ValueError(f"the shared datapath needs pulses (width + gap) of at least {self.shared_pulse_min} "
                             f"cycles for {self.n} channel(s), not {self.pulse_period_cyc}: the emitters' counts "
                             "are folded once between two pulses")
        least = shared_owed_bits_min(self.n, self.clamp)
        if self.owed_bits < least:
            raise ValueError(f"the shared datapath needs owed_bits of at least {least}, not {self.owed_bits}")

    @property
    def shared_slots(self) -> int:
        """Cycles between two visits of one channel by the shared datapath."""
        return shared_slots(self.n)

    @property
    def shared_d_bits(self) -> int:
        """Width of the step one visit of the shared datapath makes (:func:`shared_d_bits`)."""
        return shared_d_bits(self.n)

    @property
    def shared_pulse_min(self) -> int:
        """Least ``width_cyc + gap_cyc`` of the shared datapath: two visits and a fold."""
        return shared_pulse_min(self.n)

    @property
    def arm_lead(self) -> int:
        """Cycles ahead of the model's ``arm`` input at which the gateware's ``arm`` port is driven."""
        return self.shared_slots + SHARED_DEPTH if self.datapath == "shared" else 0

    @property
    def arm_spacing(self) -> int:
        """Least number of cycles between two changes of ``arm`` the gateware follows exactly."""
        return 4 * self.shared_slots + 2 * SHARED_DEPTH if self.datapath == "shared" else 1

    @property
    def n(self) -> int:
        """Number of channels."""
        return len(self.names)

    @property
    def rates(self) -> tuple[int, ...]:
        """Initial rates, zero where none were given."""
        return self.init_rates or (0,) * self.n

    @property
    def rate_min(self) -> int:
        return -(1 << (self.rate_bits - 1))

    @property
    def rate_max(self) -> int:
        return (1 << (self.rate_bits - 1)) - 1

    @property
    def owed_width(self) -> int:
        """Width of the signed owed register, fraction included."""
        return self.owed_bits + self.frac_bits

    @property
    def owed_min(self) -> int:
        return -(1 << (self.owed_width - 1))

    @property
    def owed_max(self) -> int:
        return (1 << (self.owed_width - 1)) - 1

    @property
    def latency_cyc(self) -> int:
        """Cycles from the strobe pin's active edge to the first output edge."""
        # The filter's M-th active cycle is the cycle the strobe is taken.
        return SYNC_CYC + (self.min_width_cyc - 1) + OUTPUT_CYC

    @property
    def per_strobe_max(self) -> int:
        """Most pulses (both lines) one strobe can hand an emitter."""
        if self.scheme == "burst":
            return 2 * self.rest + self.clamp
        return 1

    @property
    def pulse_period_cyc(self) -> int:
        """Cycles from one pulse's rising edge to the next one's on a busy channel."""
        return self.width_cyc + self.gap_cyc

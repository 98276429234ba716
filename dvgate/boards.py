"""Boards: pin maps, their checks, and the top that puts the emulator on a board.

A **pin map** (a TOML file; the built-in ones live in ``dvgate.constraints``) names the
connector pin of the strobe input, the arm input and each channel's two outputs, and
the board resources (LEDs, UART) that show status and carry the serial link. It names
an ``amaranth-boards`` platform, and every pin is checked against that platform's own
connector and resource definitions: a pin that does not exist, a pin used twice (also
through two names for one package pin, or the board's clock pin), or too few channel
pins for the config is a :class:`UserError` naming the pin.

Pin references:

``"pmod_0:1"``
    Pin 1 of connector ``pmod`` number 0, exactly as ``amaranth-boards`` names it.
``"led_g[0]"``
    Board resource ``led_g`` number 0 (a one-pin resource, or, for ``uart``, a resource
    with ``rx`` and ``tx`` subsignals).

:class:`BoardTop` is the design ``dvgate build`` hands to the platform: it creates the
clock domain (through a PLL when the config asks a clock other than the oscillator's),
instantiates :class:`dvgate.gateware.top.Emulator` (or, for a config with a ``[link]``
section, the emulator with its host link), and connects the pins through I/O buffers,
with a two-flip-flop synchronizer on the arm input.
"""

from __future__ import annotations

import importlib
import importlib.resources
import math
import re
from dataclasses import dataclass
from fractions import Fraction
from pathlib import Path
from typing import Any, Literal

from amaranth.build import Attrs, Pins, Platform, Resource, Subsignal
from amaranth.hdl import ClockDomain, ClockSignal, Const, Elaboratable, Instance, Module, Signal
from amaranth.lib import io
from amaranth.lib.cdc import FFSynchronizer, ResetSynchronizer
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator

from dvgate.config import Config, format_errors, read_toml, section
from dvgate.errors import UserError
from dvgate.params import HardwareParams
from dvgate.pll import PllPlan, exact_hz, plan_pll

#: Folder of the built-in pin maps (the ``dvgate.constraints`` package, wherever it is installed).
BUILTIN_DIR = Path(str(importlib.resources.files("dvgate.constraints")))

#: Status an LED can show, and what it means.
STATUS = {
    "armed": "the arm input, after its synchronizer (with a link: and armed by the host)",
    "strobes": "toggles every 2**k strobes (k chosen for about 4 toggles a second at the nominal period)",
    "host_absent": "no strobe for the absence timeout",
    "alarm": "host absent, any sticky flag set, or (with a link) a frame rejected",
    "fault": "any sticky flag set (overrun, clamped, deferred, saturated)",
    "overrun": "sticky: a strobe came while a channel was still emitting",
    "clamped": "sticky: a strobe's hand-over was clamped",
    "deferred": "sticky: a hand-over was deferred (backlog full)",
    "saturated": "sticky: an owed amount saturated",
    "playing": "host link: a program is playing (off without a link)",
    "starved": "host link: out of segments, an underrun (off without a link)",
    "link_error": "host link: a frame was rejected, sticky (off without a link)",
}

#: Time the design stays in reset after the PLL locks.
_POR_SECONDS = 15e-6

#: Toggles per second the ``strobes`` LED aims at.
_HEARTBEAT_HZ = 4

_CONN_REF = re.compile(r"^(?P<conn>[A-Za-z_][A-Za-z0-9_]*_[A-Za-z0-9]+):(?P<pin>[^\s:]+)$")
_RES_REF = re.compile(r"^(?P<name>[A-Za-z_][A-Za-z0-9_]*)(?:\[(?P<number>\d+)\])?$")

#: I/O standard of the pins dvgate adds, by family (3.3 V LVCMOS on both boards' headers).
_IO_ATTRS = {"ice40": {"IO_STANDARD": "SB_LVCMOS"}, "ecp5": {"IO_TYPE": "LVCMOS33"}}


# -- the file, as written --------------------------------------------------------------

class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, str_strip_whitespace=True)


class ChannelPinsModel(_Strict):
    """The two outputs of one channel."""

    pos: str
    neg: str


class UartPinsModel(_Strict):
    """A serial link on two connector pins."""

    rx: str
    tx: str


class PinMapModel(_Strict):
    """A pin-map file.

    ``platform`` may be left out in a user's map given with ``--pins`` together with
    ``--board``: the map then takes the platform of that built-in board.
    """

    name: str = ""
    title: str = ""
    platform: str = ""
    strobe: str
    arm: str
    arm_active: Literal["high", "low"] = "high"
    pll_input: Literal["pad", "buffer"] | None = None
    channels: list[ChannelPinsModel] = Field(min_length=1, max_length=16)
    leds: dict[str, str] = {}
    uart: str | UartPinsModel | None = None

    @field_validator("leds")
    @classmethod
    def _known_status(cls, value: dict[str, str]) -> dict[str, str]:
        for key in value:
            if key not in STATUS:
                raise ValueError(f"unknown status {key!r}; an LED can show: {', '.join(STATUS)}")
        return value

    @field_validator("platform")
    @classmethod
    def _platform_form(cls, value: str) -> str:
        if value and not re.fullmatch(r"[A-Za-z_][\w.]*:[A-Za-z_]\w*", value):
            raise ValueError("expected 'module:Class', e.g. 'amaranth_boards.icebreaker:ICEBreakerPlatform'")
        return value


class BoardSection(_Strict):
    """The ``[board]`` section of an emulator config."""

    name: str | None = None
    pins: str | None = None
    seed: int = Field(default=1, ge=0, le=2**31 - 1)


# -- resolved pins ---------------------------------------------------------------------

@dataclass(frozen=True)
class Pin:
    """One pin of a pin map, resolved on its board.

    Attributes
    ----------
    role : str
        Where the map names it: ``"strobe"``, ``"channels[3].neg"``, ``"leds.armed"``...
    ref : str
        The reference as written (``"pmod_0:1"``, ``"led_g[0]"``).
    site : str
        The package pin (``"47"``, ``"B11"``).
    direction : str
        ``"i"`` or ``"o"``.
    invert : bool
        The board inverts the pin (an active-low LED, an active-low arm input).
    attrs : dict of str to str
        I/O attributes for the constraint file.
    """

    role: str
    ref: str
    site: str
    direction: str
    invert: bool
    attrs: dict[str, Any]

    def resource(self, name: str) -> Resource:
        """An Amaranth resource for this pin alone."""
        return Resource(name, 0, Pins(self.site, dir=self.direction, invert=self.invert), Attrs(**self.attrs))


@dataclass(frozen=True)
class PinMap:
    """A checked pin map on its board.

    Attributes
    ----------
    name, title : str
        Short name (``--board``) and the board's full name.
    source : str
        Where the map came from, for messages.
    platform_cls : type
        The ``amaranth-boards`` platform class.
    family : str
        ``"ice40"`` or ``"ecp5"``.
    strobe, arm : Pin
        The inputs.
    channels : tuple of (Pin, Pin)
        Each channel's ``(pos, neg)`` outputs, in channel order.
    leds : dict of str to Pin
        Status name to LED pin.
    uart : tuple of (Pin, Pin) or None
        ``(rx, tx)`` of the serial link.
    pll_input : str
        iCE40 only: ``"pad"`` when the oscillator pin is the PLL's own input pad
        (``SB_PLL40_PAD``), ``"buffer"`` when the PLL takes the clock from a global
        buffer (``SB_PLL40_CORE``).
    """

    name: str
    title: str
    source: str
    platform_cls: type
    family: str
    strobe: Pin
    arm: Pin
    channels: tuple[tuple[Pin, Pin], ...]
    leds: dict[str, Pin]
    uart: tuple[Pin, Pin] | None
    pll_input: str = "buffer"

    def platform(self) -> Platform:
        """A fresh platform instance (Amaranth platforms are not reusable across builds)."""
        return self.platform_cls()

    @property
    def device(self) -> str:
        """Device and package, e.g. ``iCE40UP5K-SG48``."""
        cls = self.platform_cls
        return f"{cls.device}-{cls.package}"

    @property
    def oscillator_hz(self) -> Fraction:
        """Frequency of the board's default clock."""
        return exact_hz(self.platform().default_clk_frequency)

    def pins(self) -> list[Pin]:
        """Every pin of the map."""
        out = [self.strobe, self.arm]
        for pos, neg in self.channels:
            out += [pos, neg]
        out += list(self.leds.values())
        if self.uart:
            out += list(self.uart)
        return out

    def check_channels(self, names: tuple[str, ...]) -> None:
        """Refuse a config with more channels than the map has pin pairs.

        Raises
        ------
        UserError
            Naming the first channel without pins.
        """
        if len(names) > len(self.channels):
            first = len(self.channels)
            raise UserError(
                f"{self.source}: too few pins: the config has {len(names)} channels but the pin map "
                f"gives pins for {len(self.channels)}; channel {names[first]!r} (channels[{first}].pos "
                f"and channels[{first}].neg) has no pins: add entries to 'channels' or use at most "
                f"{len(self.channels)} channels")


# -- loading ---------------------------------------------------------------------------

def builtin_boards() -> dict[str, Path]:
    """Built-in pin maps by board name (file name without ``.toml``)."""
    return {path.stem: path for path in sorted(BUILTIN_DIR.glob("*.toml"))}


def load_pin_map(path: str | Path | None = None, *, board: str | None = None) -> PinMap:
    """Read and check a pin map.

    Parameters
    ----------
    path : str or Path, optional
        A user's pin-map file.
    board : str, optional
        A built-in board's name. With ``path``, the user's map takes this board's
        platform when it names none (and must name the same one when it does).

    Raises
    ------
    UserError
        An unknown board, a bad file, or a pin that does not exist or is used twice.
    """
    boards = builtin_boards()
    if board is not None and board not in boards:
        raise UserError(f"--board = {board!r}: allowed: {', '.join(boards)} (or a pin-map file with --pins)")
    if path is None and board is None:
        raise UserError(f"no board: give --board ({', '.join(boards)}) or --pins FILE, "
                        "or set [board] name or pins in the config")
    base = _read_model(boards[board]) if board is not None else None
    if path is None:
        assert base is not None
        return _resolve(base, str(boards[board]), default_name=board)
    model = _read_model(Path(path))
    platform = model.platform
    if base is not None:
        if platform and platform != base.platform:
            raise UserError(f"{path}: platform = {platform!r} differs from board {board!r} "
                            f"({base.platform}); drop --board or the platform line")
        model = model.model_copy(update={"platform": base.platform,
                                         "title": model.title or base.title})
    elif not platform:
        raise UserError(f"{path}: platform: missing; name an amaranth-boards platform "
                        "('module:Class'), or give --board too")
    return _resolve(model, str(path), default_name=board or Path(path).stem)


def board_for_config(cfg: Config, *, board: str | None = None, pins: str | Path | None = None) -> PinMap:
    """The pin map a config builds for: command-line choices first, then ``[board]``.

    A ``[board] pins`` path is relative to the config file. The map is checked against
    the config's channel count.
    """
    settings = section(cfg, "board", BoardSection)
    if board is None and pins is None:
        board = settings.name
        if settings.pins is not None:
            pins = Path(cfg.source).parent / settings.pins
    pin_map = load_pin_map(pins, board=board)
    pin_map.check_channels(cfg.hw.names)
    return pin_map


def _read_model(path: Path) -> PinMapModel:
    raw = read_toml(path)
    try:
        return PinMapModel.model_validate(raw)
    except ValidationError as error:
        raise UserError(format_errors(error, str(path), model=PinMapModel)) from None


def _import_platform(text: str, source: str) -> type:
    module_name, _, class_name = text.partition(":")
    try:
        module = importlib.import_module(module_name)
    except ImportError as error:
        raise UserError(f"{source}: platform = {text!r}: cannot import {module_name!r} ({error})") from None
    cls = getattr(module, class_name, None)
    if not (isinstance(cls, type) and issubclass(cls, Platform)):
        raise UserError(f"{source}: platform = {text!r}: {module_name} has no platform class {class_name!r}")
    return cls


def platform_family(platform: Platform) -> str | None:
    """``"ice40"``, ``"ecp5"``, or None for a family dvgate does not build for."""
    from amaranth.vendor import LatticePlatform, SiliconBluePlatform
    if isinstance(platform, SiliconBluePlatform):
        return "ice40"
    if isinstance(platform, LatticePlatform) and platform.family == "ecp5":
        return "ecp5"
    return None


class _Resolver:
    """Turns references into package pins on one platform, remembering who took each."""

    def __init__(self, platform: Platform, family: str, source: str) -> None:
        self.platform = platform
        self.family = family
        self.source = source
        # Full connector pin name -> package pin, and connector -> its pin names.
        self.conn_pins: dict[str, str] = {}
        self.connectors: dict[str, list[str]] = {}
        for (name, number), conn in platform.connectors.items():
            label = f"{name}_{number}"
            self.connectors[label] = list(conn.mapping)
            for full, site in conn:
                self.conn_pins[full] = site
        self.taken: dict[str, str] = {}
        clock = platform.default_clk
        if (clock, 0) in platform.resources:
            for site in self._resource_sites(platform.resources[clock, 0]):
                self.taken[site] = f"the board's clock input {clock!r}"

    def _site(self, name: str) -> str:
        while ":" in name:  # connectors may map onto other connectors
            name = self.conn_pins[name]
        return name

    def _resource_sites(self, resource: Subsignal) -> list[str]:
        sites = []
        for item in resource.ios:
            if isinstance(item, Pins):
                sites += [self._site(name) for name in item.names]
            elif isinstance(item, Subsignal):
                sites += self._resource_sites(item)
        return sites

    def _fail(self, role: str, ref: str, why: str) -> None:
        raise UserError(f"{self.source}: {role} = {ref!r}: {why}")

    def _claim(self, pin: Pin) -> Pin:
        if pin.site in self.taken:
            self._fail(pin.role, pin.ref, f"package pin {pin.site} is already used by {self.taken[pin.site]}")
        self.taken[pin.site] = f"{pin.role} = {pin.ref!r}"
        return pin

    def connector_pin(self, role: str, ref: str, direction: str, *, invert: bool = False,
                      attrs: dict[str, Any] | None = None) -> Pin:
        match = _CONN_REF.match(ref)
        known = f"connectors: {', '.join(self.connectors) or 'none'}"
        name, _, number = ref.partition(":")
        if number.isdigit() and (name, int(number)) in self.platform.resources:
            known += f" (for the board resource write {f'{name}[{number}]'!r})"
        if match is None:
            self._fail(role, ref, f"expected a connector pin such as 'pmod_0:1'; {known}")
        label = match["conn"]
        if label not in self.connectors:
            self._fail(role, ref, f"the board has no connector {label!r}; {known}")
        if ref not in self.conn_pins:
            self._fail(role, ref, f"no such pin: connector {label} has pins {', '.join(self.connectors[label])}")
        pin_attrs = dict(_IO_ATTRS[self.family])
        pin_attrs.update(attrs or {})
        return self._claim(Pin(role, ref, self._site(ref), direction, invert, pin_attrs))

    def _find_resource(self, role: str, ref: str) -> Subsignal:
        match = _RES_REF.match(ref)
        if match is None:
            self._fail(role, ref, "expected a connector pin ('pmod_0:1') or a board resource ('led[0]')")
        key = (match["name"], int(match["number"] or 0))
        if key not in self.platform.resources:
            names = sorted({f"{n}[{i}]" for n, i in self.platform.resources})
            self._fail(role, ref, f"the board has no resource {key[0]}[{key[1]}]; resources: {', '.join(names)}")
        return self.platform.resources[key]

    def _resource_pin(self, role: str, ref: str, node: Subsignal, direction: str,
                      inherited: dict[str, Any]) -> Pin:
        if len(node.ios) != 1 or not isinstance(node.ios[0], Pins) or len(node.ios[0].names) != 1:
            self._fail(role, ref, "the resource is not a single pin")
        pins = node.ios[0]
        attrs = {**inherited, **dict(node.attrs.items())}
        return self._claim(Pin(role, ref, self._site(pins.names[0]), direction, pins.invert, attrs))

    def led(self, status: str, ref: str) -> Pin:
        role = f"leds.{status}"
        if ":" in ref:
            return self.connector_pin(role, ref, "o")
        resource = self._find_resource(role, ref)
        return self._resource_pin(role, ref, resource, "o", {})

    def uart(self, spec: str | UartPinsModel) -> tuple[Pin, Pin]:
        if isinstance(spec, UartPinsModel):
            return (self.connector_pin("uart.rx", spec.rx, "i"), self.connector_pin("uart.tx", spec.tx, "o"))
        resource = self._find_resource("uart", spec)
        parts = {item.name: item for item in resource.ios if isinstance(item, Subsignal)}
        if "rx" not in parts or "tx" not in parts:
            self._fail("uart", spec, "the resource has no rx and tx subsignals")
        attrs = dict(resource.attrs.items())
        return (self._resource_pin("uart.rx", f"{spec}.rx", parts["rx"], "i", attrs),
                self._resource_pin("uart.tx", f"{spec}.tx", parts["tx"], "o", attrs))


def _arm_attrs(family: str, active: str) -> dict[str, Any]:
    """Pull the arm input to its inactive level, so an open input reads disarmed."""
    if family == "ecp5":
        return {"PULLMODE": "DOWN" if active == "high" else "UP"}
    # iCE40 pins have a pull-up only: it helps an active-low arm input alone.
    return {"PULLUP": 1} if active == "low" else {}


def _resolve(model: PinMapModel, source: str, *, default_name: str) -> PinMap:
    cls = _import_platform(model.platform, source)
    platform = cls()
    family = platform_family(platform)
    if family is None:
        raise UserError(f"{source}: platform = {model.platform!r}: dvgate builds for iCE40 and ECP5 "
                        f"boards only, not {getattr(cls, 'device', cls.__name__)}")
    res = _Resolver(platform, family, source)
    strobe = res.connector_pin("strobe", model.strobe, "i")
    arm = res.connector_pin("arm", model.arm, "i", invert=model.arm_active == "low",
                            attrs=_arm_attrs(family, model.arm_active))
    channels = tuple(
        (res.connector_pin(f"channels[{i}].pos", ch.pos, "o"), res.connector_pin(f"channels[{i}].neg", ch.neg, "o"))
        for i, ch in enumerate(model.channels))
    leds = {status: res.led(status, ref) for status, ref in model.leds.items()}
    uart = res.uart(model.uart) if model.uart is not None else None
    pll_input = model.pll_input or _default_pll_input(cls)
    return PinMap(name=model.name or default_name, title=model.title or cls.__name__, source=source,
                  platform_cls=cls, family=family, strobe=strobe, arm=arm, channels=channels,
                  leds=leds, uart=uart, pll_input=pll_input)


def _default_pll_input(cls: type) -> str:
    """UltraPlus boards clock from the PLL's pad (pin 35 of the SG48); others through a buffer."""
    return "pad" if str(getattr(cls, "device", "")).startswith("iCE40UP") else "buffer"


# -- the board top ---------------------------------------------------------------------

def heartbeat_bit(strobe_period_cyc: int, clock_hz: float) -> int:
    """Bit of the strobe count the ``strobes`` LED shows: about 4 toggles a second.

    Bit ``k`` of the count toggles every ``2**k`` strobes; ``k`` is the one nearest
    (on a log scale) to a quarter second of strobes at the nominal period.
    """
    strobes_per_toggle = clock_hz / (strobe_period_cyc * _HEARTBEAT_HZ)
    if strobes_per_toggle <= 1:
        return 0
    return min(round(math.log2(strobes_per_toggle)), 31)


class BoardTop(Elaboratable):
    """The emulator on a board: clock, pins, synchronizer, LEDs, and the serial link.

    Use :func:`prepare_top`, which checks the pins and the PLL against the config first
    (an elaboratable that is built and then refused draws Amaranth's unused warning).

    Parameters
    ----------
    params : HardwareParams
        The emulator.
    pin_map : PinMap
        Checked pins, with pins for every channel of ``params``.
    pll : PllPlan or None
        PLL settings when the clock is not the oscillator's; None to clock the design
        from the oscillator (the platform then makes the ``sync`` domain).
    heartbeat : int
        Bit of the strobe count the ``strobes`` LED shows (see :func:`heartbeat_bit`).
    link : LinkParams or None
        The host link (``dvgate.linkspec``). With it the core is
        :class:`dvgate.gateware.linked_top.LinkedTop` and the pin map's serial pins are
        connected; without it the core is the bare emulator and the serial pins stay
        unused (still reserved by the map).

    Attributes
    ----------
    core : Emulator or LinkedTop
        The design the pins connect to (built here so callers can reach it).
    emulator : Emulator
        The emulator inside ``core`` (``core`` itself without a link).
    """

    #: Resource names dvgate adds to the platform (they show in the constraint file).
    STROBE, ARM, UART = "dvgate_strobe", "dvgate_arm", "dvgate_uart"

    def __init__(self, params: HardwareParams, pin_map: PinMap, pll: PllPlan | None = None,
                 heartbeat: int = 0, link: Any = None) -> None:
        self._params = params
        self._pins = pin_map
        self._pll = pll
        self._heartbeat = heartbeat
        self._link = link
        if link is None:
            from dvgate.gateware.shared_top import emulator_top
            self.core = self.emulator = emulator_top(params)
        else:
            from dvgate.gateware.linked_top import LinkedTop
            self.core = LinkedTop(link)
            self.emulator = self.core.emulator

    @property
    def link(self) -> Any:
        """The host link's parameters, or None for the bare emulator."""
        return self._link

    @staticmethod
    def channel_resource(name: str) -> str:
        """Resource name of a channel's outputs."""
        return f"ch_{name}"

    def resources(self) -> list[Resource]:
        """The resources to add to the platform before building."""
        p, pm = self._params, self._pins
        out = [pm.strobe.resource(self.STROBE), pm.arm.resource(self.ARM)]
        for name, (pos, neg) in zip(p.names, pm.channels, strict=False):
            out.append(Resource(
                self.channel_resource(name), 0,
                Subsignal("pos", Pins(pos.site, dir="o", invert=pos.invert), Attrs(**pos.attrs)),
                Subsignal("neg", Pins(neg.site, dir="o", invert=neg.invert), Attrs(**neg.attrs))))
        for status, pin in pm.leds.items():
            out.append(pin.resource(f"dvgate_led_{status}"))
        if self._link is not None and pm.uart is not None:
            rx, tx = pm.uart
            out.append(Resource(
                self.UART, 0,
                Subsignal("rx", Pins(rx.site, dir="i", invert=rx.invert), Attrs(**rx.attrs)),
                Subsignal("tx", Pins(tx.site, dir="o", invert=tx.invert), Attrs(**tx.attrs))))
        return out

    def elaborate(self, platform) -> Module:
        m = Module()
        p = self._params

        if self._pll is not None:
            self._clock_from_pll(m, platform)

        m.submodules.core = core = self.core

        strobe_port = platform.request(self.STROBE, 0, dir="-")
        arm_port    = platform.request(self.ARM, 0, dir="-")
        arm_pin     = Signal()
        m.submodules.strobe_buf = strobe_buf = io.Buffer("i", strobe_port)
        m.submodules.arm_buf = arm_buf = io.Buffer("i", arm_port)
        # The arm switch is asynchronous to the clock: two flip-flops before any logic sees it.
        # (The strobe has its own synchronizer inside the strobe detector.)
        m.submodules.arm_sync = FFSynchronizer(arm_buf.i, arm_pin, stages=2)
        m.d.comb += [core.strobe.eq(strobe_buf.i), core.arm.eq(arm_pin)]

        for name in p.names:
            ports = platform.request(self.channel_resource(name), 0, dir={"pos": "-", "neg": "-"})
            m.submodules[f"{name}_pos_buf"] = pos_buf = io.Buffer("o", ports.pos)
            m.submodules[f"{name}_neg_buf"] = neg_buf = io.Buffer("o", ports.neg)
            m.d.comb += [pos_buf.o.eq(getattr(core, f"{name}_pos")),
                         neg_buf.o.eq(getattr(core, f"{name}_neg"))]

        if self._link is not None:
            uart = platform.request(self.UART, 0, dir={"rx": "-", "tx": "-"})
            m.submodules.uart_rx_buf = rx_buf = io.Buffer("i", uart.rx)
            m.submodules.uart_tx_buf = tx_buf = io.Buffer("o", uart.tx)
            m.d.comb += [core.rx.eq(rx_buf.i), tx_buf.o.eq(core.tx)]

        for name, value in self._status(arm_pin).items():
            if name in self._pins.leds:
                port = platform.request(f"dvgate_led_{name}", 0, dir="-")
                m.submodules[f"led_{name}_buf"] = buf = io.Buffer("o", port)
                m.d.comb += buf.o.eq(value)
        return m

    def _status(self, arm_pin: Signal) -> dict[str, Any]:
        """What each LED status shows (see :data:`STATUS`)."""
        emu, core = self.emulator, self.core
        flags = emu.flags
        any_flag = flags.overrun | flags.clamped | flags.deferred | flags.saturated
        linked = self._link is not None
        return {
            "armed": core.armed if linked else arm_pin,
            "strobes": emu.strobes[self._heartbeat],
            "host_absent": emu.host_absent,
            "alarm": emu.host_absent | any_flag | (core.link_error if linked else 0),
            "fault": any_flag,
            "overrun": flags.overrun,
            "clamped": flags.clamped,
            "deferred": flags.deferred,
            "saturated": flags.saturated,
            "playing": core.playing if linked else Const(0),
            "starved": core.starved if linked else Const(0),
            "link_error": core.link_error if linked else Const(0),
        }

    def _clock_from_pll(self, m: Module, platform) -> None:
        """Create ``sync`` from the PLL, held in reset until the PLL locks."""
        pll, pm = self._pll, self._pins
        assert pll is not None
        clk_port = platform.request(platform.default_clk, 0, dir="-")
        clk_out  = Signal()
        lock     = Signal()
        if pm.family == "ice40":
            common = dict(
                p_FEEDBACK_PATH="SIMPLE",
                p_PLLOUT_SELECT="GENCLK",
                p_DIVR=pll.settings["DIVR"],
                p_DIVF=pll.settings["DIVF"],
                p_DIVQ=pll.settings["DIVQ"],
                p_FILTER_RANGE=pll.settings["FILTER_RANGE"],
                i_RESETB=Const(1),
                i_BYPASS=Const(0),
                o_PLLOUTGLOBAL=clk_out,
                o_LOCK=lock,
            )
            if pm.pll_input == "pad":
                # The oscillator pin is the PLL's own input pad: the PLL takes the pin itself.
                m.submodules.pll = Instance("SB_PLL40_PAD", io_PACKAGEPIN=clk_port.io, **common)
            else:
                m.submodules.clk_buf = clk_buf = io.Buffer("i", clk_port)
                m.submodules.pll = Instance("SB_PLL40_CORE", i_REFERENCECLK=clk_buf.i, **common)
        else:
            m.submodules.clk_buf = clk_buf = io.Buffer("i", clk_port)
            m.submodules.pll = Instance(
                "EHXPLLL",
                a_FREQUENCY_PIN_CLKI=f"{float(pll.input_hz) / 1e6:.6g}",
                a_FREQUENCY_PIN_CLKOP=f"{float(pll.output_hz) / 1e6:.6g}",
                p_PLLRST_ENA="DISABLED",
                p_INTFB_WAKE="DISABLED",
                p_STDBY_ENABLE="DISABLED",
                p_DPHASE_SOURCE="DISABLED",
                p_OUTDIVIDER_MUXA="DIVA",
                p_CLKOP_ENABLE="ENABLED",
                p_CLKOP_FPHASE=0,
                p_FEEDBK_PATH="CLKOP",
                **{f"p_{key}": value for key, value in pll.settings.items()},
                i_CLKI=clk_buf.i,
                i_CLKFB=clk_out,
                i_RST=Const(0),
                i_STDBY=Const(0),
                i_PHASESEL0=Const(0),
                i_PHASESEL1=Const(0),
                i_PHASEDIR=Const(0),
                i_PHASESTEP=Const(0),
                i_PHASELOADREG=Const(0),
                i_PLLWAKESYNC=Const(0),
                i_ENCLKOP=Const(0),
                o_CLKOP=clk_out,
                o_LOCK=lock,
            )
        m.domains.sync = ClockDomain("sync")
        # nextpnr derives the PLL output's constraint from the oscillator's and the dividers.
        m.d.comb += ClockSignal("sync").eq(clk_out)
        # Held in reset until the PLL has been locked for _POR_SECONDS (iCE40 block RAMs read
        # as zero for a few microseconds after configuration, as Amaranth's own reset notes),
        # then released in step with the new clock.
        m.domains.por = ClockDomain("por", reset_less=True, local=True)
        m.d.comb += ClockSignal("por").eq(clk_out)
        delay  = max(1, math.ceil(_POR_SECONDS * float(pll.output_hz)))
        locked = Signal()
        timer  = Signal(range(delay + 1))
        ready  = Signal()
        m.submodules.lock_sync = FFSynchronizer(lock, locked, o_domain="por", stages=2)
        with m.If(~locked):
            m.d.por += [timer.eq(0), ready.eq(0)]
        with m.Elif(timer == delay):
            m.d.por += ready.eq(1)
        with m.Else():
            m.d.por += timer.eq(timer + 1)
        m.submodules.reset_sync = ResetSynchronizer(~ready, domain="sync")


def clock_plan(pin_map: PinMap, clock_hz: float, source: str = "<config>") -> PllPlan | None:
    """PLL settings for the config's clock on this board, or None when it is the oscillator's.

    Raises
    ------
    UserError
        When the PLL cannot make the clock exactly (naming the nearest it can make), or
        the board's clock is an internal oscillator dvgate does not feed to a PLL.
    """
    platform = pin_map.platform()
    osc = exact_hz(platform.default_clk_frequency)
    asked = exact_hz(clock_hz)
    if asked == osc:
        return None
    if (platform.default_clk, 0) not in platform.resources:
        raise UserError(f"{source}: clock = '{float(asked) / 1e6:.6g} MHz': board {pin_map.name!r} runs from its "
                        f"internal oscillator {platform.default_clk} ({float(osc) / 1e6:.6g} MHz), which dvgate "
                        f"does not feed to a PLL; set clock to '{float(osc) / 1e6:.6g} MHz'")
    try:
        return plan_pll(pin_map.family, osc, asked, board=f"board {pin_map.name!r}")
    except UserError as error:
        raise UserError(f"{source}: {error}") from None


def prepare_top(cfg: Config, pin_map: PinMap, pll: PllPlan | None) -> tuple[BoardTop, Platform]:
    """The board top for a config and a fresh platform with its resources added.

    ``pll`` comes from :func:`clock_plan`. A config with a ``[link]`` section gets the
    host link, on the pin map's serial pins.

    Raises
    ------
    UserError
        When the pin map has too few channel pins for the config, or no serial pins for
        its link; a bad ``[link]`` section.
    """
    pin_map.check_channels(cfg.hw.names)
    if pll is not None and pll.family != pin_map.family:
        raise ValueError(f"a {pll.family} PLL cannot go on a {pin_map.family} board")
    link = None
    if cfg.model.link:
        from dvgate.linkspec import link_params
        link = link_params(cfg)
        if pin_map.uart is None:
            raise UserError(f"{pin_map.source}: uart: missing; the config {cfg.source} has a [link] section, "
                            "which needs the serial pins: name the board's uart resource ('uart[0]') "
                            "or two connector pins ({ rx = ..., tx = ... })")
    top = BoardTop(cfg.hw, pin_map, pll, heartbeat_bit(cfg.strobe_period_cyc, cfg.clock_hz), link)
    platform = pin_map.platform()
    platform.add_resources(top.resources())
    return top, platform

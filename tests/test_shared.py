"""The shared owed datapath (``datapath = "shared"``) against the reference model.

The oracle is ``dvgate.sim.model`` (pure Python, no gateware): the shared top must give
the model's every output edge and its status, cycle for cycle, and every owed amount it
holds must be the model's owed amount at that cycle. (The emitters' pending counts, which
it keeps in block RAM as well, are not read out: they show in the edges.)
"""

from __future__ import annotations

import dataclasses
import random

import pytest

from dvgate.config import parse_config
from dvgate.errors import UserError
from dvgate.params import SHARED_DEPTH, HardwareParams, shared_min_width, shared_pulse_min, shared_slots
from dvgate.sim.model import run_model
from dvgate.sim.testbench import input_plan, run_amaranth
from dvgate.sim.trace import FaultChange, Faults, RateChange, Stimulus

SCHEMES = ("burst", "binary", "ternary")


def shared_params(rnd: random.Random, n: int, scheme: str) -> HardwareParams:
    """A small shared emulator: 8 fraction bits, owed amounts that saturate quickly."""
    rest = rnd.choice([0, 1, 2]) if scheme == "burst" else 0
    per_strobe = 2 * rest + 8 if scheme == "burst" else 1
    width = rnd.choice([1, 2, 5])
    return HardwareParams(
        clock_hz=1e6, names=tuple(f"c{i}" for i in range(n)), edge_rising=rnd.random() < 0.8,
        min_width_cyc=shared_min_width(n) + rnd.choice([0, 0, 1, 3]), absence_cyc=500, scheme=scheme,
        rest=rest, width_cyc=width, gap_cyc=shared_pulse_min(n) - width + rnd.choice([0, 0, 1, 9]),
        order=rnd.choice(["interleaved", "grouped"]), active_low=rnd.random() < 0.3,
        frac_bits=8, rate_bits=10, owed_bits=8, clamp=8, backlog=per_strobe + rnd.choice([0, 2, 20]),
        init_rates=tuple(rnd.randint(-256, 256) for _ in range(n)), datapath="shared")


def shared_stimulus(rnd: random.Random, p: HardwareParams, cycles: int) -> Stimulus:
    """Strobes with glitches and the shortest gaps, arm changes at the spacing limit,
    ignore windows and ``no_rest`` faults."""
    edges: list[int] = []
    t = rnd.randint(20, 40)
    while t < cycles:
        width = rnd.choice([p.min_width_cyc, p.min_width_cyc + rnd.randint(0, 10), rnd.randint(1, p.min_width_cyc - 1)])
        edges += [t, t + width]
        t += width + rnd.choice([1, 2, rnd.randint(1, 40), rnd.randint(1, 200)])
    arm = [(p.arm_lead + rnd.randint(0, 30), True)]
    c = arm[0][0]
    while True:
        c += p.arm_spacing + rnd.choice([0, 1, rnd.randint(0, 200)])
        if c >= cycles:
            break
        arm.append((c, not arm[-1][1]))
    ignores = []
    c = rnd.randint(50, 100)
    while c < cycles:
        ignores.append((c, rnd.randint(1, 60)))
        c += rnd.randint(61, 300)
    faults = {}
    for _ in range(3):
        change = FaultChange(rnd.randint(1, cycles), rnd.randrange(p.n), Faults(no_rest=rnd.random() < 0.5))
        faults[change.cycle] = change
    return Stimulus(cycles=cycles, strobe_edges=tuple(edges), arm_changes=tuple(arm), ignore_windows=tuple(ignores),
                    fault_changes=tuple(faults[k] for k in sorted(faults)))


def check_against_model(p: HardwareParams, stim: Stimulus) -> int:
    """Assert the shared top equals the model; return how many held owed amounts were compared."""
    anchors: list = []
    got = run_amaranth(p, stim, anchors=anchors)
    want = run_model(p, stim)
    assert got.edges == want.edges
    assert got.status == want.status
    checked = 0
    for channel, held in enumerate(anchors):
        if held is None:
            continue
        cycle, owed = held
        # The datapath may hold a cycle a few past N: the inputs stay as they were at N - 1.
        assert owed == run_model(p, dataclasses.replace(stim, cycles=cycle)).channels[channel].owed, (channel, cycle)
        checked += 1
    return checked


def random_case(seed: int) -> tuple[HardwareParams, Stimulus]:
    """The config and stimulus of one random run."""
    rnd = random.Random(seed)
    p = shared_params(rnd, rnd.choice([1, 2, 3, 5, 8, 9, 12, 16]), SCHEMES[seed % 3])
    return p, shared_stimulus(rnd, p, 700)


@pytest.mark.parametrize("seed", range(24))
def test_random_runs_equal_the_model(seed: int) -> None:
    check_against_model(*random_case(seed))


def test_the_runs_reach_every_event() -> None:
    """The random runs above are only a test if they saturate, clamp, defer and overrun."""
    totals = dict(saturations=0, clamps=0, deferrals=0, overruns=0, ignored=0)
    for seed in range(24):
        status = run_model(*random_case(seed)).status
        for key in totals:
            totals[key] += getattr(status, key)
    assert all(v > 0 for v in totals.values()), totals


def test_held_owed_amounts_are_the_models() -> None:
    compared = 0
    for seed in range(100, 112):
        rnd = random.Random(seed)
        p = shared_params(rnd, 3, SCHEMES[seed % 3])
        stim = shared_stimulus(rnd, p, rnd.randint(300, 600))
        compared += check_against_model(p, stim)
    assert compared >= 6


def test_strobes_at_the_shortest_spacing() -> None:
    """Strobes of exactly the filter's width, one cycle apart: one visit per channel each."""
    rnd = random.Random(7)
    p = dataclasses.replace(shared_params(rnd, 16, "burst"), min_width_cyc=shared_min_width(16), width_cyc=1,
                            gap_cyc=shared_pulse_min(16) - 1, backlog=40)
    m = p.min_width_cyc
    edges = []
    t = 30
    while t < 900:
        edges += [t, t + m]
        t += m + 1
    stim = Stimulus(cycles=900, strobe_edges=tuple(edges), arm_changes=((p.arm_lead, True),))
    check_against_model(p, stim)


def test_arm_is_driven_ahead() -> None:
    rnd = random.Random(3)
    p = shared_params(rnd, 2, "burst")
    stim = Stimulus(cycles=200, strobe_edges=(), arm_changes=((p.arm_lead + 5, True),))
    plan = input_plan(p, stim)
    assert plan[5]["arm"] == 1  # arm_lead cycles before the model's change


@pytest.mark.parametrize(("stim_kw", "message"), [
    (dict(rate_changes=(RateChange(50, 0, 3),), arm_changes=((40, True),)), "keeps every channel at its config rate"),
    (dict(arm_changes=((3, True),)), "takes arm"),
    (dict(arm_changes=((40, True), (45, False))), "cycles apart"),
])
def test_what_the_shared_datapath_cannot_follow_is_refused(stim_kw: dict, message: str) -> None:
    p = shared_params(random.Random(1), 2, "burst")
    with pytest.raises(ValueError, match=message):
        input_plan(p, Stimulus(cycles=300, **stim_kw))


def _config(**rate: object) -> dict:
    return {"clock": "48 MHz", "strobe": {"min_width": "500 ns"}, "rate": {"owed_bits": 16, **rate},
            "channels": 16}


def test_config_chooses_the_shared_datapath() -> None:
    cfg = parse_config(_config(datapath="shared"))
    assert cfg.hw.datapath == "shared"
    assert cfg.hw.arm_lead == shared_slots(16) + SHARED_DEPTH
    assert parse_config(_config()).hw.datapath == "per_channel"


@pytest.mark.parametrize(("raw", "field"), [
    ({**_config(datapath="shared"), "strobe": {"min_width": "300 ns"}}, "strobe.min_width"),
    ({**_config(datapath="shared"), "link": {"baud": 115200}}, "rate.datapath"),
    # 6 integer bits hold a clamp of 2 (4 would), but not the shared datapath's 16 channels' steps (8).
    ({**_config(datapath="shared"), "rate": {"datapath": "shared", "owed_bits": 6, "clamp": 2}}, "rate.owed_bits"),
    ({**_config(datapath="shared"), "pulses": {"width": "100 ns", "gap": "100 ns"}}, "pulses.gap"),
])
def test_config_limits_of_the_shared_datapath(raw: dict, field: str) -> None:
    with pytest.raises(UserError, match=field.replace(".", r"\.")) as refused:
        parse_config(raw)
    assert "datapath" in str(refused.value)


SHARED_CONFIG = """
clock = "48 MHz"
[strobe]
min_width = "500 ns"
period = "200 us"
[rate]
owed_bits = 16
datapath = "shared"
[[channels]]
name = "x"
rate = "0.5 g"
[[channels]]
name = "z"
rate = "1 g"
"""


def test_dvgate_sim_runs_the_shared_datapath(tmp_path) -> None:
    from dvgate.config import load_config
    from dvgate.simulate import simulate_config

    path = tmp_path / "shared.toml"
    path.write_text(SHARED_CONFIG)
    report = simulate_config(load_config(path), 0.0008)
    assert report.agree, report.differences
    assert "shared datapath" in report.engine
    assert sum(ch.pos + ch.neg for ch in report.channels) > 0


def test_the_compiled_engine_and_programs_refuse_the_shared_datapath(tmp_path) -> None:
    from dvgate.config import load_config
    from dvgate.errors import UserError
    from dvgate.run import plan_run
    from dvgate.sim.engines import get_engine
    from dvgate.sim.program import Program

    with pytest.raises(UserError, match="per-channel datapath"):
        get_engine("compiled", "shared")
    path = tmp_path / "shared.toml"
    path.write_text(SHARED_CONFIG)
    with pytest.raises(UserError, match="keeps every channel at its config rate"):
        plan_run(Program.__new__(Program), load_config(path))


def test_proofs_refuse_a_shared_config(tmp_path, capsys) -> None:
    from dvgate.cli import main
    from dvgate.sim.formal import plan

    with pytest.raises(UserError, match="checked against the reference model"):
        plan(parse_config(_config(datapath="shared")).hw)
    path = tmp_path / "shared.toml"
    path.write_text(SHARED_CONFIG)
    assert main(["prove", str(path)]) == 2
    assert "checked against the reference model" in capsys.readouterr().err


def test_verilog_of_a_shared_config_has_no_rate_port() -> None:
    from dvgate.gateware.top import write_verilog

    text = write_verilog(parse_config(_config(datapath="shared")).hw)
    assert "rate_we" not in text and "ch0_pos" in text


@pytest.mark.parametrize("simulator", ["icarus", "verilator"])
def test_the_shared_verilog_in_independent_simulators(simulator: str) -> None:
    """The emitted Verilog (block RAMs with their tables as initial contents) in Icarus
    Verilog and Verilator, against the model (independent simulators, see sim/hdl_sims.py)."""
    import os

    from dvgate.sim import hdl_sims
    from dvgate.simulate import compare_results

    if hdl_sims.find_simulator(simulator) is None:
        message = f"{simulator} is not installed; this check runs in CI (DVGATE_REQUIRE_TOOLS=1)"
        if os.environ.get("DVGATE_REQUIRE_TOOLS") == "1":
            pytest.fail(message)
        pytest.skip(message)
    for seed in (41, 42):
        rnd = random.Random(seed)
        p = shared_params(rnd, 9, SCHEMES[seed % 3])
        stim = shared_stimulus(rnd, p, 900)
        got = hdl_sims.run_hdl(simulator, p, stim)
        problems = compare_results(got, run_model(p, stim), p.names)
        assert not problems, "\n".join(problems)

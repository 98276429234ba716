"""The command line end to end (in-process; `dvgate.cli.main` returns the exit status)."""

import subprocess
import tomllib

import pytest
from conftest import need_tool

from dvgate.cli import main

EXAMPLE = "dvgate/examples/bench.toml"


def test_init_writes_the_example_and_refuses_to_overwrite(tmp_path, capsys):
    path = tmp_path / "bench.toml"
    assert main(["init", str(path)]) == 0
    assert tomllib.loads(path.read_text())["pulses"]["scheme"] == "burst"
    out = capsys.readouterr().out
    assert "isolate and level-shift" in out  # the safety caution is shown
    assert main(["init", str(path)]) == 2
    assert "--force" in capsys.readouterr().err
    assert main(["init", str(path), "--force"]) == 0


def test_help_shows_safety(capsys):
    with pytest.raises(SystemExit):
        main(["--help"])
    assert "keep outputs idle until armed" in capsys.readouterr().out


def test_verilog_compiles_in_icarus(tmp_path):
    # Independent tool: Icarus Verilog must accept the emitted Verilog without errors.
    iverilog = need_tool("iverilog")
    out = tmp_path / "top.v"
    assert main(["verilog", EXAMPLE, "-o", str(out), "--channels", "3"]) == 0
    text = out.read_text()
    for port in ("x_pos", "x_neg", "y_pos", "z_neg", "strobe", "arm", "host_absent"):
        assert port in text
    done = subprocess.run([iverilog, "-g2005", "-o", str(tmp_path / "top.vvp"), str(out)],
                          capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    assert "error" not in done.stderr.lower()


def test_verilog_sixteen_channels_compiles(tmp_path):
    iverilog = need_tool("iverilog")
    out = tmp_path / "top16.v"
    assert main(["verilog", EXAMPLE, "-o", str(out), "--channels", "16"]) == 0
    assert "ch15_neg" in out.read_text()
    done = subprocess.run([iverilog, "-o", str(tmp_path / "t.vvp"), str(out)], capture_output=True, text=True)
    assert done.returncode == 0, done.stderr


def test_sim_on_the_example_agrees(capsys):
    assert main(["sim", EXAMPLE, "--seconds", "0.0006", "--engine", "python"]) == 0
    out = capsys.readouterr().out
    assert "simulation and model agree" in out
    assert "delta-V emitted" in out


def test_sim_retuned(capsys):
    assert main(["sim", EXAMPLE, "--seconds", "0.0003", "--engine", "python", "--channels", "2",
                 "--weight", "0.02 m/s"]) == 0
    out = capsys.readouterr().out
    assert "agree" in out and " z " not in out


def test_sim_writes_vcd(tmp_path, capsys):
    vcd = tmp_path / "run.vcd"
    assert main(["sim", EXAMPLE, "--seconds", "0.0002", "--engine", "python", "--vcd", str(vcd)]) == 0
    assert "$timescale" in vcd.read_text()


@pytest.mark.parametrize("argv, needle", [
    (["sim", EXAMPLE, "--seconds", "0"], "--seconds = 0.0"),
    (["sim", EXAMPLE, "--seconds", "-1"], "--seconds = -1.0"),
    (["sim", EXAMPLE, "--channels", "0"], "--channels = 0"),
    (["sim", EXAMPLE, "--weight", "fast"], "defaults.weight"),
    (["check", EXAMPLE, "--weight", "1 g"], "defaults.weight = '1 g'"),
])
def test_bad_options_exit_2(argv, needle, capsys, tmp_path):
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert needle in err and "Traceback" not in err


def test_verilog_to_missing_folder_writes_nothing(tmp_path, capsys):
    assert main(["verilog", EXAMPLE, "-o", str(tmp_path / "none" / "top.v")]) == 2
    assert "no such folder" in capsys.readouterr().err

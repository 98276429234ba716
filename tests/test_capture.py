"""Capture readers (VCD and CSV) and the map of capture signals to emulator lines."""

from __future__ import annotations

import tracemalloc
from pathlib import Path

import numpy as np
import pytest

from dvgate.errors import UserError
from dvgate.sim import capture as capture_module
from dvgate.sim.capture import (
    CaptureMap,
    SignalRef,
    capture_map_from_args,
    load_capture_map,
    read_capture,
)

# -- VCD: hand-written files in the format of IEEE Std 1364-2001, section 18 -------------

# Header sections (18.2.3): $date, $version, $timescale, nested $scope/$upscope, $var of
# one and several bits; then $dumpvars, #time stamps, scalar 0/1/x/z changes and b...
# vector changes (18.2.1, the four-state VCD file format).
HAND_WRITTEN = """$date
   June 1, 2031 10:00:00
$end
$version
   hand-written test file
$end
$comment a comment section may sit anywhere in the header $end
$timescale {scale} $end
$scope module bench $end
$var wire 1 ! clk $end
$scope module dut $end
$var wire 1 " strobe $end
$var wire 1 # x_pos $end
$var reg 1 $ x_neg $end
$var wire 4 % bus [3:0] $end
$var wire 1 & data [5] $end
$upscope $end
$scope task probe $end
$var integer 8 ' count [7:0] $end
$upscope $end
$upscope $end
$enddefinitions $end
#0
$dumpvars
0!
0"
x#
0$
bx %
1&
b0 '
$end
#10
1!
1"
0#
b1010 %
#20
0!
z#
b1x10 %
#25
1#
0&
#30
0"
0#
b11 %
b101 '
#40
1$
#45
0$
1&
"""


@pytest.mark.parametrize("scale, seconds", [
    ("1 s", 1.0), ("10 ms", 10e-3), ("100 us", 100e-6), ("1 ns", 1e-9), ("10 ps", 10e-12), ("1 fs", 1e-15),
    ("1ns", 1e-9), ("100 fs", 100e-15),
])
def test_vcd_hand_written_ieee1364(tmp_path: Path, scale: str, seconds: float) -> None:
    path = tmp_path / "hand.vcd"
    path.write_text(HAND_WRITTEN.format(scale=scale))
    cap = read_capture(path, ["strobe", "x_pos", "dut.x_neg", "bus[1]", "bus[2]", "bus[3]", "data[5]"])
    # Units of $timescale: IEEE Std 1364-2001 18.2.3.7 (s, ms, us, ns, ps, fs; 1, 10 or 100).
    assert cap.start == 0.0
    assert cap.end == pytest.approx(45 * seconds)
    assert cap.samples == 7
    strobe = cap.traces["strobe"]
    assert strobe.name == "bench.dut.strobe"
    assert strobe.initial == 0
    np.testing.assert_allclose(strobe.changes, np.array([10, 30]) * seconds)
    # x and z keep the last known level and are counted; x at the start takes the first known value.
    x_pos = cap.traces["x_pos"]
    assert x_pos.initial == 0 and x_pos.unknown == 2
    np.testing.assert_allclose(x_pos.changes, np.array([25, 30]) * seconds)
    np.testing.assert_allclose(cap.traces["dut.x_neg"].changes, np.array([40, 45]) * seconds)
    # Vector bits: bx, b1010, b1x10, then b11 (left-extended with 0, IEEE Std 1364-2001 18.2.3.8).
    bus1 = cap.traces["bus[1]"]
    assert (bus1.initial, bus1.unknown, bus1.changes.size) == (1, 1, 0)
    bus2 = cap.traces["bus[2]"]
    assert (bus2.initial, bus2.unknown, bus2.changes.size) == (0, 2, 0)
    bus3 = cap.traces["bus[3]"]
    assert (bus3.initial, bus3.unknown) == (1, 1)
    np.testing.assert_allclose(bus3.changes, [30 * seconds])
    assert bus3.level_at(15 * seconds) == 1 and bus3.level_at(35 * seconds) == 0
    # A one-bit variable declared with its index, as "data [5]".
    np.testing.assert_allclose(cap.traces["data[5]"].changes, np.array([25, 45]) * seconds)
    # The sample period of a VCD: the greatest common divisor of its time steps (5 units here).
    assert cap.sample_period == pytest.approx(5 * seconds)


def test_vcd_vector_bit_of_integer_and_ascending_range(tmp_path: Path) -> None:
    path = tmp_path / "asc.vcd"
    path.write_text("$timescale 1 us $end\n$scope module m $end\n$var wire 4 a v [0:3] $end\n$upscope $end\n"
                    "$enddefinitions $end\n#0\nb0000 a\n#1\nb1000 a\n#2\nb0001 a\n#3\n")
    cap = read_capture(path, ["v[0]", "v[3]"])
    # [0:3]: the leftmost character is bit 0 (IEEE Std 1364-2001 18.2.3.8, MSB first as declared).
    np.testing.assert_allclose(cap.traces["v[0]"].changes, [1e-6, 2e-6])
    np.testing.assert_allclose(cap.traces["v[3]"].changes, [2e-6])


def test_vcd_written_by_pyvcd_writer(tmp_path: Path) -> None:
    # An independent writer: pyvcd's VCDWriter.
    from vcd import VCDWriter

    path = tmp_path / "writer.vcd"
    with path.open("w") as handle, VCDWriter(handle, timescale="1 ns", date="today") as writer:
        strobe = writer.register_var("top.io", "strobe", "wire", size=1, init=0)
        word = writer.register_var("top.io", "word", "wire", size=8, init=0)
        for t in range(1, 50):
            writer.change(strobe, t * 20, t % 2)
            writer.change(word, t * 20 + 5, t)
    cap = read_capture(path, ["strobe", "top.io.word[0]", "word[7]"])
    np.testing.assert_allclose(cap.traces["strobe"].changes, np.arange(1, 50) * 20e-9)
    np.testing.assert_allclose(cap.traces["top.io.word[0]"].changes, (np.arange(1, 50) * 20 + 5) * 1e-9)
    assert cap.traces["word[7]"].changes.size == 0
    assert cap.sample_period == pytest.approx(5e-9)


def test_vcd_names_ambiguous_missing_and_wide(tmp_path: Path) -> None:
    path = tmp_path / "names.vcd"
    path.write_text("$timescale 1 ns $end\n$scope module a $end\n$var wire 1 ! s $end\n$upscope $end\n"
                    "$scope module b $end\n$var wire 1 \" s $end\n$var wire 2 # w $end\n$upscope $end\n"
                    "$enddefinitions $end\n#0\n0!\n0\"\nb00 #\n#5\n1!\n")
    with pytest.raises(UserError, match=r"'s' is ambiguous.*a\.s, b\.s"):
        read_capture(path, ["s"])
    assert read_capture(path, ["a.s"]).traces["a.s"].changes.size == 1
    with pytest.raises(UserError, match=r"no signal 'strobe' in the VCD.*signals: a\.s, b\.s, b\.w"):
        read_capture(path, ["strobe"])
    with pytest.raises(UserError, match=r"'w' is 2 bits wide.*w\[0\]"):
        read_capture(path, ["w"])
    # Optional names are left out when absent.
    assert "arm" not in read_capture(path, ["a.s"], optional=["arm"]).traces


def test_vcd_shallowest_match_wins(tmp_path: Path) -> None:
    path = tmp_path / "deep.vcd"
    path.write_text("$timescale 1 ns $end\n$scope module tb $end\n$var wire 1 ! x_pos $end\n"
                    "$scope module dut $end\n$var wire 1 \" x_pos $end\n$upscope $end\n$upscope $end\n"
                    "$enddefinitions $end\n#0\n0!\n0\"\n#5\n1!\n#6\n")
    assert read_capture(path, ["x_pos"]).traces["x_pos"].name == "tb.x_pos"


BAD_VCDS = {
    "no header end": ("$timescale 1 ns $end\n$scope module m $end\n$var wire 1 ! s $end\n", "header never ends"),
    "cut inside a change": ("$timescale 1 ns $end\n$var wire 1 ! s $end\n$enddefinitions $end\n#0\nb1 !\n"
                            "#5\nb0", "truncated VCD"),
    "cut after a time mark": ("$timescale 1 ns $end\n$var wire 1 ! s $end\n$enddefinitions $end\n#0\n0!\n#5\n1!\n#",
                              "truncated VCD"),
    "cut in a comment": ("$timescale 1 ns $end\n$comment unfinished", "header never ends"),
    "garbage": ("$timescale 1 ns $end\n$var wire 1 ! s $end\n$enddefinitions $end\n#0\n0!\n%%%\n",
                "not a valid VCD: line 6"),
    "bad keyword": ("$timescale 1 ns $end\n$bogus $end\n", "not a valid VCD"),
    "bad timescale": ("$timescale 3 ns $end\n$enddefinitions $end\n", "Invalid \\$timescale magnitude"),
    "no timescale": ("$var wire 1 ! s $end\n$enddefinitions $end\n#0\n0!\n#4\n1!\n", "no \\$timescale"),
    "time goes back": ("$timescale 1 ns $end\n$var wire 1 ! s $end\n$enddefinitions $end\n#10\n0!\n#5\n1!\n",
                       "#5 goes back from #10"),
    "undeclared id": ("$timescale 1 ns $end\n$var wire 1 ! s $end\n$enddefinitions $end\n#0\n0!\n#5\n1?\n",
                      "undeclared identifier code '\\?'"),
    "upscope too many": ("$timescale 1 ns $end\n$upscope $end\n", "\\$upscope without"),
    "single time stamp": ("$timescale 1 ns $end\n$var wire 1 ! s $end\n$enddefinitions $end\n#0\n0!\n",
                          "a single time stamp"),
    "binary": ("\x00\x01\x02\xff\xfe", "not a valid VCD"),
}


@pytest.mark.parametrize("case", sorted(BAD_VCDS))
def test_vcd_bad_input(tmp_path: Path, case: str) -> None:
    text, message = BAD_VCDS[case]
    path = tmp_path / "bad.vcd"
    path.write_bytes(text.encode("latin-1"))
    with pytest.raises(UserError, match=message) as info:
        read_capture(path, ["s"])
    assert str(path) in str(info.value)


def test_vcd_complete_file_without_final_newline_is_not_truncated(tmp_path: Path) -> None:
    path = tmp_path / "tight.vcd"
    path.write_text("$timescale 1 ns $end\n$var wire 1 ! s $end\n$enddefinitions $end\n#0\n0!\n#5\n1!")
    assert read_capture(path, ["s"]).traces["s"].changes.size == 1


# -- CSV ----------------------------------------------------------------------------------


def _csv(rows: list[str], header: str = "Time [s],strobe,x_pos,x_neg", comments: tuple[str, ...] = ()) -> str:
    return "\n".join([*comments, header, *rows]) + "\n"


def test_csv_sampled_with_time_column_in_us(tmp_path: Path) -> None:
    path = tmp_path / "cap.csv"
    rows = [f"{i * 0.5},{int(3 <= i < 6)},{int(i in (7, 8))},0" for i in range(20)]
    path.write_text(_csv(rows, header="Time (us),strobe,x_pos,x_neg", comments=("; exported by an analyzer",
                                                                                  "; 16 channels")))
    cap = read_capture(path, ["strobe", "x_pos"], optional=["arm"])
    assert cap.kind == "csv" and cap.samples == 20
    assert cap.sample_period == pytest.approx(0.5e-6)
    assert cap.sample_period_from == "CSV time column"
    np.testing.assert_allclose(cap.traces["strobe"].changes, [1.5e-6, 3.0e-6])
    np.testing.assert_allclose(cap.traces["x_pos"].changes, [3.5e-6, 4.5e-6])
    assert cap.end == pytest.approx(9.5e-6) and "arm" not in cap.traces


def test_csv_sample_column_needs_and_uses_the_rate(tmp_path: Path) -> None:
    path = tmp_path / "samples.csv"
    path.write_text(_csv([f"{i},{int(i == 4)},0,0" for i in range(10)], header="Sample,strobe,x_pos,x_neg"))
    with pytest.raises(UserError, match="counts samples; give the analyzer's sample rate"):
        read_capture(path, ["strobe"])
    cap = read_capture(path, ["strobe"], sample_rate=2e6)
    np.testing.assert_allclose(cap.traces["strobe"].changes, [2e-6, 2.5e-6])
    assert cap.sample_period == pytest.approx(0.5e-6) and cap.sample_period_from == "given"


def test_csv_change_only_export_needs_the_rate(tmp_path: Path) -> None:
    path = tmp_path / "changes.csv"
    path.write_text(_csv(["0,0,0,0", "1e-6,1,0,0", "1.5e-6,0,0,0", "4e-6,0,1,0", "9e-6,0,0,0"]))
    with pytest.raises(UserError, match="steps unevenly.*change-only export"):
        read_capture(path, ["strobe"])
    cap = read_capture(path, ["strobe", "x_pos"], sample_rate=10e6)
    np.testing.assert_allclose(cap.traces["x_pos"].changes, [4e-6, 9e-6])
    with pytest.raises(UserError, match="closer than the given sample period"):
        read_capture(path, ["strobe"], sample_rate=1e6)


def test_csv_chunks_give_the_same_result(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    rng = np.random.default_rng(7)
    levels = (rng.random((5000, 3)) < 0.3).astype(int)
    path = tmp_path / "big.csv"
    path.write_text(_csv([f"{i * 1e-7!r},{a},{b},{c}" for i, (a, b, c) in enumerate(levels)]))
    whole = read_capture(path, ["strobe", "x_pos", "x_neg"])
    monkeypatch.setattr(capture_module, "CSV_CHUNK_ROWS", 333)
    parts = read_capture(path, ["strobe", "x_pos", "x_neg"])
    for name in ("strobe", "x_pos", "x_neg"):
        np.testing.assert_array_equal(whole.traces[name].changes, parts.traces[name].changes)
        # Independent count: numpy's diff of the whole column.
        assert whole.traces[name].changes.size == np.count_nonzero(np.diff(levels[:, ["strobe", "x_pos", "x_neg"]
                                                                                   .index(name)]))


def test_csv_of_a_million_samples_is_streamed(tmp_path: Path) -> None:
    n = 1_000_000
    t = np.arange(n) * 1e-8
    strobe = ((np.arange(n) % 1000) < 50).astype(int)
    pulse = ((np.arange(n) % 1000 - 60) % 200 < 40).astype(int)
    path = tmp_path / "million.csv"
    with path.open("w") as handle:
        handle.write("Time [s],strobe,x_pos,x_neg,unused\n")
        np.savetxt(handle, np.column_stack((t, strobe, pulse, 1 - pulse, strobe)), fmt=["%.8e", "%d", "%d", "%d", "%d"],
                   delimiter=",")
    size = path.stat().st_size
    tracemalloc.start()
    cap = read_capture(path, ["strobe", "x_pos", "x_neg"])
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    assert cap.samples == n
    assert cap.traces["strobe"].changes.size == 2 * (n // 1000) - 1
    # Streamed in chunks: the peak stays a fraction of the file, not a multiple of it.
    assert peak < size / 4, (peak, size)


BAD_CSVS = {
    "truncated row": (_csv(["0,0,0,0", "1e-6,1,0,0", "2e-6,1,"]), "line 4: 3 fields, the header has 4"),
    "not a level": (_csv(["0,0,0,0", "1e-6,2,0,0"]), "line 3, column 'strobe': '2' is not a logic level"),
    "not a time": (_csv(["0,0,0,0", "soon,1,0,0"]), "line 3, column 'Time \\[s\\]': 'soon' is not a number"),
    "time goes back": (_csv(["0,0,0,0", "2e-6,1,0,0", "1e-6,1,0,0"]), "line 4: column 'Time \\[s\\]' does not "
                                                                        "increase"),
    "empty": ("", "empty CSV"),
    "only a header": (_csv([]), "0 data row"),
    "one column": ("Time\n0\n1\n", "1 column"),
    "bad unit": (_csv(["0,0,0,0", "1,0,0,0"], header="Time [h],strobe,x_pos,x_neg"), "unknown time unit 'h'"),
}


@pytest.mark.parametrize("case", sorted(BAD_CSVS))
def test_csv_bad_input(tmp_path: Path, case: str) -> None:
    text, message = BAD_CSVS[case]
    path = tmp_path / "bad.csv"
    path.write_text(text)
    with pytest.raises(UserError, match=message):
        read_capture(path, ["strobe"])


def test_csv_missing_column_names_the_columns(tmp_path: Path) -> None:
    path = tmp_path / "cap.csv"
    path.write_text(_csv(["0,0,0,0", "1e-6,1,0,0"]))
    with pytest.raises(UserError, match=r"no column 'x_poss'; did you mean 'x_pos'\? \(columns: strobe, x_pos, "
                                        r"x_neg\)"):
        read_capture(path, ["strobe", "x_poss"])
    with pytest.raises(UserError, match="no time column 'Zeit'"):
        read_capture(path, ["strobe"], time_column="Zeit")


def test_capture_file_errors(tmp_path: Path) -> None:
    with pytest.raises(UserError, match="no such file"):
        read_capture(tmp_path / "nothing.vcd", ["s"])
    with pytest.raises(UserError, match="cannot tell the format"):
        read_capture(tmp_path / "cap.bin", ["s"])
    (tmp_path / "folder.vcd").mkdir()
    with pytest.raises(UserError, match="is a folder"):
        read_capture(tmp_path / "folder.vcd", ["s"])
    (tmp_path / "x.vcd").write_text("$timescale 1 ns $end\n")
    with pytest.raises(UserError, match="a VCD has no columns"):
        read_capture(tmp_path / "x.vcd", ["s"], time_column="t")


# -- the map ------------------------------------------------------------------------------


def test_map_file_and_command_line(tmp_path: Path) -> None:
    path = tmp_path / "map.toml"
    path.write_text('[signals]\nstrobe = "D0"\nx_pos = "~D1"\nx_neg = "D2"\n\n'
                    '[capture]\nsample_rate = "100 MHz"\njitter = "2 ns"\nclock_tolerance = "50 ppm"\n')
    cmap = load_capture_map(path)
    assert cmap.sample_rate == pytest.approx(100e6) and cmap.jitter == pytest.approx(2e-9)
    assert cmap.clock_ppm == 50
    lines = cmap.resolve(["x"])
    assert lines["x_pos"] == SignalRef("D1", inverted=True)
    assert lines["arm"] == SignalRef("arm", mapped=False)
    cli = capture_map_from_args(["x_neg=D5", "strobe = D9"], sample_rate="50 MHz")
    both = cmap.merged(cli)
    assert both.resolve(["x"])["x_neg"].name == "D5" and both.resolve(["x"])["strobe"].name == "D9"
    assert both.sample_rate == pytest.approx(50e6) and both.jitter == pytest.approx(2e-9)


@pytest.mark.parametrize("text, message", [
    ('[signals]\nx_poz = "D1"\n', "signals.x_poz: no such emulator line; did you mean 'x_pos'"),
    ('[capture]\nrate = "1 MHz"\n', "unknown key 'capture.rate'; known keys here: format, time_column"),
    ('[capture]\nsample_rate = "fast"\n', "capture.sample_rate = 'fast': expected '<number> <unit>'"),
    ('[capture]\nsample_rate = "-5 MHz"\n', "capture.sample_rate = '-5 MHz': allowed: a value greater than zero"),
    ('[capture]\nclock_tolerance = "5 %"\n', "capture.clock_tolerance = '5 %': allowed: parts per million"),
    ('[signals]\nstrobe = "~"\n', "signals.strobe = '~': allowed: a signal or column name"),
    ("[signals\n", "not valid TOML"),
])
def test_map_bad_input(tmp_path: Path, text: str, message: str) -> None:
    path = tmp_path / "map.toml"
    path.write_text(text)
    with pytest.raises(UserError, match=message):
        load_capture_map(path).resolve(["x"])


def test_map_command_line_errors() -> None:
    with pytest.raises(UserError, match="--signal 'strobe': allowed: LINE=NAME"):
        capture_map_from_args(["strobe"])
    with pytest.raises(UserError, match="--sample-rate = '3 parsecs'"):
        capture_map_from_args([], sample_rate="3 parsecs")
    with pytest.raises(UserError, match="no such file"):
        load_capture_map("/nonexistent/map.toml")
    assert CaptureMap().resolve(["a", "b"])["b_neg"] == SignalRef("b_neg", mapped=False)

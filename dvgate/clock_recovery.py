"""The emulator's clock, recovered from the output edges of a capture (``docs/bench.md``).

The emulator's outputs are registered: each output edge happens at a rising edge of its
clock, so a capture sees the output edges at

    t_i = a + n_i P + u_i

with integer cycle numbers ``n_i``, the clock's period ``P`` and phase ``a`` in the
capture's own time base, and a delay ``u_i`` from the sampling of ``[-J, Ts + J]``
(``Ts`` the sample period, ``J`` the declared uncertainty of one edge). :func:`recover_clock`
finds the integers and fits the line ``a + n P`` through the edges by least squares.

Finding the integers
--------------------
The edges are taken in time order and the fit grows over the capture, the span roughly
doubling at each step. Within a step, each edge's integer is the rounding of its time
on the current line, which is right while the line predicts the edge to within half a
cycle less the sampling spread. Where a gap between edges is longer than the current
period estimate can bridge (the clock tolerance times the gap passes that budget), the
step branches into every whole number of cycles the gap might hold, and each branch is
refitted. A branch survives while at least :data:`INLIER_FRACTION` of its edges lie in one
band of width ``Ts + 2J`` (plus :data:`SLACK` of a period); wrong branches fail as soon
as a few more edges arrive, because their line drifts through the band. Among the
survivors at the end, the one with most edges in its band, then the least squared
residual, is taken.

The fit puts a weak prior on the period (the config's, with the search range
``max(3 p, 1000 ppm)`` as three standard deviations) so that a capture with too few
edges to measure the period still gets a phase; the report gives the period's
standard error, and calls the clock measured only when the edges, not the prior, fix it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np

__all__ = ["ClockGrid", "INLIER_FRACTION", "NoClock", "SEARCH_PPM_MIN", "SLACK", "recover_clock"]

#: The least share of the output edges that must sit on one clock grid.
INLIER_FRACTION = 0.9
#: Allowance beyond the sampling spread, as a fraction of the clock period: small
#: phase wander of the two oscillators over a capture, and the fit's own error.
SLACK = 0.05
#: The clock is searched within at least this many ppm of the config's (or three times
#: the declared clock tolerance, when more).
SEARCH_PPM_MIN = 1000.0
#: Most clock hypotheses carried at once while bridging gaps between edges.
MAX_HYPOTHESES = 5000
#: Extra margin on a strobe edge's time when listing the cycles it may fall in: the
#: synchronizer's own aperture around a clock edge, as a fraction of the clock period.
APERTURE = 0.01
#: Elements of one (hypotheses x edges) array, so that memory stays bounded.
_CHUNK = 1_000_000


@dataclass(frozen=True)
class ClockGrid:
    """The emulator's clock in the capture's time base.

    An output edge of cycle ``k`` is seen at ``origin + k * period`` plus a residual
    within ``window``; the clock's rising edge that begins cycle ``k`` happened at
    ``origin + k * period + d`` with ``d`` in ``offset`` (the residuals include the
    sampling delay; ``offset`` takes it back out).

    Attributes
    ----------
    origin : float
        Capture time of cycle 0 on the grid of observed edges, seconds.
    period : float
        The recovered clock period ``P``, in the capture's seconds.
    nominal : float
        The config's clock period.
    sample_period, jitter : float
        ``Ts`` and ``J`` of the capture.
    offset : tuple of float
        Range of ``d`` above.
    window : tuple of float
        Allowed ``captured - (origin + k * period)`` of an output edge of cycle ``k``.
    ppm : float
        The recovered clock against the config's: ``nominal / period - 1``, in ppm.
    ppm_error : float
        Its standard error, ppm.
    measured : bool
        True when the edges fix the period (its standard error is under half the
        prior's), False when only the phase is known and the period is the config's.
    edges, outliers : int
        Rising edges used, and those off the grid (not used for the fit).
    alternatives : int
        Other hypotheses that fitted as many edges (0 when the clock is unambiguous).
    """

    origin: float
    period: float
    nominal: float
    sample_period: float
    jitter: float
    offset: tuple[float, float]
    window: tuple[float, float]
    ppm: float
    ppm_error: float
    measured: bool
    edges: int
    outliers: int
    alternatives: int = 0

    @property
    def hz(self) -> float:
        """The recovered clock frequency, Hz of the capture's time base."""
        return 1.0 / self.period

    def edge_time(self, cycles: np.ndarray | float) -> np.ndarray:
        """Where an output edge of cycle ``k`` is expected (before the residual window)."""
        return self.origin + np.asarray(cycles, dtype=np.float64) * self.period

    def output_cycle(self, t: np.ndarray | float) -> np.ndarray:
        """The cycle of a captured output edge: the nearest grid point to its window's centre."""
        centre = (self.window[0] + self.window[1]) / 2
        return np.rint((np.asarray(t, dtype=np.float64) - self.origin - centre) / self.period).astype(np.int64)

    def on_grid(self, t: np.ndarray | float) -> np.ndarray:
        """True where a captured output edge lies in the window of its cycle."""
        t = np.asarray(t, dtype=np.float64)
        dev = t - self.edge_time(self.output_cycle(t))
        return (dev >= self.window[0]) & (dev <= self.window[1])

    def input_cycle(self, t: np.ndarray | float, observed: bool) -> np.ndarray:
        """The first cycle during which an input that changed at ``t`` shows its new level.

        The emulator samples its inputs at its clock's rising edges: an input changed
        between the edges that begin cycles ``e`` and ``e + 1`` is seen in cycle ``e``
        (``docs/timing.md``). ``observed`` times come from the capture and happened up
        to ``Ts`` before the sample that shows them (the middle is taken); others (a
        program's step, the capture's start) are exact.
        """
        t = np.asarray(t, dtype=np.float64)
        if observed:
            t = t - self.sample_period / 2
        mid = (self.offset[0] + self.offset[1]) / 2
        return np.floor((t - self.origin - mid) / self.period).astype(np.int64)

    def input_range(self, t: np.ndarray | float) -> tuple[np.ndarray, np.ndarray]:
        """Every cycle a captured input edge at ``t`` may fall in: lowest and highest.

        The edge happened in ``[t - Ts - J, t + J]``; the clock edges are known to
        ``offset``; a little more (:data:`APERTURE`) for the synchronizer's aperture.
        """
        t = np.asarray(t, dtype=np.float64)
        spare = APERTURE * self.period
        early = t - self.sample_period - self.jitter - spare
        late = t + self.jitter + spare
        lo = np.floor((early - self.origin - self.offset[1]) / self.period).astype(np.int64)
        hi = np.floor((late - self.origin - self.offset[0]) / self.period).astype(np.int64)
        return lo, np.maximum(hi, lo)

    def renumbered(self, start: float) -> ClockGrid:
        """The same grid, its cycles numbered so that the exact time ``start`` is in cycle 1."""
        mid = (self.offset[0] + self.offset[1]) / 2
        shift = math.floor((start - self.origin - mid) / self.period) - 1
        return replace(self, origin=self.origin + shift * self.period)


@dataclass(frozen=True)
class NoClock:
    """Why the clock was not recovered.

    Attributes
    ----------
    reason : str
        For the report.
    off_grid : bool
        True when the edges were enough to judge and do not sit on one clock grid near
        the config's: the clock is far off, or the edges are off its grid (a fault).
        False when the capture cannot tell (sampling too coarse, too few edges).
    """

    reason: str
    off_grid: bool = False


def _fit_rows(x: np.ndarray, n: np.ndarray, w: np.ndarray, nominal: float,
              lam: float) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Least squares of ``x`` on each row of cycle numbers ``n`` (weights ``w``), with the prior.

    Returns the centre time ``B``, the mean cycle ``nbar`` at it, the period ``P`` and
    ``sum(w (n - nbar)**2) + lam`` (the period's information, for its variance).
    """
    count = w.sum(axis=1)
    nbar = (w * n).sum(axis=1) / count
    bx = (w * x).sum(axis=1) / count
    dn = n - nbar[:, None]
    info = (w * dn * dn).sum(axis=1) + lam
    period = ((w * dn * (x - bx[:, None])).sum(axis=1) + lam * nominal) / info
    return bx, nbar, period, info


def _refine(x: np.ndarray, centre: np.ndarray, nbar: np.ndarray, period: np.ndarray, nominal: float,
            lam: float, band: float) -> dict[str, np.ndarray]:
    """Round, fit and keep the edges in one band, three times over, for every hypothesis (row)."""
    rows = centre.size
    need = max(1, math.ceil(INLIER_FRACTION * x.size))
    w = np.ones((rows, x.size))
    n = np.zeros((rows, x.size))
    info = np.zeros(rows)
    for _ in range(3):
        n = np.rint(nbar[:, None] + (x[None, :] - centre[:, None]) / period[:, None])
        centre, nbar, period, info = _fit_rows(x[None, :], n, w, nominal, lam)
        res = x[None, :] - centre[:, None] - (n - nbar[:, None]) * period[:, None]
        ordered = np.sort(res, axis=1)
        widths = ordered[:, need - 1:] - ordered[:, : x.size - need + 1]
        first = np.argmin(widths, axis=1)
        mid = (ordered[np.arange(rows), first] + ordered[np.arange(rows), first + need - 1]) / 2
        w = (np.abs(res - mid[:, None]) <= band / 2).astype(np.float64)
        w[w.sum(axis=1) == 0, 0] = 1.0  # never an empty fit
    res = x[None, :] - centre[:, None] - (n - nbar[:, None]) * period[:, None]
    inliers = w.sum(axis=1)
    spread = np.where(w > 0, res, -np.inf).max(axis=1) - np.where(w > 0, res, np.inf).min(axis=1)
    ok = (inliers >= need) & (spread <= band)
    ssr = (w * res * res).sum(axis=1)
    return {"centre": centre, "nbar": nbar, "period": period, "info": info, "ok": ok, "inliers": inliers,
            "ssr": ssr, "n": n, "w": w, "res": res}


def _step(x: np.ndarray, centre: np.ndarray, nbar: np.ndarray, period: np.ndarray, nominal: float,
          lam: float, band: float) -> dict[str, np.ndarray]:
    """:func:`_refine` in chunks of hypotheses, keeping only what the next step needs."""
    size = max(1, _CHUNK // max(1, x.size))
    parts = []
    for lo in range(0, centre.size, size):
        out = _refine(x, centre[lo:lo + size], nbar[lo:lo + size], period[lo:lo + size], nominal, lam, band)
        n = out["n"]
        key = np.stack((n[:, -1] - n[:, 0], n[:, x.size // 2] - n[:, 0]), axis=1)
        parts.append({k: out[k] for k in ("centre", "nbar", "period", "info", "ok", "inliers", "ssr")}
                     | {"key": key})
    return {k: np.concatenate([p[k] for p in parts]) for k in parts[0]}


def recover_clock(rises: np.ndarray, nominal: float, sample_period: float, jitter: float,
                  tolerance_ppm: float) -> ClockGrid | NoClock:
    """Find the emulator's clock from the captured rising edges of its outputs.

    Parameters
    ----------
    rises : ndarray of float
        Capture times of the outputs' rising edges (logical, every line), seconds.
    nominal : float
        The config's clock period, seconds.
    sample_period, jitter : float
        ``Ts`` and ``J`` of the capture, seconds.
    tolerance_ppm : float
        The declared clock tolerance; the search covers ``max(3 p, 1000 ppm)``.

    Returns
    -------
    ClockGrid or NoClock
        The grid, or why it could not be recovered.
    """
    t = np.sort(np.asarray(rises, dtype=np.float64))
    spread = sample_period + 2 * jitter
    if spread > nominal / 2 * (1 + 1e-9):
        return NoClock("the sampling spread (sample period + 2 x jitter) is more than half a clock period: an "
                       "edge's cycle cannot be told from its time")
    if t.size == 0:
        return NoClock("no output edge to recover the clock from")
    x = t - t[0]
    sigma = max(math.sqrt(sample_period ** 2 / 12 + jitter ** 2 / 3), 1e-6 * nominal)
    search = max(3 * tolerance_ppm, SEARCH_PPM_MIN) * 1e-6
    var_p0 = (search / 3 * nominal) ** 2
    lam = sigma ** 2 / var_p0
    band = spread + SLACK * nominal
    budget = max(nominal / 2 - spread / 2, SLACK * nominal)

    centre = np.zeros(1)
    nbar = np.zeros(1)
    period = np.array([nominal])
    info = np.array([lam])
    j = 1
    while j < x.size:
        end = max(2 * x[j - 1], x[j])
        jn = int(np.searchsorted(x, end, side="right"))
        far = x[jn - 1] - centre
        # The period's uncertainty carried over the step (the sampling spread is in the budget).
        sd = np.abs(far / period) * sigma / np.sqrt(info)
        reach = np.maximum(0, np.ceil((3 * sd - budget) / period)).astype(np.int64)
        if int((2 * reach + 1).sum()) > MAX_HYPOTHESES:
            return NoClock("the output edges are too few, or too far apart, to count the clock cycles between them")
        step = period ** 2 / np.maximum(far, period)
        offsets = [np.arange(-r, r + 1) for r in reach]
        rep = np.array([len(o) for o in offsets])
        centre = np.repeat(centre, rep)
        nbar = np.repeat(nbar, rep)
        period = np.repeat(period, rep) + np.concatenate(offsets) * np.repeat(step, rep)
        live = period > nominal / 2
        centre, nbar, period = centre[live], nbar[live], period[live]
        out = _step(x[:jn], centre, nbar, period, nominal, lam, band)
        keep = np.flatnonzero(out["ok"])
        if keep.size == 0:
            return NoClock(f"the output edges do not sit on one clock grid within {search * 1e6:.0f} ppm of the "
                           "config's clock", off_grid=True)
        # Hypotheses that count the same cycles are the same fit: keep one of each.
        order = keep[np.lexsort((out["ssr"][keep], -out["inliers"][keep]))]
        _, first = np.unique(out["key"][order], axis=0, return_index=True)
        keep = order[np.sort(first)]
        centre, nbar, period, info = (out[k][keep] for k in ("centre", "nbar", "period", "info"))
        inl, ssr = out["inliers"][keep], out["ssr"][keep]
        j = jn
    if x.size == 1:
        inl, ssr = np.ones(1), np.zeros(1)
    best = int(np.lexsort((ssr, -inl))[0])
    # Others that fit as many edges about as closely: the edges cannot tell them from the best.
    alike = (inl == inl[best]) & (ssr <= 2 * ssr[best] + (1e-3 * nominal) ** 2 * inl[best])
    alternatives = int(np.sum(alike)) - 1
    final = _refine(x, centre[best:best + 1], nbar[best:best + 1], period[best:best + 1], nominal, lam, band)
    w = final["w"][0] > 0
    res = final["res"][0][w]
    P = float(final["period"][0])
    used = int(w.sum())
    # The fit's own error: the empirical scatter (zero for a simulation's exact edges), never the prior.
    scatter = math.sqrt(float(np.sum(res ** 2)) / max(used - 2, 1)) if used > 2 else sigma
    dn = final["n"][0][w] - final["nbar"][0]
    info_final = float(np.sum(dn ** 2)) + lam
    var_p = scatter ** 2 / info_final
    margin = 4 * math.sqrt(scatter ** 2 / used + float(np.max(dn ** 2, initial=0.0)) * var_p) + 1e-9 * nominal
    r_lo, r_hi = float(res.min()), float(res.max())
    d_lo = r_hi - sample_period - jitter - margin
    d_hi = r_lo + jitter + margin
    offset = (min(d_lo, d_hi), max(d_lo, d_hi))
    window = (min(r_hi - spread, r_lo) - margin, max(r_lo + spread, r_hi) + margin)
    # Cycle 0 of the grid: the fit's cycle numbers count from the first edge.
    origin = t[0] + float(final["centre"][0]) - float(final["nbar"][0]) * P
    ppm_error = math.sqrt(sigma ** 2 / info_final) / P * 1e6
    grid = ClockGrid(
        origin=origin, period=P, nominal=nominal, sample_period=sample_period, jitter=jitter,
        offset=offset, window=window, ppm=(nominal / P - 1.0) * 1e6, ppm_error=ppm_error,
        measured=sigma ** 2 / info_final < var_p0 / 4 and used > 2, edges=used, outliers=int(t.size - used),
        alternatives=alternatives,
    )
    return grid

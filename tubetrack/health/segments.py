"""Change points in a station's drift series: piecewise-linear segments found with ruptures.

Model: within a segment the kV-normalised ln(filament current) is a straight line in time (slow,
steady thinning); at a change point both level and slope may change (a recalibration, a sensor
offset, an unrecorded tube swap, abrupt damage, a change of workload). The segmentation minimises
the sum of squared residuals of the segment-wise least-squares lines plus a penalty per change
point, solved exactly by PELT (Killick et al. 2012) with a cost computed in O(1) per segment from
prefix sums. :func:`pelt` is a numpy reimplementation of ``ruptures.Pelt`` (every point a candidate,
``jump=1``): the same recursion, pruning and tie-breaking, vectorised over the candidate set, so
it returns ruptures' break points (tested) at a fraction of the cost of its per-candidate Python
loop and dictionary copies. No weekly thinning of the candidates was needed.

Penalty (a BIC-like rule, documented): ``pen = c * sigma^2 * ln(n)`` with sigma the robust noise
scale of one observation (MAD of first differences / sqrt 2) and ``c = 3`` parameters per new
segment (intercept, slope, location); the Schwarz criterion in residual-sum-of-squares units.

Forecasting keeps the cumulative wear: the level shift at each change point (the difference of
the two neighbouring lines at the break) is removed from the later data, so a recalibration
moves no wear away. An upward jump that gives back most of the accumulated drop is labelled as a
possible unrecorded tube swap (reported, shift still removed: see :func:`segment_series`).

References
----------
Killick R., Fearnhead P., Eckley I.A., "Optimal detection of changepoints with a linear
computational cost", Journal of the American Statistical Association 107 (2012) 1590-1598.
Truong C., Oudre L., Vayatis N., "Selective review of offline change point detection methods",
Signal Processing 167 (2020) 107299 (the ``ruptures`` library).
Schwarz G., "Estimating the dimension of a model", Annals of Statistics 6 (1978) 461-464.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

try:  # ruptures is a hard dependency; imported lazily by callers through this module
    from ruptures.base import BaseCost
except ImportError:  # pragma: no cover
    BaseCost = object  # type: ignore[misc,assignment]


class CostPiecewiseLinear(BaseCost):  # type: ignore[misc]
    """Residual sum of squares of a least-squares line y = a + b t on a segment, O(1) per call.

    ``fit`` takes an (n, 2) array of columns (t, y).
    """

    model = "piecewise_linear"
    min_size = 3

    def fit(self, signal: np.ndarray) -> CostPiecewiseLinear:
        sig = np.asarray(signal, float)
        t, y = sig[:, 0], sig[:, 1]
        # centre for numerical stability of the prefix sums
        t = t - t.mean()
        y = y - y.mean()
        z = np.zeros(1)
        self._n = np.arange(len(t) + 1, dtype=float)
        self._st = np.concatenate([z, np.cumsum(t)])
        self._sy = np.concatenate([z, np.cumsum(y)])
        self._stt = np.concatenate([z, np.cumsum(t * t)])
        self._sty = np.concatenate([z, np.cumsum(t * y)])
        self._syy = np.concatenate([z, np.cumsum(y * y)])
        self.signal = sig
        return self

    def error(self, start: int, end: int) -> float:
        n = end - start
        st = self._st[end] - self._st[start]
        sy = self._sy[end] - self._sy[start]
        stt = self._stt[end] - self._stt[start] - st * st / n
        sty = self._sty[end] - self._sty[start] - st * sy / n
        syy = self._syy[end] - self._syy[start] - sy * sy / n
        rss = syy - (sty * sty / stt if stt > 1e-12 else 0.0)
        return float(max(rss, 0.0))

    def errors(self, starts: np.ndarray, end: int) -> np.ndarray:
        """:meth:`error` of the segments ``[s, end)`` for every ``s`` in ``starts`` at once.

        The same floating-point operations in the same order as :meth:`error`, element-wise, so
        the values are bit-identical to the scalar calls.
        """
        s = starts
        n = end - self._n[s]
        st = self._st[end] - self._st[s]
        sy = self._sy[end] - self._sy[s]
        stt = self._stt[end] - self._stt[s] - st * st / n
        sty = self._sty[end] - self._sty[s] - st * sy / n
        syy = self._syy[end] - self._syy[s] - sy * sy / n
        # x / inf = 0 where the scalar version takes 0 (stt <= 1e-12); elsewhere the same division
        fit = sty * sty / np.where(stt > 1e-12, stt, np.inf)
        return np.maximum(syy - fit, 0.0)


def pelt(cost: CostPiecewiseLinear, pen: float, min_size: int) -> list[int]:
    """Exact PELT (Killick et al. 2012) with every point a candidate, vectorised over candidates.

    Reproduces ``ruptures.Pelt(custom_cost=cost, min_size=min_size, jump=1).predict(pen)``
    (ruptures 1.1): the same recursion, candidate set, pruning rule and tie-breaking (the first,
    i.e. earliest, of equal costs), and the same floating-point sums, so the break points are
    identical; only the per-candidate Python loop and dictionary copies are gone.

    Returns
    -------
    list of int
        Sorted segment ends, the last being ``n`` (as ``ruptures`` returns them).
    """
    n = cost._n.size - 1
    min_size = max(int(min_size), CostPiecewiseLinear.min_size)
    if n < min_size:
        raise ValueError("signal shorter than min_size")
    total = np.full(n + 1, np.nan)  # total[t]: penalised cost of the best partition of [0, t)
    last = np.zeros(n + 1, dtype=np.intp)  # start of the last segment of that partition
    total[0] = 0.0
    buf = np.zeros(n + 1, dtype=np.intp)
    adm = buf[:0]
    for bkp in range(min_size, n + 1):
        new = bkp - min_size
        # ruptures drops a new candidate that has no partition (0 < t < min_size)
        if new == 0 or new >= min_size:
            k = adm.size
            buf[:k] = adm
            buf[k] = new
            adm = buf[: k + 1]
        vals = total[adm] + (cost.errors(adm, bkp) + pen)
        j = int(np.argmin(vals))
        best = vals[j]
        total[bkp] = best
        last[bkp] = adm[j]
        adm = adm[vals <= best + pen].copy()
    out = []
    e = n
    while e > 0:
        out.append(int(e))
        e = int(last[e])
    return sorted(out)


def robust_sigma(y: np.ndarray) -> float:
    """Noise scale of one observation: 1.4826 MAD(first differences) / sqrt(2)."""
    y = np.asarray(y, float)
    if y.size < 3:
        return float("nan")
    d = np.diff(y)
    return float(1.4826 * np.median(np.abs(d - np.median(d))) / np.sqrt(2.0))


def detect_breaks(
    t: np.ndarray,
    y: np.ndarray,
    penalty_c: float = 3.0,
    min_size: int = 10,
    sigma: float | None = None,
    max_points: int = 100,
) -> list[int]:
    """Indices where new segments start (exact break locations), by PELT with a BIC-like penalty.

    Parameters
    ----------
    t
        Time of each observation, sorted [days].
    y
        Observations (kV-normalised ln filament current) [1].
    penalty_c
        ``c`` in ``pen = c sigma^2 ln n`` [1].
    min_size
        Minimum number of observations per segment [count].
    sigma
        Noise scale; default :func:`robust_sigma` of ``y``.
    max_points
        Longer series are searched on block means first, then refined exactly [count].

    Returns
    -------
    list of int
        0 < index < n, ascending; empty when the series has no change point.
    """
    t = np.asarray(t, float)
    y = np.asarray(y, float)
    n = y.size
    if n < 2 * min_size + 1:
        return []
    s = robust_sigma(y) if sigma is None else float(sigma)
    if not np.isfinite(s) or s <= 0:
        s = float(np.std(y)) or 1e-6
    pen = penalty_c * s * s * np.log(n)
    if n <= max_points:
        return pelt(CostPiecewiseLinear().fit(np.column_stack([t, y])), pen, min_size)[:-1]
    # Long series: PELT on block means (a block of m points has noise sigma / sqrt(m)), then each
    # break is refined to the exact observation by a two-segment search in the full series.
    m = int(np.ceil(n / max_points))
    nb = n // m
    tb = t[: nb * m].reshape(nb, m).mean(axis=1)
    yb = y[: nb * m].reshape(nb, m).mean(axis=1)
    pen_b = penalty_c * (s * s / m) * np.log(n)
    coarse_cost = CostPiecewiseLinear().fit(np.column_stack([tb, yb]))
    coarse = [b * m for b in pelt(coarse_cost, pen_b, max(2, min_size // m))[:-1]]
    cost = CostPiecewiseLinear().fit(np.column_stack([t, y]))
    bounds = [0, *coarse, n]
    refined = []
    for k in range(1, len(bounds) - 1):
        lo = max(bounds[k - 1] + min_size, bounds[k] - 2 * m)
        hi = min(bounds[k + 1] - min_size, bounds[k] + 2 * m)
        cands = np.arange(lo, hi + 1)
        if cands.size == 0:
            refined.append(bounds[k])
            continue
        errs = [cost.error(bounds[k - 1], c) + cost.error(c, bounds[k + 1]) for c in cands]
        refined.append(int(cands[int(np.argmin(errs))]))
    # refinement may move two neighbouring coarse breaks onto one point: keep distinct ones
    out: list[int] = []
    for b in sorted(set(refined)):
        if min_size <= b <= n - min_size and (not out or b - out[-1] >= min_size):
            out.append(b)
    return out


def _line(t: np.ndarray, y: np.ndarray) -> tuple[float, float]:
    if t.size < 2 or np.ptp(t) == 0:
        return float(np.mean(y)), 0.0
    b, a = np.polyfit(t - t[0], y, 1)
    return float(a - b * t[0]), float(b)


def segment_series(
    t: np.ndarray,
    y: np.ndarray,
    penalty_c: float = 3.0,
    min_size: int = 10,
    swap_fraction: float = 0.8,
    swap_min_drop: float = 0.03,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, pd.DataFrame]:
    """Segment a series, remove the level shifts at change points, keep cumulative wear.

    Returns
    -------
    segment : ndarray of int
        Segment number of each observation (0 = first).
    fitted : ndarray
        Segment-wise least-squares line at each observation (before shift removal).
    corrected : ndarray
        ``y`` with the level shift at every break removed from the later data. A possible tube
        swap is only labelled: its shift is removed too, because a sensor offset looks the same and
        carrying the wear over errs on the safe side (earlier warnings). A swap recorded in the
        tubes table starts a new tube and needs no guessing.
    breaks : DataFrame
        index, t, jump (level shift, right line minus left line at the break), kind
        (``level_shift``, ``slope_change`` or ``possible_tube_swap``).
    """
    t = np.asarray(t, float)
    y = np.asarray(y, float)
    idx = detect_breaks(t, y, penalty_c=penalty_c, min_size=min_size)
    bounds = [0, *idx, y.size]
    segment = np.zeros(y.size, int)
    fitted = np.empty(y.size)
    lines = []
    for k in range(len(bounds) - 1):
        lo, hi = bounds[k], bounds[k + 1]
        segment[lo:hi] = k
        a, b = _line(t[lo:hi], y[lo:hi])
        lines.append((a, b))
        fitted[lo:hi] = a + b * t[lo:hi]
    corrected = y.copy()
    rows = []
    sigma = robust_sigma(y - fitted) if y.size >= 3 else np.nan
    for k, i in enumerate(idx):
        tb = 0.5 * (t[i - 1] + t[i])
        (a0, b0), (a1, b1) = lines[k], lines[k + 1]
        jump = (a1 + b1 * tb) - (a0 + b0 * tb)
        drop_so_far = float(lines[0][0] + lines[0][1] * t[0] - (a0 + b0 * tb))
        if jump > swap_min_drop and drop_so_far > swap_min_drop and jump >= swap_fraction * drop_so_far:
            kind = "possible_tube_swap"
        elif np.isfinite(sigma) and abs(jump) > 3.0 * sigma / np.sqrt(min_size):
            kind = "level_shift"
        else:
            kind = "slope_change"
        rows.append({"index": i, "t": float(t[i]), "jump": float(jump), "kind": kind})
        corrected[i:] -= jump
    breaks = pd.DataFrame(rows, columns=["index", "t", "jump", "kind"])
    return segment, fitted, corrected, breaks


def apply_breaks(
    t: np.ndarray,
    y: np.ndarray,
    break_t: list[float],
    swap_fraction: float = 0.8,
    swap_min_drop: float = 0.03,
    min_points: int = 3,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, pd.DataFrame]:
    """Segment one station's series at given break times and remove the level shifts.

    Breaks are found once per focal spot on the combined series of all its stations (a
    recalibration or sensor offset moves every station at once, and the combined series has less
    noise); each station's own shift at the break is then the difference of its two neighbouring
    least-squares lines. Segments with fewer than ``min_points`` observations on either side keep
    their data unshifted (no estimable jump).

    Returns the same four items as :func:`segment_series`.
    """
    t = np.asarray(t, float)
    y = np.asarray(y, float)
    bt = sorted(float(b) for b in break_t)
    edges = np.searchsorted(t, bt, side="left")
    bounds = [0, *[int(e) for e in edges], y.size]
    segment = np.zeros(y.size, int)
    fitted = np.empty(y.size)
    lines = []
    for k in range(len(bounds) - 1):
        lo, hi = bounds[k], bounds[k + 1]
        segment[lo:hi] = k
        if hi > lo:
            a, b = _line(t[lo:hi], y[lo:hi])
            fitted[lo:hi] = a + b * t[lo:hi]
        else:
            a, b = np.nan, np.nan
        lines.append((a, b, hi - lo))
    corrected = y.copy()
    rows = []
    start_level = lines[0][0] + lines[0][1] * t[0] if y.size and np.isfinite(lines[0][0]) else np.nan
    for k, (tb_raw, i) in enumerate(zip(bt, edges, strict=True)):
        (a0, b0, n0), (a1, b1, n1) = lines[k], lines[k + 1]
        if n0 < min_points or n1 < min_points:
            continue
        jump = (a1 + b1 * tb_raw) - (a0 + b0 * tb_raw)
        drop_so_far = float(start_level - (a0 + b0 * tb_raw))
        if jump > swap_min_drop and drop_so_far > swap_min_drop and jump >= swap_fraction * drop_so_far:
            kind = "possible_tube_swap"
        else:
            kind = "level_shift" if abs(jump) > abs(b1 - b0) * 30.0 else "slope_change"
        rows.append({"index": int(i), "t": float(tb_raw), "jump": float(jump), "kind": kind})
        corrected[i:] -= jump
    return segment, fitted, corrected, pd.DataFrame(rows, columns=["index", "t", "jump", "kind"])


def step_fit(
    t: np.ndarray, y: np.ndarray, w: np.ndarray, tb: float
) -> tuple[float, float]:
    """Level shift at ``tb`` with a common slope: y = a + b t + delta [t >= tb], weighted LS.

    A recalibration or sensor offset moves the level but not the wear rate, so both sides share
    one slope; this estimates the shift far more precisely than two free lines. The standard error
    is scaled by the residual dispersion when that exceeds one (Draper & Smith, Applied
    Regression Analysis, 3rd ed., Wiley 1998, ch. 14: indicator variables).

    Returns
    -------
    (delta, se) : tuple of float
        The shift and its standard error; NaN when either side has fewer than 3 points.
    """
    t = np.asarray(t, float)
    y = np.asarray(y, float)
    w = np.asarray(w, float)
    step = (t >= tb).astype(float)
    if step.sum() < 3 or (1 - step).sum() < 3:
        return float("nan"), float("nan")
    X = np.column_stack([np.ones_like(t), t - tb, step])
    A = X.T @ (X * w[:, None])
    try:
        cov = np.linalg.inv(A)
    except np.linalg.LinAlgError:
        return float("nan"), float("nan")
    beta = cov @ (X.T @ (w * y))
    resid = y - X @ beta
    disp = max(1.0, float(np.sum(w * resid**2) / max(t.size - 3, 1)))
    return float(beta[2]), float(np.sqrt(cov[2, 2] * disp))


def level_shifts(
    t: np.ndarray,
    y: np.ndarray,
    w: np.ndarray,
    candidates: list[tuple[float, str]],
    window_days: float = 120.0,
    z_detected: float = 3.0,
    z_calibration: float = 2.0,
) -> list[tuple[float, float, float, str]]:
    """Keep the candidate breaks whose level shift is significant on a combined series.

    Parameters
    ----------
    t, y, w
        Combined series of one focal spot (time [days], ln-current residual, weight 1/se^2).
    candidates
        (time, origin) with origin ``"detected"`` (PELT) or ``"calibration"`` (a recorded
        calibration: a known occasion for a shift, so a lower bar ``z_calibration``).
    window_days
        Half-width of the local window, also bounded by the neighbouring candidates [days].

    Returns
    -------
    list of (time, delta, se, origin)
        Significant shifts in time order.
    """
    cands = sorted(candidates)
    kept = []
    times = [c[0] for c in cands]
    for j, (tb, origin) in enumerate(cands):
        lo = max(tb - window_days, times[j - 1] if j > 0 else -np.inf)
        hi = min(tb + window_days, times[j + 1] if j + 1 < len(cands) else np.inf)
        m = (t >= lo) & (t < hi)
        delta, se = step_fit(t[m], y[m], w[m], tb)
        if not np.isfinite(delta):
            continue
        z = z_calibration if origin == "calibration" else z_detected
        if abs(delta) > z * se:
            kept.append((float(tb), delta, se, origin))
    return kept


def remove_shifts(
    t: np.ndarray,
    y: np.ndarray,
    w: np.ndarray,
    shifts: list[float],
    window_days: float = 120.0,
) -> tuple[np.ndarray, list[float]]:
    """Remove one station's own level shift at each accepted break time (common-slope fit).

    Returns the corrected series and the shift removed at each break (NaN when the station has too
    few points around it; nothing is removed there).
    """
    t = np.asarray(t, float)
    y = np.asarray(y, float).copy()
    w = np.asarray(w, float)
    out = []
    bts = sorted(shifts)
    for j, tb in enumerate(bts):
        lo = max(tb - window_days, bts[j - 1] if j > 0 else -np.inf)
        hi = min(tb + window_days, bts[j + 1] if j + 1 < len(bts) else np.inf)
        m = (t >= lo) & (t < hi)
        delta, _se = step_fit(t[m], y[m], w[m], tb)
        out.append(delta)
        if np.isfinite(delta):
            y[t >= tb] -= delta
    return y, out

"""Checks of plant-test data and of a fitted model: outliers, fit measures, residual correlations.

- Outliers: a Hampel identifier (Pearson, "Outliers in process modeling and identification",
  IEEE Trans. Control Syst. Technol. 10(1), 2002, doi:10.1109/87.974338): a sample is an
  outlier when it lies farther than ``limit`` robust standard deviations from the median of
  its window; the scale is ``1.4826`` times the median absolute deviation of the signal
  from its running median over the whole record (the factor makes it the standard
  deviation for Gaussian noise), taken over the samples that are not their own window's
  median.  A running median passes monotone edges unchanged, so steps and ramps of a plant
  test are not outliers; their deviations are exactly zero and say nothing of the noise, so
  they are not counted in the scale (counted, a test that is mostly transients had a scale
  near zero and half its clean samples called outliers).  Where a quiet response turns, its
  own moves put a sample off its window's median, so the scale is at least the window's median
  move per sample (the two moves of the sample itself left out; our choice, common practice in
  spirit: the check looks for spikes, not for the plant's own moves).
- Fit measures: the normalized root-mean-square fit ``100 (1 - |y - y_hat| / |y - mean y|)``
  in percent (Ljung, *System Identification*, 2nd ed., 1999, section 16.4) and the
  coefficient of determination ``R^2 = 1 - SS_res / SS_tot``.
- Residual checks: the normalized autocorrelation of the residuals at lags ``1 .. M`` and
  their cross-correlation with each input at lags ``0 .. M``, against the usual bound
  ``2.58 / sqrt(N)`` (99 % for white residuals independent of the input; Ljung 1999,
  section 16.6).  Samples left out of the fit count as zero residuals there.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.signal
from numpy.typing import NDArray

__all__ = [
    "Correlation",
    "find_outliers",
    "fit_measures",
    "frozen_runs",
    "moves_correlation",
    "outliers_of_fit",
    "residual_correlations",
]

Array = NDArray[np.float64]

#: Normal quantile of the two-sided 99 % bound.
Z99 = 2.576


@dataclass(frozen=True)
class Correlation:
    """A normalized correlation sequence and its confidence bound.

    Attributes
    ----------
    lags : ndarray of int, shape (L,)
    values : ndarray, shape (L,)
    bound : float
        ``2.58 / sqrt(N)``.
    outside : int
        Lags whose value lies outside ``+-bound``.
    """

    lags: NDArray[np.int64]
    values: Array
    bound: float
    outside: int


def find_outliers(y: Array, *, limit: float, window: int = 7) -> NDArray[np.bool_]:
    """Samples farther than ``limit`` robust standard deviations from their running median.

    Parameters
    ----------
    y : ndarray, shape (N,)
        ``nan`` where missing (never an outlier).
    limit : float, keyword-only
        In robust standard deviations (``6`` is a conservative choice, common practice).
    window : int, keyword-only
        Odd window of the running median, in samples.

    Returns
    -------
    ndarray of bool, shape (N,)
    """
    finite = np.isfinite(y)
    out = np.zeros(y.shape, dtype=bool)
    if finite.sum() < window:
        return out
    values = y[finite]
    half = window // 2
    windows = np.lib.stride_tricks.sliding_window_view(np.pad(values, half, mode="edge"), window)
    median = np.median(windows, axis=1)  # the running median, edges held (as mode "nearest")
    deviation = values - median
    # a sample that is its window's median (every sample of a monotone stretch) deviates by
    # exactly zero: no information on the noise, so the scale is read from the others
    informative = deviation[deviation != 0.0]
    if informative.size == 0:
        return out
    scale = 1.4826 * float(np.median(np.abs(informative - np.median(informative))))
    if scale <= 0.0:  # a flat signal with a few spikes: their size against the whole record
        scale = float(np.std(deviation))
    if scale <= 0.0:
        return out
    # where a quiet response turns, its own moves, not noise, put a sample off its window's
    # median (by a sample's move or two at a peak): the window's median move per sample, the
    # two moves into and out of the sample itself left out (a spike's own), is a floor of the
    # scale (our choice; below the noise it changes nothing, since white noise moves by about
    # 0.95 sigma a sample, and a spike on a ramp still counts past ``limit`` moves)
    moves = np.abs(np.diff(windows, axis=1))
    around = np.delete(moves, [half - 1, half], axis=1)
    if around.shape[1]:
        scale = np.maximum(scale, np.median(around, axis=1))
    out[np.nonzero(finite)[0]] = np.abs(deviation) > limit * scale
    return out


def moves_correlation(a: Array, b: Array, *, max_lag: int) -> tuple[float, int]:
    """The strongest correlation of two inputs' moves, ``b`` shifted by up to ``max_lag`` samples.

    Parameters
    ----------
    a, b : ndarray, shape (N,)
        The moves (sample-to-sample changes) of two inputs.
    max_lag : int, keyword-only
        Largest shift either way, in samples (0: at the same samples only).

    Returns
    -------
    r : float
        The normalized cross-correlation ``sum_k a~(k) b~(k + lag) / (|a~| |b~|)`` of the moves less
        their means, of largest size over the lags (at lag 0 the correlation coefficient itself);
        ``0`` when either does not move.
    lag : int
        Its lag: ``b`` moved ``lag`` samples after ``a`` (before, when negative).

    Notes
    -----
    Inputs moved together a few samples apart are as inseparable to a fit with dead times as
    inputs moved at once: a dead time longer by the shift turns one's response into the other's.
    The correlation at every lag comes from ``scipy.signal.correlate`` (by FFT for long records).
    """
    x, y = a - np.mean(a), b - np.mean(b)
    norm = float(np.sqrt(np.dot(x, x) * np.dot(y, y)))
    if not norm > 0.0:
        return 0.0, 0
    full = scipy.signal.correlate(y, x, mode="full") / norm  # index n - 1 + lag: y(k + lag) x(k)
    n = x.size
    lags = np.arange(-(n - 1), n)
    inside = np.abs(lags) <= max_lag
    best = int(np.argmax(np.abs(np.where(inside, full, 0.0))))
    return float(full[best]), int(lags[best])


def frozen_runs(y: Array, *, min_length: int) -> list[tuple[int, int]]:
    """Stretches where ``y`` reads exactly the same value ``min_length`` samples or more in a row.

    Parameters
    ----------
    y : ndarray, shape (N,)
        ``nan`` where missing (a missing sample ends a run).
    min_length : int, keyword-only

    Returns
    -------
    list of (start, stop)
        Half-open sample ranges, in order.

    Notes
    -----
    A measurement with noise never repeats itself exactly for long; a sensor that froze, or a
    historian that filled a gap with the last value it had, does.  So does a quiet plant measured
    without noise or coarsely quantized: a run is only a candidate, kept out of the fit when the
    model fitted without it does not explain it (:func:`outliers_of_fit` on its samples).
    """
    runs = []
    n = y.size
    start = 0
    for k in range(1, n + 1):
        if k < n and np.isfinite(y[k]) and y[k] == y[k - 1]:
            continue
        if k - start >= min_length and np.isfinite(y[start]):
            runs.append((start, k))
        start = k
    return runs


def outliers_of_fit(
    y: Array, fitted: Array, used: NDArray[np.bool_], candidates: NDArray[np.int64], *, limit: float
) -> NDArray[np.int64]:
    """The candidates (of :func:`find_outliers`) that the fitted model does not explain either.

    Parameters
    ----------
    y : ndarray, shape (N,)
        The output as measured, candidates' values included (``nan`` where missing).
    fitted : ndarray, shape (N,)
        The model's output, fitted without the candidates.
    used : ndarray of bool, shape (N,)
        Samples of that fit (the candidates are not among them).
    candidates : ndarray of int, shape (C,)
    limit : float, keyword-only
        In robust standard deviations, as for :func:`find_outliers`.

    Returns
    -------
    ndarray of int, shape (<= C,)
        The candidates whose residual ``y - fitted`` lies farther than ``limit`` robust standard
        deviations (1.4826 times the median absolute deviation of the residuals over ``used``) from
        the residuals' median.

    Notes
    -----
    A running median cannot tell a spike from the plant's own sharp turn (a fast response to a
    short move of its input); the fitted model can: a sample it explains as well as the others is
    no outlier.  This is the residual-based outlier test of robust regression (the Hampel identifier
    applied to the residuals of the fit instead of to the signal; common practice).  The
    scale has a floor of ``1e-9`` of the output's spread, so a fit that is exact to rounding does not
    call its own rounding an outlier.
    """
    residual = y - fitted
    r = residual[used & np.isfinite(residual)]
    if r.size == 0 or candidates.size == 0:
        return candidates.copy()
    centre = float(np.median(r))
    scale = 1.4826 * float(np.median(np.abs(r - centre)))
    present = y[np.isfinite(y)]
    scale = max(scale, 1e-9 * float(np.std(present)) if present.size else 0.0)
    off = np.abs(residual[candidates] - centre)
    kept: NDArray[np.int64] = candidates[~(off <= limit * scale)]
    return kept


def fit_measures(y: Array, fitted: Array, used: NDArray[np.bool_]) -> tuple[float, float]:
    """NRMSE fit in percent and ``R^2`` over the samples ``used``.

    Returns
    -------
    fit_percent, r_squared : float
        ``nan`` when the output does not vary over those samples.
    """
    yy, ff = y[used], fitted[used]
    error = float(np.sum((yy - ff) ** 2))
    total = float(np.sum((yy - np.mean(yy)) ** 2)) if yy.size else 0.0
    if total <= 0.0:
        return float("nan"), float("nan")
    return 100.0 * (1.0 - np.sqrt(error / total)), 1.0 - error / total


def _normalized(a: Array, b: Array, lags: NDArray[np.int64]) -> Array:
    """``sum_k a(k + lag) b(k) / sqrt(sum a^2 sum b^2)`` for each lag."""
    norm = np.sqrt(float(np.sum(a * a)) * float(np.sum(b * b)))
    n = a.size
    out = np.zeros(lags.size)
    if norm <= 0.0:
        return out
    for i, lag in enumerate(lags):
        out[i] = float(np.dot(a[lag:], b[: n - lag])) / norm
    return out


def residual_correlations(
    residuals: Array, used: NDArray[np.bool_], inputs: Array, *, lags: int
) -> tuple[Correlation, list[Correlation]]:
    """Autocorrelation of the residuals and their cross-correlation with each input.

    Parameters
    ----------
    residuals : ndarray, shape (N,)
    used : ndarray of bool, shape (N,)
        Samples of the fit; the others count as zero residuals.
    inputs : ndarray, shape (N, M)
        Input deviations (their mean is removed here).
    lags : int, keyword-only
        ``M``.

    Returns
    -------
    autocorrelation : Correlation
        Lags ``1 .. M``.
    cross : list of Correlation
        Per input, lags ``0 .. M`` (the residual ``tau`` samples after the input).
    """
    e = np.where(used, residuals, 0.0)
    e = np.where(used, e - (e[used].mean() if used.any() else 0.0), 0.0)
    count = max(int(used.sum()), 1)
    bound = Z99 / np.sqrt(count)
    auto_lags = np.arange(1, lags + 1, dtype=np.int64)
    auto = _normalized(e, e, auto_lags)
    cross_lags = np.arange(0, lags + 1, dtype=np.int64)
    cross = []
    for j in range(inputs.shape[1]):
        u = inputs[:, j] - inputs[:, j].mean()
        values = _normalized(e, u, cross_lags)
        cross.append(Correlation(cross_lags, values, bound, int(np.sum(np.abs(values) > bound))))
    return Correlation(auto_lags, auto, bound, int(np.sum(np.abs(auto) > bound))), cross

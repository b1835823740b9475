"""Nonlinear least squares fit of the pairs of one output, on the simulated response.

For output ``y`` and the columns ``u_j`` (manipulated inputs and measured disturbances, as
deviations from their operating point) the model is ::

    y_hat(k) = c + b t_k + sum_j g_j(theta_j; u_j)(k)

with ``g_j`` the exact sampled response of pair ``j``
(:func:`service.solver.identification.process_models.pair_response`), ``c`` the output's
operating point, and ``b`` a linear drift when asked.  All pairs of the output are fitted
together (the inputs of a plant test act at the same time, and may be correlated), by
``scipy.optimize.least_squares`` (trust-region reflective, bounds on every parameter) on
the residual ``y - y_hat`` over the samples used, from several starts of the dead times;
the best is kept.

Starts come from a finite impulse response fitted by linear least squares (on the output's
increments for an integrating output; one coefficient a lag for the first lags, then shared by
blocks of lags of geometrically growing width, so that its size does not grow with the record):
its step response gives the gain, the dead time
(where it first passes 10 % of its final value) and the time constant (10 % to 63 %) of
each pair, as in the classical graphical methods (Seborg, Edgar & Mellichamp, *Process
Dynamics and Control*, chapter 7).

Standard errors come from the Jacobian ``J`` at the solution: ``cov = s^2 (J'J)^-1`` with
``s^2 = |r|^2 / (N - q)`` (the usual first-order result for nonlinear least squares, e.g.
Ljung, *System Identification*, 2nd ed., 1999, section 9.3; Bates & Watts 1988), formed
from the singular value decomposition of ``J`` (no explicit inverse).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
import scipy.linalg
import scipy.optimize
from numpy.typing import NDArray
from threadpoolctl import threadpool_limits

from service.solver.identification.process_models import STRUCTURES, pair_response

__all__ = ["FIR_BLOCKS", "FIR_SINGLE", "OutputFit", "PairSpec", "fit_output", "lag_blocks", "model_output"]

Array = NDArray[np.float64]


@dataclass(frozen=True)
class PairSpec:
    """One pair to fit: the column of the data matrix and its structure."""

    column: int
    structure: str


@dataclass(frozen=True)
class OutputFit:
    """The fit of one output.

    Attributes
    ----------
    parameters : list of ndarray
        Per pair (in the order given), its parameters (see ``STRUCTURES``).
    standard_errors : list of ndarray
        Per pair, the standard error of each parameter (``inf`` when not determined).
    at_bound : list of ndarray of bool
        Per pair, the parameters that ended at a bound.
    offset, offset_error : float
        ``c``, the output's operating point, and its standard error.
    drift, drift_error : float or None
        ``b`` (output units per time unit), when asked.
    fitted : ndarray, shape (N,)
        ``y_hat`` over the whole record.
    contributions : ndarray, shape (P, N)
        Each pair's part of ``y_hat``.
    residual_std : float
        ``s``.
    samples : int
        Samples in the fit.
    starts : int
        Starts tried.
    """

    parameters: list[Array]
    standard_errors: list[Array]
    at_bound: list[NDArray[np.bool_]]
    offset: float
    offset_error: float
    drift: float | None
    drift_error: float | None
    fitted: Array
    contributions: Array
    residual_std: float
    samples: int
    starts: int


def _simulate(x: Array, u: Array, pairs: Sequence[PairSpec], sample_time: float, detrend: bool) -> tuple[Array, Array]:
    n = u.shape[0]
    parts = np.zeros((len(pairs), n))
    at = 0
    for p, pair in enumerate(pairs):
        q = len(STRUCTURES[pair.structure])
        parts[p] = pair_response(pair.structure, x[at : at + q], u[:, pair.column], sample_time=sample_time)
        at += q
    y = parts.sum(axis=0) + x[at]
    if detrend:
        y = y + x[at + 1] * sample_time * np.arange(n)
    return y, parts


def model_output(x: Array, u: Array, pairs: Sequence[PairSpec], *, sample_time: float, detrend: bool = False) -> Array:
    """``y_hat`` for the stacked parameter vector ``x`` (pairs, then offset, then drift).

    Parameters
    ----------
    x : ndarray, shape (q,)
    u : ndarray, shape (N, M)
        Column deviations from their operating point.
    pairs : sequence of PairSpec
    sample_time : float, keyword-only
    detrend : bool, keyword-only

    Returns
    -------
    ndarray, shape (N,)
    """
    return _simulate(x, u, pairs, sample_time, detrend)[0]


#: Lags of the impulse response behind the starts estimated one by one; past them, lags share
#: one coefficient in :data:`FIR_BLOCKS` blocks of geometrically growing width.
FIR_SINGLE = 32
FIR_BLOCKS = 40
#: Regressor rows formed at once (their normal equations are added up chunk by chunk).
FIR_CHUNK_NUMBERS = 1 << 21


def lag_blocks(length: int) -> NDArray[np.int64]:
    """Edges of the impulse response's blocks of lags ``1 .. length``: block ``i`` is lags
    ``edges[i] .. edges[i + 1] - 1``; one lag each up to :data:`FIR_SINGLE`, then at most
    :data:`FIR_BLOCKS` blocks growing geometrically to the last lag."""
    if length <= FIR_SINGLE + FIR_BLOCKS:
        return np.arange(1, length + 2, dtype=np.int64)
    tail = np.round(np.geomspace(FIR_SINGLE + 1, length + 1, FIR_BLOCKS + 1)).astype(np.int64)
    edges: NDArray[np.int64] = np.unique(np.concatenate((np.arange(1, FIR_SINGLE + 1, dtype=np.int64), tail)))
    return edges


def _fir_steps(y: Array, u: Array, used: NDArray[np.bool_], columns: list[int], length: int, diff: bool) -> Array:
    """Step responses (length ``length``) of each column from a least-squares impulse response.

    The impulse response has one coefficient per block of lags (:func:`lag_blocks`), its regressor
    the mean of the input over those lags (from the input's running sum), and is solved from the
    normal equations added up over chunks of rows: its memory and work grow with the samples, not
    with their square (one coefficient a lag up to a quarter of the record had taken 370 MB and
    10 s for a single pair of 8000 samples, and past the memory of the compute process beyond).
    """
    n = y.shape[0]
    target = np.diff(y, prepend=np.nan) if diff else y
    rows = used & np.isfinite(target)
    if diff:
        rows[1:] &= used[:-1]
    edges = lag_blocks(length)
    starts, stops = edges[:-1], edges[1:]
    widths = (stops - starts).astype(float)
    blocks = starts.size
    # sums[j, i] = u[0, j] + ... + u[i - 1, j]: the mean of u over lags s .. e - 1 at sample k is
    # (sums[k - s + 1] - sums[k - e + 1]) / (e - s), a sum index below zero counting as zero
    sums = np.zeros((n + 1, len(columns)))
    sums[1:] = np.cumsum(u[:, columns], axis=0)
    width = len(columns) * blocks + 1
    gram = np.zeros((width, width))
    rhs = np.zeros(width)
    index = np.nonzero(rows)[0]
    chunk = max(1, FIR_CHUNK_NUMBERS // width)
    for at in range(0, index.size, chunk):
        k = index[at : at + chunk]
        upper = np.clip(k[:, None] - starts[None, :] + 1, 0, None)
        lower = np.clip(k[:, None] - stops[None, :] + 1, 0, None)
        regressors = np.ones((k.size, width))
        for c in range(len(columns)):
            regressors[:, c * blocks : (c + 1) * blocks] = (sums[upper, c] - sums[lower, c]) / widths
        gram += regressors.T @ regressors
        rhs += regressors.T @ target[k]
    coefficients, *_ = scipy.linalg.lstsq(gram, rhs, lapack_driver="gelsy")
    per_block = coefficients[:-1].reshape(len(columns), blocks) / widths
    impulse = np.repeat(per_block, (stops - starts).astype(int), axis=1)
    steps: Array = np.cumsum(impulse, axis=1)
    return steps


def _first_passage(s: Array, level: float) -> int:
    """First 1-based sample where ``|s|`` reaches ``level``, else ``len(s)``."""
    hits = np.nonzero(np.abs(s) >= level)[0]
    return int(hits[0]) + 1 if hits.size else s.size


def _start(structure: str, step: Array, sample_time: float, max_dead_time: float, record: float) -> list[float]:
    """A parameter start of one pair from its estimated step response (of ``y`` or of its increments)."""
    tail = step[-max(1, step.size // 5) :]
    final = float(np.mean(tail))
    if final == 0.0:
        final = 1e-6
    l10 = _first_passage(step, 0.1 * abs(final))
    l63 = _first_passage(step, 0.63 * abs(final))
    tau = max((l63 - l10) * sample_time / 0.9, sample_time)
    tau = min(tau, record)
    theta = float(np.clip((l10 - 0.5) * sample_time - 0.105 * tau, 0.0, max_dead_time))
    if structure == "first_order_dead_time":
        return [final, tau, theta]
    if structure == "second_order_dead_time":
        return [final, 0.7 * tau, 0.3 * tau, theta]
    rate = final / sample_time
    l50 = _first_passage(step, 0.5 * abs(final))
    if structure == "integrating_dead_time":
        return [rate, float(np.clip((l50 - 0.5) * sample_time, 0.0, max_dead_time))]
    return [rate, tau, theta]


def _bounds(structure: str, sample_time: float, max_dead_time: float, record: float) -> tuple[list[float], list[float]]:
    lower, upper = [], []
    for name in STRUCTURES[structure]:
        if name == "gain":
            lower.append(-np.inf)
            upper.append(np.inf)
        elif name == "dead_time":
            lower.append(0.0)
            upper.append(max_dead_time)
        else:
            lower.append(0.01 * sample_time)
            upper.append(10.0 * record)
    return lower, upper


def _covariance(jac: Array, sigma2: float) -> Array:
    """``sigma2 (J'J)^-1`` from the singular value decomposition of ``J`` (pseudo-inverse past rank)."""
    _, s, vt = scipy.linalg.svd(jac, full_matrices=False)
    tol = s[0] * max(jac.shape) * np.finfo(float).eps if s.size else 0.0
    inv = np.where(s > tol, 1.0 / np.where(s > tol, s, 1.0) ** 2, np.inf)
    finite = np.isfinite(inv)
    cov: Array = (vt[finite].T * inv[finite]) @ vt[finite] * sigma2
    if not finite.all():
        undetermined = np.any(np.abs(vt[~finite]) > 1e-8, axis=0)
        cov[undetermined, :] = np.inf
        cov[:, undetermined] = np.inf
    return cov


def _best_start(
    residual: Callable[[Array], Array],
    jacobian: Callable[[Array], Array],
    base: list[float],
    dead_at: list[int],
    lo_a: Array,
    hi_a: Array,
    sample_time: float,
) -> tuple[scipy.optimize.OptimizeResult, tuple[float, ...]]:
    """Run the fit from the start and from its dead times one sample shorter and longer; keep the best."""
    best: scipy.optimize.OptimizeResult | None = None
    shifts = (0.0, -1.0, 1.0)
    for shift in shifts:
        x0 = np.array(base)
        for k in dead_at:
            x0[k] = x0[k] + shift * sample_time
        x0 = np.clip(x0, lo_a, hi_a)
        inside = np.isfinite(lo_a) & np.isfinite(hi_a)
        width = np.where(inside, hi_a - lo_a, 0.0)
        x0 = np.where(inside, np.clip(x0, lo_a + 1e-9 * width, hi_a - 1e-9 * width), x0)
        result = scipy.optimize.least_squares(
            residual,
            x0,
            jac=jacobian,
            bounds=(lo_a, hi_a),
            x_scale="jac",
            method="trf",
            xtol=1e-10,
            ftol=1e-10,
            max_nfev=200,
        )
        if best is None or result.cost < best.cost:
            best = result
    assert best is not None
    return best, shifts


def _spread(values: Array) -> float:
    """The standard deviation of ``values`` (1 when it is zero or not finite): the size a signal is fitted at."""
    # the standard deviation of the values divided by their largest size, multiplied back: the
    # squares of values near 1e-200 (or 1e200) underflow (overflow) in np.std itself
    largest = float(np.max(np.abs(values))) if values.size else 0.0
    if not (np.isfinite(largest) and largest > 0.0):
        return 1.0
    size = float(np.std(values / largest)) * largest
    return size if np.isfinite(size) and size > 0.0 else 1.0


def fit_output(
    y: Array,
    u: Array,
    pairs: Sequence[PairSpec],
    *,
    sample_time: float,
    used: NDArray[np.bool_],
    max_dead_time: float,
    settling_samples: int,
    integrating: bool = False,
    detrend: bool = False,
) -> OutputFit:
    """Fit the pairs of one output by nonlinear least squares from several dead-time starts.

    Parameters
    ----------
    y : ndarray, shape (N,)
        The output in engineering units (``nan`` where missing).
    u : ndarray, shape (N, M)
        Column deviations from their operating point (no ``nan``).
    pairs : sequence of PairSpec
        At least one pair.
    sample_time : float, keyword-only
    used : ndarray of bool, shape (N,), keyword-only
        Samples that enter the residual (missing samples, outliers and a held-out segment
        excluded by the caller).
    max_dead_time : float, keyword-only
        Upper bound of every dead time, in the time unit.
    settling_samples : int, keyword-only
        Length of the impulse response behind the starts.
    integrating : bool, keyword-only
        The output's pairs integrate (starts from the increments of ``y``).
    detrend : bool, keyword-only
        Fit a linear drift as well.

    Returns
    -------
    OutputFit

    Notes
    -----
    The fit runs on the output and each used column divided by its standard deviation over
    the fitted samples, so that the data the solver sees, and so its stopping rules and
    difference steps, are the same to rounding whatever the units (a fraction or a flow in
    kg/h); the gains, offset, drift, their standard errors, the residual size and the fitted
    series are multiplied back (a gain by ``y_scale / u_scale``), the time constants and dead
    times being free of units.  Likewise every time is fitted in samples (the sample time taken
    as 1, the model's response at the samples depending only on times divided by the sample
    time and on an integrating rate times it) and multiplied back by the sample time, so that
    the time unit (hours or a sample time of 1e-15) does not change the fit beyond rounding
    either: in the time unit, a solver whose parameters differ by 1e15 in size stopped far from
    the optimum.
    """
    time_unit = sample_time
    sample_time, max_dead_time = 1.0, min(max_dead_time / time_unit, float(np.finfo(float).max))
    n = y.shape[0]
    rows = used & np.isfinite(y)
    count = int(rows.sum())
    y_scale = _spread(y[rows])
    u_scale = np.ones(u.shape[1])
    for pair in pairs:
        u_scale[pair.column] = _spread(u[rows, pair.column])
    y, u = y / y_scale, u / u_scale[None, :]
    record = n * sample_time
    columns = [p.column for p in pairs]
    length = int(max(2, min(settling_samples, count // (2 * max(len(columns), 1)) - 1)))
    steps = _fir_steps(y, u, rows, columns, length, integrating)
    base: list[float] = []
    lower: list[float] = []
    upper: list[float] = []
    dead_at: list[int] = []
    for p, pair in enumerate(pairs):
        start = _start(pair.structure, steps[p], sample_time, max_dead_time, record)
        lo, hi = _bounds(pair.structure, sample_time, max_dead_time, record)
        dead_at.append(len(base) + STRUCTURES[pair.structure].index("dead_time"))
        base += start
        lower += lo
        upper += hi
    yv = y[rows]
    base.append(float(np.mean(yv)) if not integrating else float(yv[0]))
    lower.append(-np.inf)
    upper.append(np.inf)
    if detrend:
        base.append(0.0)
        lower.append(-np.inf)
        upper.append(np.inf)
    lo_a, hi_a = np.array(lower), np.array(upper)

    sizes = [len(STRUCTURES[pair.structure]) for pair in pairs]
    starts_at = np.concatenate(([0], np.cumsum(sizes))).astype(int)
    tk = sample_time * np.arange(n)[rows]

    def residual(x: Array) -> Array:
        out: Array = model_output(x, u, pairs, sample_time=sample_time, detrend=detrend)[rows] - yv
        return out

    def jacobian(x: Array) -> Array:
        # Forward differences, pair by pair: a pair's parameters move only its own response.
        jac = np.zeros((count, x.size))
        for p, pair in enumerate(pairs):
            a, b = int(starts_at[p]), int(starts_at[p + 1])
            column = u[:, pair.column]
            here = pair_response(pair.structure, x[a:b], column, sample_time=sample_time)[rows]
            for k in range(a, b):
                step = np.sqrt(np.finfo(float).eps) * max(abs(x[k]), sample_time if k != a else 1e-3)
                if x[k] + step > hi_a[k]:
                    step = -step
                moved = x[a:b].copy()
                moved[k - a] += step
                jac[:, k] = (pair_response(pair.structure, moved, column, sample_time=sample_time)[rows] - here) / step
        jac[:, int(starts_at[-1])] = 1.0
        if detrend:
            jac[:, int(starts_at[-1]) + 1] = tk
        return jac

    with threadpool_limits(limits=1):  # matrices of a few rows: BLAS threads only add overhead
        best, shifts = _best_start(residual, jacobian, base, dead_at, lo_a, hi_a, sample_time)
    x = best.x
    q = x.size
    sigma2 = 2.0 * float(best.cost) / max(count - q, 1)
    cov = _covariance(best.jac, sigma2)
    se = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    span = np.where(np.isfinite(hi_a - lo_a), hi_a - lo_a, 1.0)
    bound = (np.abs(x - lo_a) <= 1e-6 * span) | (np.abs(hi_a - x) <= 1e-6 * span)
    fitted, parts = _simulate(x, u, pairs, sample_time, detrend)
    # back to the data's units: a gain by y_scale / u_scale, the offset and drift by y_scale
    # and from samples to the time unit: times by the sample time, a rate (an integrating
    # pair's gain, the drift) divided by it
    units = np.ones(q)
    at = 0
    for pair in pairs:
        names = STRUCTURES[pair.structure]
        rate = 1.0 / time_unit if pair.structure.startswith("integrating") else 1.0
        units[at : at + len(names)] = time_unit
        units[at + names.index("gain")] = rate * y_scale / u_scale[pair.column]
        at += len(names)
    units[at:] = y_scale
    if detrend:
        units[at + 1] = y_scale / time_unit
    x, se = x * units, se * units
    parameters, errors, flags = [], [], []
    at = 0
    for pair in pairs:
        k = len(STRUCTURES[pair.structure])
        parameters.append(x[at : at + k].copy())
        errors.append(se[at : at + k].copy())
        flags.append(bound[at : at + k].copy())
        at += k
    return OutputFit(
        parameters=parameters,
        standard_errors=errors,
        at_bound=flags,
        offset=float(x[at]),
        offset_error=float(se[at]),
        drift=float(x[at + 1]) if detrend else None,
        drift_error=float(se[at + 1]) if detrend else None,
        fitted=fitted * y_scale,
        contributions=parts * y_scale,
        residual_std=float(np.sqrt(sigma2)) * y_scale,
        samples=count,
        starts=len(shifts),
    )

"""Figures of merit of a simulated run: per controlled output and per input.

Per controlled output ``i`` the step figures refer to that output's *last setpoint change*: the
last step ``s`` with ``r_i(s) != r_i(s-1)`` (``r_i(-1)`` is the initial setpoint), from
``r0 = r_i(s-1)`` to ``r1 = r_i(s)``.  Times count from the step instant ``t_s``, in the units
of the time axis.  With the fraction of the setpoint step covered
``phi(k) = (y_i(k) - r0) / (r1 - r0)`` for ``k >= s``:

- rise time: from the first time ``phi`` reaches 0.1 to the first time it reaches 0.9, each
  crossing placed by linear interpolation between samples (``None`` when 0.9 is never
  reached).  A first-order response ``1 - exp(-t/tau)`` rises in ``tau ln 9``.
- settling time (2 %): the time after which ``|y_i - r1| <= 0.02 |r1 - r0|`` holds to the end
  of the run, the last exit from the band placed by linear interpolation (``None`` when the
  last sample is outside the band: not settled within the run).  First order:
  ``tau ln 50``.
- overshoot: ``100 max(0, max_k phi(k) - 1)`` percent.
- integral absolute error: ``sum_k |r_i(k) - y_i(k)| h_k`` over ``k >= s`` with ``h_k`` the
  sample interval (the rectangle rule of a sampled, held signal).
- final offset: ``r_i - y_i`` at the last step (always defined).

An output whose setpoint never changes has ``step``, rise time, settling time and overshoot
``None``; its integral absolute error then covers the whole run (a disturbance-rejection
figure).  Per input: the total ``sum_k |du(k)|`` and the largest ``max_k |du(k)|`` move over
the whole run, ``du(0) = u(0) - u(-1)``.  A figure computed from non-finite values (a run that
blew up) is ``None``.  These are the conventional step-response figures of control practice
(common practice).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

__all__ = [
    "RISE_FROM",
    "RISE_TO",
    "SETTLING_BAND",
    "InputPerformance",
    "OutputPerformance",
    "Performance",
    "loop_performance",
]

RISE_FROM = 0.1
RISE_TO = 0.9
SETTLING_BAND = 0.02


@dataclass(frozen=True)
class OutputPerformance:
    """Step figures of one controlled output (see the module notes for definitions).

    Attributes
    ----------
    step : int or None
        Index of the last setpoint change of this output.
    rise_time, settling_time : float or None
        Time units of the run's time axis, counted from the step instant.
    overshoot : float or None
        Percent of the setpoint step.
    integral_absolute_error : float or None
    final_offset : float or None
        Setpoint minus output at the last step.
    """

    step: int | None
    rise_time: float | None
    settling_time: float | None
    overshoot: float | None
    integral_absolute_error: float | None
    final_offset: float | None


@dataclass(frozen=True)
class InputPerformance:
    """Move figures of one input over the whole run."""

    total_move: float | None
    largest_move: float | None


@dataclass(frozen=True)
class Performance:
    """Figures per controlled output (``outputs``, length p) and per input (length m)."""

    outputs: list[OutputPerformance]
    inputs: list[InputPerformance]


def _finite(value: float) -> float | None:
    return float(value) if np.isfinite(value) else None


def _first_crossing(t: NDArray[np.float64], phi: NDArray[np.float64], level: float) -> float | None:
    """First time ``phi`` reaches ``level``, interpolated; ``t[0]`` if it starts there."""
    hits = np.nonzero(phi >= level)[0]
    if hits.size == 0:
        return None
    j = int(hits[0])
    if j == 0:
        return float(t[0])
    frac = (level - phi[j - 1]) / (phi[j] - phi[j - 1])
    return float(t[j - 1] + frac * (t[j] - t[j - 1]))


def _settling(t: NDArray[np.float64], distance: NDArray[np.float64], band: float) -> float | None:
    """Time after which ``distance <= band`` to the end; last exit interpolated."""
    outside = np.nonzero(~(distance <= band))[0]  # NaN counts as outside
    if outside.size == 0:
        return float(t[0])
    j = int(outside[-1])
    if j == distance.size - 1:
        return None
    frac = (distance[j] - band) / (distance[j] - distance[j + 1])
    return float(t[j] + frac * (t[j + 1] - t[j]))


def _output_figures(
    t: NDArray[np.float64],
    widths: NDArray[np.float64],
    y: NDArray[np.float64],
    r: NDArray[np.float64],
    r_before: float,
) -> OutputPerformance:
    previous = np.concatenate([[r_before], r[:-1]])
    changes = np.nonzero(r != previous)[0]
    final = _finite(r[-1] - y[-1])
    if changes.size == 0:
        iae = _finite(float(np.sum(np.abs(r - y) * widths)))
        return OutputPerformance(None, None, None, None, iae, final)
    s = int(changes[-1])
    r0, r1 = float(previous[s]), float(r[s])
    tw, yw = t[s:] - t[s], y[s:]
    phi = (yw - r0) / (r1 - r0)
    iae = _finite(float(np.sum(np.abs(r[s:] - yw) * widths[s:])))
    start = _first_crossing(tw, phi, RISE_FROM)
    end = _first_crossing(tw, phi, RISE_TO)
    rise = None if start is None or end is None else end - start
    settle = _settling(tw, np.abs(yw - r1), SETTLING_BAND * abs(r1 - r0))
    overshoot = _finite(100.0 * max(0.0, float(np.max(phi)) - 1.0)) if np.all(np.isfinite(phi)) else None
    return OutputPerformance(s, rise, settle, overshoot, iae, final)


def loop_performance(
    time: ArrayLike,
    outputs: ArrayLike,
    setpoints: ArrayLike,
    inputs: ArrayLike,
    *,
    initial_input: ArrayLike,
    initial_setpoint: ArrayLike | None = None,
) -> Performance:
    """Return the figures of merit of a run (definitions in the module notes).

    Parameters
    ----------
    time : array_like, shape (K,)
        Increasing sample times.
    outputs : array_like, shape (K, p)
        True controlled outputs.
    setpoints : array_like, shape (K, p)
    inputs : array_like, shape (K, m)
        ``u(k)``.
    initial_input : array_like, shape (m,)
        ``u(-1)``, for the first move.
    initial_setpoint : array_like, shape (p,), optional
        Setpoint before step 0 (default ``setpoints[0]``: no change at step 0).

    Returns
    -------
    Performance

    Examples
    --------
    A first-order response of time constant 1 to a unit setpoint step, sampled finely,
    rises in about ``ln 9`` and settles in about ``ln 50``:

    >>> t = np.arange(20001) * 1e-3
    >>> f = loop_performance(t, 1 - np.exp(-t)[:, None], np.ones((t.size, 1)),
    ...                      np.ones((t.size, 1)), initial_input=[0.0], initial_setpoint=[0.0])
    >>> [round(f.outputs[0].rise_time, 4), round(f.outputs[0].settling_time, 4)]
    [2.1972, 3.912]
    """
    t = np.asarray(time, dtype=float).reshape(-1)
    y = np.asarray(outputs, dtype=float)
    r = np.asarray(setpoints, dtype=float)
    u = np.asarray(inputs, dtype=float)
    k, p = y.shape
    m = u.shape[1]
    assert t.shape == (k,) and r.shape == (k, p) and u.shape[0] == k, (t.shape, y.shape, r.shape, u.shape)
    u_before = np.asarray(initial_input, dtype=float).reshape(m)
    r_before = r[0] if initial_setpoint is None else np.asarray(initial_setpoint, dtype=float).reshape(p)
    steps = np.diff(t)
    widths = np.append(steps, steps[-1] if steps.size else 0.0)
    with np.errstate(all="ignore"):
        out = [_output_figures(t, widths, y[:, i], r[:, i], float(r_before[i])) for i in range(p)]
        moves = np.abs(np.diff(np.vstack([u_before, u]), axis=0))
        ins = [
            InputPerformance(_finite(float(np.sum(moves[:, j]))), _finite(float(np.max(moves[:, j])))) for j in range(m)
        ]
    return Performance(outputs=out, inputs=ins)

"""Plant-test columns put on the sample time, and missing input samples held.

Resampling onto ``t0, t0 + Ts, ...`` (``t0`` the first time stamp, up to the last one):

- manipulated inputs and measured disturbances are held signals (a controller output or a
  setpoint stays where it was put), so each instant takes the last value at or before it
  (zero-order hold);
- outputs take the linear interpolation between the samples on either side of the instant,
  and are missing there when either neighbour is missing or the two lie more than two
  sample times apart (nothing is invented across a gap).

Missing input samples (after resampling) hold the last valid value, and the first valid
value before it; the caller reports each one.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

__all__ = ["hold_missing", "resample_held", "resample_interpolated", "sample_grid"]

Array = NDArray[np.float64]


def sample_grid(time: Array, sample_time: float) -> Array:
    """Instants ``t0 + k Ts`` from the first to the last time stamp (``time`` increasing)."""
    count = int(np.floor((time[-1] - time[0]) / sample_time * (1.0 + 1e-12) + 1e-9)) + 1
    grid: Array = time[0] + sample_time * np.arange(count)
    return grid


def _same_instant(time: Array) -> float:
    """How close two instants are to count as one: a billionth of the record's span, plus the
    rounding of the time stamps themselves (a few units in the last place of the largest).

    Relative to the span and not to the stamps' size: absolute stamps (seconds since 1970, near
    1.8e9) had a tolerance of 1.8 s, and a test sampled faster than a 1 s sample time took each
    input from one stamp later, every dead time one sample too long.
    """
    span = float(time[-1] - time[0])
    return 1e-9 * span + 4.0 * float(np.finfo(float).eps) * max(abs(float(time[0])), abs(float(time[-1])))


def resample_held(time: Array, values: Array, grid: Array) -> Array:
    """Each instant of ``grid`` takes the last value at or before it (``nan`` stays ``nan``)."""
    index = np.searchsorted(time, grid + _same_instant(time), side="right") - 1
    out: Array = values[np.clip(index, 0, values.size - 1)]
    return out


def resample_interpolated(time: Array, values: Array, grid: Array, *, sample_time: float) -> Array:
    """Linear interpolation at each instant; ``nan`` across a missing neighbour or a gap over 2 Ts."""
    tolerance = _same_instant(time)
    right = np.clip(np.searchsorted(time, grid - tolerance, side="left"), 0, time.size - 1)
    left = np.clip(right - 1, 0, time.size - 1)
    exact = np.abs(time[right] - grid) <= tolerance
    tl, tr = time[left], time[right]
    span = np.where(tr > tl, tr - tl, 1.0)
    w = np.clip((grid - tl) / span, 0.0, 1.0)
    out = (1.0 - w) * values[left] + w * values[right]
    out = np.where(tr - tl > 2.0 * sample_time, np.nan, out)
    result: Array = np.where(exact, values[right], out)
    return result


def hold_missing(values: Array) -> tuple[Array, int]:
    """Fill each ``nan`` with the last valid value before it (the first valid one at the start).

    Returns
    -------
    held : ndarray, shape (N,)
    filled : int
        Samples filled.  An all-``nan`` column is returned as it is.
    """
    finite = np.isfinite(values)
    if finite.all() or not finite.any():
        return values.copy(), int((~finite).sum()) if finite.any() else 0
    index = np.where(finite, np.arange(values.size), 0)
    np.maximum.accumulate(index, out=index)
    first = int(np.argmax(finite))
    index[:first] = first
    return values[index], int((~finite).sum())

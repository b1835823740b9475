"""Zones: controlled outputs held inside a range instead of at a setpoint.

A zone output ``j`` has no setpoint weight (its entry of ``Q`` is zero, so the unconstrained
law does not act on it) and, in the move QP, the cost ::

    1/2 sum_{i = Hw..Hp} w_j dist(z_j(k+i|k), [low_j, high_j])^2

with ``dist(z, [l, h]) = max(0, z - h, l - z)``: inside the zone the output floats freely,
outside it is weighted by ``w_j`` exactly as an output of weight ``w_j`` tracking the nearest
edge of its zone would be.  With ``low_j = high_j = r_j`` the zone cost is the setpoint cost
``1/2 w_j |z_j - r_j|^2`` itself.  In the QP the distance is one non-negative slack per zone
output and penalized step, ``t_ji >= 0`` with ``low_j - t_ji <= z_j(k+i|k) <= high_j + t_ji``
(at the optimum ``t_ji`` is the distance, the epigraph form of a convex piecewise quadratic;
common practice), weighted ``1/2 w_j t_ji^2`` (:mod:`service.solver.limits.qp`).

:func:`zone_record` says, for a run, how each zone output did: whether it ended inside its
zone, the share of samples inside and the largest excursion.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

__all__ = ["ZONE_TOLERANCE", "ZoneRecord", "Zones", "make_zones", "zone_record"]

#: A sample lies inside its zone when it passes neither edge by more than this, relative to
#: ``max(1, |edge|)`` (rounding of an output that runs along an edge; common practice).
ZONE_TOLERANCE = 1e-6


@dataclass(frozen=True)
class Zones:
    """The zones of p controlled outputs.

    Attributes
    ----------
    low, high : ndarray, shape (p,)
        The zone's edges, in the units of the outputs; ``-inf``/``+inf`` where an output has
        no zone (or a zone open on that side).
    weight : ndarray, shape (p,)
        ``w_j > 0`` of each zone output (in the units of ``Q``), 0 for outputs without a zone.
    """

    low: NDArray[np.float64]
    high: NDArray[np.float64]
    weight: NDArray[np.float64]

    def __post_init__(self) -> None:
        for name in ("low", "high", "weight"):
            value = np.array(getattr(self, name), dtype=float).reshape(-1)
            value.setflags(write=False)
            object.__setattr__(self, name, value)
        assert self.low.shape == self.high.shape == self.weight.shape, (self.low.shape, self.weight.shape)
        assert np.all(self.low <= self.high), "a zone's low edge lies above its high edge"
        assert np.all(self.weight >= 0.0) and np.all(np.isfinite(self.weight))
        assert np.all(np.isfinite(self.low) | np.isfinite(self.high) | (self.weight == 0.0))

    @property
    def outputs(self) -> int:
        """``p``."""
        return int(self.weight.size)

    @property
    def zoned(self) -> NDArray[np.intp]:
        """Indices of the outputs that have a zone (positive weight and an edge)."""
        edge = np.isfinite(self.low) | np.isfinite(self.high)
        return np.flatnonzero((self.weight > 0.0) & edge)

    @property
    def any(self) -> bool:
        """Whether some output has a zone."""
        return bool(self.zoned.size)

    def scaled(self, span: ArrayLike) -> Zones:
        """The zones of the outputs divided by ``span`` (shape (p,)); weights unchanged."""
        s = np.asarray(span, dtype=float)
        return Zones(low=self.low / s, high=self.high / s, weight=self.weight)


def make_zones(
    outputs: int, *, low: ArrayLike | None = None, high: ArrayLike | None = None, weight: ArrayLike | None = None
) -> Zones:
    """Return :class:`Zones` for ``outputs`` controlled outputs; ``NaN`` (or ``None``) for no edge.

    Parameters
    ----------
    outputs : int
        ``p``.
    low, high : array_like, shape (p,), optional
        Zone edges; ``NaN`` where absent.
    weight : array_like, shape (p,), optional
        Weight outside the zone; default 1 where an output has an edge, 0 elsewhere.

    Examples
    --------
    >>> z = make_zones(2, low=[30.0, float("nan")], high=[70.0, float("nan")])
    >>> z.zoned.tolist(), z.weight.tolist()
    ([0], [1.0, 0.0])
    """
    lo = np.full(outputs, -np.inf) if low is None else np.array(low, dtype=float).reshape(outputs)
    hi = np.full(outputs, np.inf) if high is None else np.array(high, dtype=float).reshape(outputs)
    lo[np.isnan(lo)] = -np.inf
    hi[np.isnan(hi)] = np.inf
    edge = np.isfinite(lo) | np.isfinite(hi)
    if weight is None:
        w = np.where(edge, 1.0, 0.0)
    else:
        w = np.where(edge, np.array(weight, dtype=float).reshape(outputs), 0.0)
    return Zones(low=lo, high=hi, weight=w)


@dataclass(frozen=True)
class ZoneRecord:
    """How the zone outputs of a run did (one entry per zone output, in :attr:`Zones.zoned` order).

    Attributes
    ----------
    outputs : tuple of int
        The zone outputs.
    ended_inside : tuple of bool
        Whether the last sample lies inside the zone (to :data:`ZONE_TOLERANCE`).
    fraction_inside : tuple of float
        Share of the samples inside the zone.
    largest_excursion : tuple of float
        Largest distance outside the zone over the run (0 when always inside).
    first_outside : tuple of int or None
        First sample outside the zone (``None`` when never).
    """

    outputs: tuple[int, ...]
    ended_inside: tuple[bool, ...]
    fraction_inside: tuple[float, ...]
    largest_excursion: tuple[float, ...]
    first_outside: tuple[int | None, ...]


def zone_record(zones: Zones, outputs: ArrayLike, *, tolerance: float = ZONE_TOLERANCE) -> ZoneRecord:
    """Hold a run's outputs against their zones.

    Parameters
    ----------
    zones : Zones
    outputs : array_like, shape (N, p)
        The controlled outputs, in the units of the zones (finite).
    tolerance : float, optional
        Relative tolerance on the edges (default :data:`ZONE_TOLERANCE`).

    Returns
    -------
    ZoneRecord

    Examples
    --------
    >>> z = make_zones(1, low=[30.0], high=[70.0])
    >>> r = zone_record(z, [[50.0], [75.0], [69.0]])
    >>> r.ended_inside, r.fraction_inside, r.largest_excursion, r.first_outside
    ((True,), (0.6666666666666666,), (5.0,), (1,))
    """
    z = np.atleast_2d(np.asarray(outputs, dtype=float))
    ended, share, largest, first = [], [], [], []
    for j in zones.zoned.tolist():
        lo, hi = zones.low[j], zones.high[j]
        with np.errstate(invalid="ignore"):
            excess = np.maximum(np.maximum(z[:, j] - hi, lo - z[:, j]), 0.0)
        edge = np.where(z[:, j] > hi, abs(hi) if np.isfinite(hi) else 0.0, abs(lo) if np.isfinite(lo) else 0.0)
        outside = excess > tolerance * np.maximum(1.0, edge)
        ended.append(bool(z.shape[0] == 0 or not outside[-1]))
        share.append(float(np.mean(~outside)) if z.shape[0] else 1.0)
        largest.append(float(excess.max(initial=0.0)))
        hits = np.flatnonzero(outside)
        first.append(int(hits[0]) if hits.size else None)
    return ZoneRecord(
        outputs=tuple(int(j) for j in zones.zoned),
        ended_inside=tuple(ended),
        fraction_inside=tuple(share),
        largest_excursion=tuple(largest),
        first_outside=tuple(first),
    )

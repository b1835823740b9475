"""Natural sizes of a plant's signals and states, for default noise covariances free of units.

A default covariance written as a number ("1 per output") is a number in some unit: change
the output's unit and the same number means another noise, and the filter's poles move.
The defaults of :func:`service.solver.estimation.estimator.design_estimator` are written in
the sizes this module finds from the model itself, so that rescaling any input, output or
state by any factor rescales its default covariances with it, and the filter is the same.

Sizes.  With ``S(k) = C sum_{i<k} A^i B`` the unit-step responses over the first ``N = n``
samples (``N = 1`` for a static plant) and ``M_ij`` the root mean square of ``S_ij(k)`` over
``k = 1..N``, the output sizes ``y_i`` and input sizes ``u_j`` fit ``M_ij ~ y_i / u_j`` in
the least-squares sense in logarithms, over the pairs that respond at all ::

    minimize  sum_{M_ij > 0} (log M_ij - log y_i + log u_j)^2

(an equilibration of the step-response magnitudes, common practice for scaling MIMO plants).
Rescaling output ``i`` by ``t`` adds ``log t`` to row ``i`` of ``log M``, so its size grows by
``t`` and every other size stays: the fit is equivariant, up to one common factor of all
sizes (the least-squares problem fixes ``log y - log u`` only), which scales every default
covariance alike and leaves the filter's gain unchanged.  Signals whose size the caller
fixes (those with spans: the plant then is in span units, where the documented default
sizes are 1) keep size 1 and pin that factor.

The state sizes follow from the outputs they reach: ``x_k = 1 / r_k`` with ``r_k`` the root
mean square of column ``k`` of ``diag(1/y) C A^i`` over ``i = 0..N-1`` (zero, meaning no
default noise, for a state no output sees).  A state rescaled by ``d`` has its column divided
by ``d``, so its size grows by ``d``: equivariant as well.

The sizes depend on the plant alone, and cost about ``n`` products with ``A``: they are kept
per plant (:func:`service.solver.memo.plant_cache`) for the sweeps and runs that design many
filters of one plant.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from service.solver.memo import plant_cache

__all__ = ["NaturalSizes", "natural_sizes"]


@dataclass(frozen=True)
class NaturalSizes:
    """Sizes of the outputs, inputs and states (module notes), in their own units.

    Attributes
    ----------
    outputs : ndarray, shape (p,)
    inputs : ndarray, shape (m,)
    states : ndarray, shape (n,)
        Zero for a state no output sees.
    """

    outputs: NDArray[np.float64]
    inputs: NDArray[np.float64]
    states: NDArray[np.float64]


@plant_cache
def natural_sizes(
    a: NDArray[np.float64],
    b: NDArray[np.float64],
    c: NDArray[np.float64],
    *,
    fixed_outputs: ArrayLike | None = None,
    fixed_inputs: ArrayLike | None = None,
) -> NaturalSizes:
    """Return the natural sizes of a discrete plant's outputs, inputs and states.

    Parameters
    ----------
    a : ndarray, shape (n, n)
    b : ndarray, shape (n, m)
    c : ndarray, shape (p, n)
        The outputs the sizes are for (a filter's measured outputs).
    fixed_outputs, fixed_inputs : ndarray of bool, shape (p,) and (m,), optional
        Signals whose size is 1 as given (default: none fixed).

    Returns
    -------
    NaturalSizes
        Positive output and input sizes (1 for a signal that no pair reaches).
    """
    n, m, p = a.shape[0], b.shape[1], c.shape[0]
    fixed_y = np.zeros(p, dtype=bool) if fixed_outputs is None else np.asarray(fixed_outputs, dtype=bool)
    fixed_u = np.zeros(m, dtype=bool) if fixed_inputs is None else np.asarray(fixed_inputs, dtype=bool)
    steps = max(n, 1)
    total = np.zeros((p, m))
    response = np.zeros((p, m))
    power_b = b.copy()
    for _ in range(steps):
        response = response + c @ power_b
        total += response**2
        power_b = a @ power_b
    magnitude = np.sqrt(total / steps)

    free_y, free_u = np.flatnonzero(~fixed_y), np.flatnonzero(~fixed_u)
    rows, cols = np.nonzero(magnitude > 0.0)
    log_y, log_u = np.zeros(p), np.zeros(m)
    unknowns = free_y.size + free_u.size
    if rows.size and unknowns:
        where_y = {int(i): k for k, i in enumerate(free_y)}
        where_u = {int(j): free_y.size + k for k, j in enumerate(free_u)}
        design = np.zeros((rows.size, unknowns))
        target = np.log(magnitude[rows, cols])
        for r, (i, j) in enumerate(zip(rows.tolist(), cols.tolist(), strict=True)):
            if i in where_y:
                design[r, where_y[i]] = 1.0
            if j in where_u:
                design[r, where_u[j]] = -1.0
        solution = np.linalg.lstsq(design, target, rcond=None)[0]
        log_y[free_y] = solution[: free_y.size]
        log_u[free_u] = solution[free_y.size :]
        # a free signal no pair reaches keeps size 1 (lstsq leaves its unknown at 0)
    outputs, inputs = np.exp(log_y), np.exp(log_u)

    seen = np.zeros(n)
    power_c = c / outputs[:, None]
    for _ in range(steps):
        seen += np.sum(power_c**2, axis=0)
        power_c = power_c @ a
    rms = np.sqrt(seen / (steps * max(p, 1)))
    states = np.where(rms > 0.0, 1.0 / np.where(rms > 0.0, rms, 1.0), 0.0)
    return NaturalSizes(outputs=outputs, inputs=inputs, states=states)

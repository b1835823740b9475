"""Step-response models (coefficient tables from step tests) as exact discrete state-space models.

Pair ``(i, j)`` of a ``p x m`` table holds the coefficients ``s_1 .. s_N``: the change of
output ``i`` at ``1 .. N`` samples after a unit step of input ``j`` (``s_0 = 0``: nothing
reaches an output within the sample of the step), or ``None`` where the input does not act.
Past the table the response either stays at ``s_N`` (self-regulating) or keeps rising at the
last slope ``s_N - s_(N-1)`` (integrating; ``s_0 = 0`` when ``N = 1``).

Realization
-----------
With the impulse coefficients ``h_k = s_k - s_(k-1)`` the output is the convolution ::

    y_i(k) = sum_j sum_(l=1..N_ij) h_ijl u_j(k-l)                           (self-regulating)
    y_i(k) = sum_j sum_(l=1..N_ij-1) (h_ijl - g_ij) u_j(k-l) + Q_i(k)       (integrating pairs)
    Q_i(k+1) = Q_i(k) + sum_j g_ij u_j(k),     g_ij = s_N - s_(N-1)

where ``Q_i = sum_j g_ij sum_(l>=1) u_j(k-l)`` is the ramp of the row's integrating pairs,
so the taps ``h_l - g`` of an integrating pair vanish once its slope is established (a
balanced truncation then drops them).  The states are one shift register per input column,
``u_j(k-1) .. u_j(k-L_j)`` with ``L_j`` the longest history its column needs (``N`` for a
self-regulating pair, ``N-1`` for an integrating one), and one integrator per output row
with an integrating pair: a finite impulse response model in state-space form (e.g.
Maciejowski, *Predictive Control with Constraints*, 2002, section 4.1, for the step-response
form; the register is the standard realization of an FIR filter).  For a unit step of input
``j`` at ``k = 0``, ``u_j(k-l) = 1`` exactly when ``k >= l``, so ``y_i(k) = s_min(k, N)``
(plus ``g (k - N)`` for ``k > N`` when integrating): every coefficient is reproduced
exactly, up to the rounding of the sums.

The register states are ``n = sum_j L_j + (rows with an integrating pair)``; the register
part is nilpotent (all its poles at 0), so it is the stable part a balanced truncation may
reduce (:mod:`service.solver.models.reduction`).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from service.solver.models.transfer import StateRole

__all__ = ["SampledStepModel", "StepResponse", "step_response_model", "step_state_count"]


@dataclass(frozen=True)
class StepResponse:
    """One pair of a step-response table.

    Attributes
    ----------
    coefficients : ndarray, shape (N,)
        ``s_1 .. s_N``, the output's change 1 .. N samples after a unit input step, in output
        units per input unit (``N >= 1``).
    integrating : bool
        The response keeps rising at the last slope ``s_N - s_(N-1)`` after the table.
    """

    coefficients: NDArray[np.float64]
    integrating: bool = False

    def __post_init__(self) -> None:
        s = np.asarray(self.coefficients, dtype=float).reshape(-1)
        object.__setattr__(self, "coefficients", s)
        assert s.size >= 1 and np.all(np.isfinite(s)), s

    @property
    def history(self) -> int:
        """Past input samples the pair reads: ``N``, or ``N - 1`` when integrating."""
        return int(self.coefficients.size - (1 if self.integrating else 0))

    @property
    def slope(self) -> float:
        """``s_N - s_(N-1)`` (``s_0 = 0``): the ramp rate per sample of an integrating pair."""
        s = self.coefficients
        return float(s[-1] - (s[-2] if s.size > 1 else 0.0))


Grid = Sequence[Sequence[StepResponse | None]]


@dataclass(frozen=True)
class SampledStepModel:
    """``x(k+1) = A x(k) + B u(k) + Bd d(k)``, ``y(k) = C x(k)`` reproducing a step-response table.

    Attributes
    ----------
    a : ndarray, shape (n, n)
    b : ndarray, shape (n, m)
    b_disturbance : ndarray, shape (n, md), or None
    c : ndarray, shape (p, n)
    states : tuple of StateRole
        ``"input_delay"`` register states and ``"output_integrator"`` states, in order.
    """

    a: NDArray[np.float64]
    b: NDArray[np.float64]
    b_disturbance: NDArray[np.float64] | None
    c: NDArray[np.float64]
    states: tuple[StateRole, ...]

    @property
    def state_count(self) -> int:
        """``n``."""
        return int(self.a.shape[0])


def _columns(elements: Grid, disturbance_elements: Grid | None) -> list[list[StepResponse | None]]:
    """Rows over all columns: manipulated inputs first, then disturbances."""
    rows = [list(r) for r in elements]
    if disturbance_elements is not None:
        assert len(disturbance_elements) == len(rows)
        rows = [r + list(d) for r, d in zip(rows, disturbance_elements, strict=True)]
    return rows


def _histories(rows: list[list[StepResponse | None]]) -> list[int]:
    width = len(rows[0])
    return [max((el.history for r in rows if (el := r[j]) is not None), default=0) for j in range(width)]


def step_state_count(elements: Grid, *, disturbance_elements: Grid | None = None) -> int:
    """Number of states :func:`step_response_model` builds (without building it)."""
    rows = _columns(elements, disturbance_elements)
    integrators = sum(any(el is not None and el.integrating for el in r) for r in rows)
    return int(sum(_histories(rows))) + int(integrators)


def step_response_model(elements: Grid, *, disturbance_elements: Grid | None = None) -> SampledStepModel:
    """Realize a step-response table exactly as a discrete state-space model.

    Parameters
    ----------
    elements : p rows of m StepResponse or None
        The manipulated inputs' pairs; ``None`` where an input does not act.
    disturbance_elements : p rows of md StepResponse or None, keyword-only
        The measured disturbances' pairs, realized the same way (columns after the inputs).

    Returns
    -------
    SampledStepModel
        Its unit-step response from rest equals every table coefficient at every sample.

    Notes
    -----
    See the module docstring for the realization (shift registers per column, one shared
    integrator per row with an integrating pair).
    """
    rows = _columns(elements, disturbance_elements)
    p, width = len(rows), len(rows[0])
    m = len(elements[0])
    histories = _histories(rows)
    offsets = np.concatenate(([0], np.cumsum(histories))).astype(int)
    integrating_rows = [i for i, r in enumerate(rows) if any(el is not None and el.integrating for el in r)]
    n = int(offsets[-1]) + len(integrating_rows)
    a = np.zeros((n, n))
    b_all = np.zeros((n, width))
    c = np.zeros((p, n))
    roles: list[StateRole] = []
    for j, length in enumerate(histories):
        start = int(offsets[j])
        disturbance = j >= m
        for lag in range(1, length + 1):
            roles.append(StateRole("input_delay", None, j - m if disturbance else j, disturbance, lag))
        if length:
            b_all[start, j] = 1.0  # u_j(k) enters the register as u_j((k+1)-1)
            for lag in range(1, length):
                a[start + lag, start + lag - 1] = 1.0  # u_j(k-lag) moves to u_j((k+1)-(lag+1))
    integrator_of = {row: int(offsets[-1]) + q for q, row in enumerate(integrating_rows)}
    for row in integrating_rows:
        roles.append(StateRole("output_integrator", row, None, False, 0))
        a[integrator_of[row], integrator_of[row]] = 1.0
    for i, r in enumerate(rows):
        for j, el in enumerate(r):
            if el is None:
                continue
            start = int(offsets[j])
            impulse = np.diff(el.coefficients, prepend=0.0)
            taps = el.history
            if el.integrating:
                q = integrator_of[i]
                c[i, q] = 1.0
                b_all[q, j] += el.slope
                impulse = impulse - el.slope
            c[i, start : start + taps] += impulse[:taps]
    return SampledStepModel(
        a=a,
        b=b_all[:, :m],
        b_disturbance=b_all[:, m:] if disturbance_elements is not None else None,
        c=c,
        states=tuple(roles),
    )

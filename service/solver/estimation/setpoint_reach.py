"""Whether every combination of the weighted setpoints can be held at steady state.

The steady states of ``x+ = A x + B u`` are ``[x_s; u_s] = N c`` (``N`` a basis of the null
space of ``[I - A, -B]``, :mod:`service.solver.estimation.target`), and their weighted
controlled outputs are ``W Cz x_s`` (``W' W = Q``).  Every setpoint of the weighted outputs is
reachable exactly when ``W [Cz, 0] N`` has the rank of ``W`` (as many independent steady
directions as weighted outputs); otherwise the target is the ``Q``-weighted best fit, and the
outputs settle off their setpoints for most setpoint combinations (common practice: a plant
with fewer manipulated variables than controlled outputs, or a steady-state gain of lower
rank, cannot hold every output on its own setpoint).  Outputs of weight 0 (a zone, an output
only watched) take no part.

The rank is decided on balanced states (:func:`service.solver.numerics.balance_states`, as
the target's) with a relative tolerance, so a change of a state's unit changes no verdict; the
outputs and inputs are those the caller scaled (by their spans).  Without a pole at 1 the
steady states are ``x_s = (I - A)^-1 B u_s`` and the rank is that of ``W G`` (one LU
factorization, the gain the same in any state units: the large design's 200 states cost about
a millisecond); with one (an integrator, or ``I - A`` too ill-conditioned to solve) it comes
from the null space of the balanced ``[I - A, -B]``.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import scipy.linalg
from numpy.typing import NDArray

from service.solver.design.closed_loop import Diagnostic
from service.solver.design.weights import weight_matrix, weight_root
from service.solver.numerics import balance_states, in_scaled_states

__all__ = ["SetpointReach", "setpoint_reach", "setpoint_reach_warnings"]


@dataclass(frozen=True)
class SetpointReach:
    """How many independent combinations of the weighted outputs the steady states reach.

    Attributes
    ----------
    reached : int
        Rank of ``W [Cz, 0] N``: independent combinations of the weighted outputs that some
        steady state holds.
    weighted : int
        Rank of ``W``: the weighted outputs.
    """

    reached: int
    weighted: int

    @property
    def every_setpoint(self) -> bool:
        """Whether every combination of the weighted setpoints is reachable."""
        return self.reached >= self.weighted


def setpoint_reach(
    a: NDArray[np.float64], b: NDArray[np.float64], c: NDArray[np.float64], output_weight: NDArray[np.float64]
) -> SetpointReach:
    """Return the rank of the weighted steady-state outputs against the number of weighted outputs.

    Parameters
    ----------
    a : ndarray, shape (n, n)
    b : ndarray, shape (n, m)
    c : ndarray, shape (p, n)
        The model (controlled outputs), in scaled signals.
    output_weight : ndarray, shape (p, p)
        ``Q``.

    Returns
    -------
    SetpointReach
        Ranks decided as ``numpy.linalg.matrix_rank`` does (``max(shape) * eps`` of the largest
        singular value), on the balanced states.
    """
    root = weight_root(weight_matrix(output_weight, c.shape[0]))
    n = a.shape[0]
    with warnings.catch_warnings():
        warnings.simplefilter("error", scipy.linalg.LinAlgWarning)
        try:  # no pole at 1: the steady states are x_s = (I - A)^-1 B u_s, one LU with m columns
            gain = c @ scipy.linalg.solve(np.eye(n) - a, b)  # G, the same in any state units
        except (scipy.linalg.LinAlgWarning, np.linalg.LinAlgError):
            gain = None
    if gain is not None and np.all(np.isfinite(gain)):
        seen = root @ gain
    else:  # a pole at (or next to) 1, an integrator: the null space of [I - A, -B] (one SVD)
        ab, bb, cb = in_scaled_states(balance_states(a, b, c), a, b, c)  # x = D x_b, exact
        null = scipy.linalg.null_space(np.hstack([np.eye(n) - ab, -bb]))
        seen = root @ cb @ null[:n]  # W Cz N (balanced states), (p, k)
    return SetpointReach(reached=_rank(seen), weighted=_rank(root))


def setpoint_reach_warnings(reach: SetpointReach, *, inputs: int, weighted_labels: Sequence[str]) -> list[Diagnostic]:
    """``setpoints_out_of_reach`` when not every combination of the weighted setpoints can be held.

    ``weighted_labels`` names the weighted controlled outputs; ``inputs`` counts the
    manipulated variables.
    """
    if reach.every_setpoint:
        return []
    names = ", ".join(weighted_labels)
    cause = (
        f"{inputs} manipulated variable{'s' if inputs != 1 else ''} for {reach.weighted} weighted controlled outputs"
        if inputs < reach.weighted
        else "a steady-state gain of lower rank"
    )
    return [
        Diagnostic(
            "setpoints_out_of_reach",
            f"Not every set of setpoints can be held at steady state: the steady states reach only "
            f"{reach.reached} independent combination{'s' if reach.reached != 1 else ''} of the "
            f"{reach.weighted} weighted controlled outputs ({names}), with {cause}. The controller aims at "
            f"the output-weighted best fit, so for most setpoints some outputs settle off their "
            f"setpoints. Weight most the outputs that matter most, hold the others in a zone or give "
            f"them weight 0, or add a manipulated variable.",
        )
    ]


def _rank(matrix: NDArray[np.float64]) -> int:
    if matrix.size == 0:
        return 0
    sv = scipy.linalg.svdvals(matrix)
    return int(np.count_nonzero(sv > max(matrix.shape) * np.finfo(float).eps * sv.max(initial=0.0)))

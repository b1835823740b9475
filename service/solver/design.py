"""One call from plant matrices and tuning to a checked predictive controller.

``design_controller`` strings the solver together: prediction matrices, weighted Hessian,
positive-definiteness check and Cholesky factor, first-move gains, closed loop and warnings.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from service.solver.analysis import ClosedLoop, Diagnostic, closed_loop, design_warnings
from service.solver.gain import (
    FactoredHessian,
    PredictiveGain,
    factor_hessian,
    first_move_gain,
    hessian_matrix,
    weighted_moves,
)
from service.solver.prediction import Prediction, prediction_matrices
from service.solver.weights import weight_matrix, weight_root

__all__ = ["ControllerDesign", "design_controller"]


@dataclass(frozen=True)
class ControllerDesign:
    """Everything the unconstrained design produces, as arrays.

    Attributes
    ----------
    prediction : Prediction
        ``Fx``, ``Fu``, ``G``.
    output_weight : ndarray, shape (p, p)
        ``Q`` per penalized step.
    move_weight : ndarray, shape (m, m)
        ``R`` per move.
    output_root : ndarray, shape (p, p)
        ``W`` with ``W' W = Q``.
    weighted : ndarray, shape (Np*p, Hu*m)
        ``Wbar G``.
    hessian : FactoredHessian
    gain : PredictiveGain
    loop : ClosedLoop
    warnings : list of Diagnostic
    """

    prediction: Prediction
    output_weight: NDArray[np.float64]
    move_weight: NDArray[np.float64]
    output_root: NDArray[np.float64]
    weighted: NDArray[np.float64]
    hessian: FactoredHessian
    gain: PredictiveGain
    loop: ClosedLoop
    warnings: list[Diagnostic]


def design_controller(
    a: ArrayLike,
    b: ArrayLike,
    c: ArrayLike,
    *,
    output_weight: ArrayLike,
    move_weight: ArrayLike,
    prediction: int,
    control: int,
    first_penalized: int = 1,
    input_labels: Sequence[str] | None = None,
) -> ControllerDesign:
    """Design the unconstrained predictive controller of the design notes.

    Parameters
    ----------
    a : array_like, shape (n, n)
        Discrete state matrix.
    b : array_like, shape (n, m)
        Input matrix of the manipulated variables.
    c : array_like, shape (p, n)
        Controlled-output matrix.
    output_weight : array_like, shape (p,) or (p, p)
        ``Q``: a diagonal or a full symmetric positive-semidefinite matrix.
    move_weight : array_like, shape (m,) or (m, m)
        ``R``: a diagonal or a full symmetric positive-semidefinite matrix.
    prediction, control, first_penalized : int
        ``Hp``, ``Hu`` and ``Hw`` with ``1 <= Hu <= Hp`` and ``1 <= Hw <= Hp``.
    input_labels : sequence of str, optional
        Input names used in error messages.

    Returns
    -------
    ControllerDesign

    Raises
    ------
    service.errors.HessianNotPositiveDefinite
        When unpenalized moves are invisible to the outputs.

    Examples
    --------
    A scalar plant with one-step horizons; the gain follows by hand (see the tests):

    >>> d = design_controller([[0.5]], [[1.0]], [[1.0]], output_weight=[1.0],
    ...                       move_weight=[1.0], prediction=1, control=1)
    >>> round(float(d.gain.state[0, 0]), 12)
    0.25
    """
    a_ = np.asarray(a, dtype=float)
    b_ = np.asarray(b, dtype=float)
    c_ = np.asarray(c, dtype=float)
    p, m = c_.shape[0], b_.shape[1]
    q = weight_matrix(output_weight, p)
    r = weight_matrix(move_weight, m)
    pred = prediction_matrices(
        a_, b_, c_, prediction=prediction, control=control, first_penalized=first_penalized
    )
    root = weight_root(q)
    weighted = weighted_moves(pred, root)
    hessian = factor_hessian(
        hessian_matrix(weighted, r, control=control),
        weighted=weighted,
        move_weight=r,
        control=control,
        outputs=p,
        input_labels=input_labels,
    )
    gain = first_move_gain(pred, hessian, weighted, root)
    loop = closed_loop(a_, b_, gain.state, gain.previous_input)
    warnings = design_warnings(condition_number=hessian.condition_number, loop=loop)
    return ControllerDesign(
        prediction=pred,
        output_weight=q,
        move_weight=r,
        output_root=root,
        weighted=weighted,
        hessian=hessian,
        gain=gain,
        loop=loop,
        warnings=warnings,
    )

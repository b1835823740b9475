"""The unconstrained predictive controller: Hessian, its factor, optimal moves and gains.

With ``E = T - Fx x(k) - Fu u(k-1)`` the free-response error, the cost
``V = |G dU - E|^2_Q + |dU|^2_R`` is minimised by ::

    H dU* = G' Q E,        H = G' Q G + R        (Q, R block diagonal over the steps)

Only the first move is applied, so the controller is the fixed law ::

    du(k) = Kh E = Kr r - Kx x(k) - Ku u(k-1)

with ``Kh`` the first m rows of ``H^-1 G' Q``, ``Kx = Kh Fx``, ``Ku = Kh Fu`` and
``Kr = Kh (1 (x) I_p)``.  ``H`` is factored once by Cholesky (``scipy.linalg.cho_factor``);
no inverse is formed.  The normal equations of a weighted linear least-squares problem
(common practice; e.g. Golub and Van Loan, *Matrix Computations*, 4th ed., section 6.1).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal

import numpy as np
import scipy.linalg
from numpy.typing import NDArray

from service.errors import HessianNotPositiveDefinite
from service.solver.design.prediction import Prediction, block_toeplitz
from service.solver.design.spectrum import spectrum_ends
from service.solver.numerics import equilibrated_rank

__all__ = [
    "FactoredHessian",
    "PredictiveGain",
    "factor_hessian",
    "first_move_gain",
    "hessian_matrix",
    "mirror_upper",
    "optimal_moves",
    "toeplitz_hessian",
    "weighted_moves",
]


@dataclass(frozen=True)
class FactoredHessian:
    """The Hessian ``H`` (Hu*m square), its Cholesky factor and its extreme eigenvalues.

    Attributes
    ----------
    matrix : ndarray, shape (Hu*m, Hu*m)
    factor : tuple (ndarray, bool)
        ``scipy.linalg.cho_factor`` output, for ``scipy.linalg.cho_solve``.
    smallest_eigenvalue, largest_eigenvalue : float
        From :func:`service.solver.design.spectrum.spectrum_ends`.
    eigenvalue_method : {"dense", "lanczos"}
        The route that found them.
    scaled_condition_number : float
        Condition number of the Jacobi-scaled Hessian (unit diagonal,
        :func:`service.solver.numerics.jacobi_scaled`): the same in any units of the inputs,
        and the one the ``ill_conditioned_hessian`` verdict uses.  ``nan`` when not computed.
    """

    matrix: NDArray[np.float64]
    factor: tuple[NDArray[np.float64], bool]
    smallest_eigenvalue: float
    largest_eigenvalue: float
    eigenvalue_method: Literal["dense", "lanczos"] = "dense"
    scaled_condition_number: float = float("nan")

    @property
    def condition_number(self) -> float:
        """Exact 2-norm condition number ``l_max / l_min`` of the symmetric positive-definite H."""
        return self.largest_eigenvalue / self.smallest_eigenvalue

    def solve(self, rhs: NDArray[np.float64]) -> NDArray[np.float64]:
        """Return ``H^-1 rhs`` by two triangular solves."""
        result: NDArray[np.float64] = scipy.linalg.cho_solve(self.factor, rhs, check_finite=False)
        return result


@dataclass(frozen=True)
class PredictiveGain:
    """The receding-horizon first-move gain in both forms of the formulation.

    Attributes
    ----------
    horizon : ndarray, shape (m, Np*p)
        ``Kh``: ``du(k) = Kh E`` for any reference trajectory.
    state : ndarray, shape (m, n)
        ``Kx``.
    previous_input : ndarray, shape (m, m)
        ``Ku``.
    setpoint : ndarray, shape (m, p)
        ``Kr``: ``du(k) = Kr r - Kx x(k) - Ku u(k-1)`` for a constant setpoint ``r``.
    input_target : ndarray, shape (m, m), or None
        ``Kt`` of ``du(k) = Kr r + Kt u_t - Kx x(k) - Ku u(k-1)`` with input targets ``u_t``
        (:mod:`service.solver.design.input_target`); ``None`` without an input weight.
    """

    horizon: NDArray[np.float64]
    state: NDArray[np.float64]
    previous_input: NDArray[np.float64]
    setpoint: NDArray[np.float64]
    input_target: NDArray[np.float64] | None = None


def weighted_moves(prediction: Prediction, output_root: NDArray[np.float64]) -> NDArray[np.float64]:
    """Return ``Wbar G`` where ``Wbar = blockdiag(W, ..., W)`` and ``W' W = Q``.

    Parameters
    ----------
    prediction : Prediction
        Holds ``G`` of shape (Np*p, Hu*m), or fewer columns when moves are blocked.
    output_root : ndarray, shape (p, p)
        Square root ``W`` of the output weight (``service.solver.design.weights.weight_root``).

    Returns
    -------
    ndarray, shape (Np*p, Hu*m)

    Notes
    -----
    With every move free ``G`` is block Toeplitz in the step responses, so ``Wbar G`` is the
    same Toeplitz matrix in ``W S_k`` (:func:`service.solver.design.prediction.block_toeplitz`):
    one small product and one pass over the result instead of a pass over ``G`` as well.
    """
    p = output_root.shape[0]
    m = prediction.step_response.shape[2]
    if prediction.move_columns == prediction.control * m:  # every move free: G is the Toeplitz matrix in S_k
        blocks = np.einsum("ij,kjl->kil", output_root, prediction.step_response)
        return block_toeplitz(
            blocks,
            prediction=prediction.prediction,
            control=prediction.control,
            first_penalized=prediction.first_penalized,
        )
    g = prediction.moves
    if np.count_nonzero(output_root - np.diag(np.diag(output_root))) == 0:
        scale = np.tile(np.diag(output_root), g.shape[0] // p)
        return g * scale[:, None]
    stacked = g.reshape(-1, p, g.shape[1])
    result: NDArray[np.float64] = np.einsum("ij,kjl->kil", output_root, stacked).reshape(g.shape)
    return result


#: Largest size mirrored by one ``triu`` expression rather than block by block.
_MIRROR_WHOLE_UP_TO = 256


def mirror_upper(matrix: NDArray[np.float64], block: int) -> NDArray[np.float64]:
    """Copy the upper triangle of a square matrix onto its lower one, in place, and return it.

    Parameters
    ----------
    matrix : ndarray, shape (k, k)
        Only the upper triangle (diagonal included) is read; the lower one may hold anything.
    block : int
        Width of the block columns copied at a time (``m`` for a Hessian over moves).

    Returns
    -------
    ndarray, shape (k, k)
        ``matrix`` itself, now exactly symmetric: the same numbers as
        ``np.triu(matrix) + np.triu(matrix, 1).T``, without that expression's three
        temporaries of the full size (which cost more than the copy for ``k`` near 1000).
        Up to :data:`_MIRROR_WHOLE_UP_TO` rows the expression itself is used: there the
        loop's calls cost more than the temporaries.
    """
    size = matrix.shape[0]
    if size <= _MIRROR_WHOLE_UP_TO:
        matrix[...] = np.triu(matrix) + np.triu(matrix, 1).T
        return matrix
    for start in range(0, size, block):
        end = min(start + block, size)
        diagonal = matrix[start:end, start:end]
        diagonal[...] = np.triu(diagonal) + np.triu(diagonal, 1).T
        matrix[end:, start:end] = matrix[start:end, end:].T
    return matrix


def hessian_matrix(
    weighted: NDArray[np.float64], move_weight: NDArray[np.float64], *, control: int
) -> NDArray[np.float64]:
    """Return ``H = (Wbar G)'(Wbar G) + blockdiag(R, ..., R)``.

    Parameters
    ----------
    weighted : ndarray, shape (Np*p, Hu*m)
        ``Wbar G`` from :func:`weighted_moves`.
    move_weight : ndarray, shape (m, m)
        ``R``, symmetric positive semidefinite.
    control : int
        ``Hu``.

    Returns
    -------
    ndarray, shape (Hu*m, Hu*m)
        Symmetric (exactly: the lower triangle is mirrored).
    """
    m = move_weight.shape[0]
    h = weighted.T @ weighted
    for j in range(control):
        h[j * m : (j + 1) * m, j * m : (j + 1) * m] += move_weight
    return mirror_upper(h, m)


def toeplitz_hessian(
    prediction: Prediction,
    weighted: NDArray[np.float64],
    output_root: NDArray[np.float64],
    move_weight: NDArray[np.float64],
) -> NDArray[np.float64]:
    """Return the same ``H`` as :func:`hessian_matrix`, from the block-Toeplitz structure of ``G``.

    Parameters
    ----------
    prediction : Prediction
        Unblocked (``G_ij = S_(i-j)`` for every move step).
    weighted : ndarray, shape (Np*p, Hu*m)
        ``Wbar G`` from :func:`weighted_moves`.
    output_root : ndarray, shape (p, p)
        ``W`` with ``W' W = Q``.
    move_weight : ndarray, shape (m, m)

    Returns
    -------
    ndarray, shape (Hu*m, Hu*m)
        Symmetric (the lower triangle is mirrored).

    Notes
    -----
    With ``V_k = W S_k`` (zero for ``k <= 0``), block ``(j, k)`` of ``G' Q G`` is
    ``sum_{i=Hw}^{Hp} V_(i-j)' V_(i-k)``; shifting both indices by one moves the sum's
    window, so ::

        H0(j+1, k+1) = H0(j, k) + V_(Hw-1-j)' V_(Hw-1-k) - V_(Hp-j)' V_(Hp-k)

    Block row 0 costs one thin product ``(Wbar G)[:, :m]' (Wbar G)``, the two corrections are
    the Gram matrices of ``Hu`` step-response blocks each, and the rest is a running sum
    down each block diagonal: about ``Np p (Hu m) m`` operations instead of
    ``Np p (Hu m)^2`` for the dense product.
    """
    hp, hu, hw = prediction.prediction, prediction.control, prediction.first_penalized
    m = move_weight.shape[0]
    steps = prediction.step_response  # (Hp+1, p, m), S_0 = 0

    def blocks(first: int) -> NDArray[np.float64]:
        """[V_first, V_(first-1), ..., V_(first-Hu+1)] as a p x Hu*m matrix (V_k = 0 for k <= 0)."""
        index = first - np.arange(hu)
        stacked = np.where((index > 0)[:, None, None], steps[np.clip(index, 0, hp)], 0.0)
        result: NDArray[np.float64] = np.einsum("ij,kjl->ikl", output_root, stacked).reshape(
            output_root.shape[0], hu * m
        )
        return result

    early, late = blocks(hw - 1), blocks(hp)
    step = early.T @ early - late.T @ late  # increments H0(j+1, k+1) - H0(j, k)
    h = np.empty((hu * m, hu * m))
    h[:m] = weighted[:, :m].T @ weighted
    for j in range(1, hu):
        rows, prev = slice(j * m, (j + 1) * m), slice((j - 1) * m, j * m)
        h[rows, j * m :] = h[prev, (j - 1) * m : -m] + step[prev, (j - 1) * m : -m]
    for j in range(hu):
        h[j * m : (j + 1) * m, j * m : (j + 1) * m] += move_weight
    return mirror_upper(h, m)


def _unseen_free_moves(
    weighted: NDArray[np.float64], move_weight: NDArray[np.float64], control: int
) -> tuple[list[int], int, int]:
    """Inputs with an unpenalized move direction, and the rank G shows over those directions.

    Judged in the units where every input's first move has the same size in ``H``: a move
    weight counts as zero when it is at rounding level next to what the outputs see of that
    input (``eps * m`` relative to the diagonal of ``G' Q G + R``), and the rank of ``G``
    over the free directions is counted on its equilibrated form.
    """
    m = move_weight.shape[0]
    seen_first = np.einsum("ij,ij->j", weighted[:, :m], weighted[:, :m])  # diag of G'QG, first move
    scale = np.sqrt(np.maximum(seen_first + np.diag(move_weight), np.finfo(float).tiny))
    unit = move_weight / scale[:, None] / scale[None, :]
    values, vectors = np.linalg.eigh(unit)
    free = vectors[:, values <= max(values.max(initial=0.0), 1.0) * m * np.finfo(float).eps]
    if free.shape[1] == 0:
        return [], 0, 0
    free = free / scale[:, None]  # back to the request's units
    inputs = sorted({int(i) for i in np.nonzero(np.abs(free * scale[:, None]).max(axis=1) > 1e-12)[0]})
    directions = np.kron(np.eye(control), free)  # free move directions over the horizon
    seen = weighted @ directions
    rank = equilibrated_rank(seen, seen.shape[1] * np.finfo(float).eps)[0] if seen.size else 0
    return inputs, rank, directions.shape[1]


def factor_hessian(
    hessian: NDArray[np.float64],
    *,
    weighted: NDArray[np.float64],
    move_weight: NDArray[np.float64],
    control: int,
    outputs: int | None = None,
    input_labels: Sequence[str] | None = None,
) -> FactoredHessian:
    """Check that ``H`` is positive definite, then factor it by Cholesky.

    Parameters
    ----------
    hessian : ndarray, shape (Hu*m, Hu*m)
    weighted : ndarray, shape (Np*p, Hu*m)
        ``Wbar G``, used only to explain a failure.
    move_weight : ndarray, shape (m, m)
    control : int
        ``Hu``.
    outputs : int, optional
        Number of controlled outputs ``p``, to explain a failure with more inputs than outputs.
    input_labels : sequence of str, optional
        Names of the m inputs for the error message (default ``u1 .. um``).

    Returns
    -------
    FactoredHessian

    Raises
    ------
    HessianNotPositiveDefinite
        When Cholesky fails, or the smallest eigenvalue of the Jacobi-scaled Hessian
        (:func:`service.solver.numerics.jacobi_scaled`, unit diagonal) is not above
        ``size * eps * l_max`` of it (the rank tolerance of ``numpy.linalg.matrix_rank``):
        a verdict that does not depend on the units of the inputs.  ``H`` is singular exactly when
        a move direction has zero move weight and ``G`` maps it to zero, i.e. ``G`` lacks full
        column rank over the unpenalized moves.
    """
    factor: tuple[NDArray[np.float64], bool] | None
    try:
        factor = scipy.linalg.cho_factor(hessian, lower=True, check_finite=False)
    except np.linalg.LinAlgError:
        factor = None
    scaled_condition = float("inf")
    if factor is not None:
        ends = spectrum_ends(hessian, factor=factor)
        low, high = ends.low, ends.high
        # The scaled Hessian D^-1/2 H D^-1/2 has the Cholesky factor D^-1/2 L: its ends come
        # by the same route from H's own factor, without forming either.
        scaled_ends = spectrum_ends(hessian, factor=factor, scaled=True)
        s_low, s_high = scaled_ends.low, scaled_ends.high
        if s_low <= hessian.shape[0] * np.finfo(float).eps * max(abs(s_high), np.finfo(float).tiny):
            factor = None
        else:
            scaled_condition = s_high / s_low
            if low <= hessian.shape[0] * np.finfo(float).eps * abs(high):
                # badly scaled units: the eigenvalue solver cannot resolve l_min next to l_max,
                # but the factor can: l_min = 1 / ||L^-1||^2 (largest singular value, accurate)
                assert factor is not None
                inverse = scipy.linalg.solve_triangular(factor[0], np.eye(hessian.shape[0]), lower=True)
                low = 1.0 / float(np.linalg.norm(inverse, 2)) ** 2
    if factor is None:
        eigenvalues = scipy.linalg.eigvalsh(hessian, check_finite=False)  # for the message only
        m = move_weight.shape[0]
        labels = list(input_labels) if input_labels else [f"u{j + 1}" for j in range(m)]
        inputs, rank, count = _unseen_free_moves(weighted, move_weight, control)
        # free moves explain a singular Hessian only when the outputs do not see them all; with
        # full rank there (move weights at rounding level next to G'QG, as when an open-loop
        # unstable plant's predictions grow over a long horizon) the cause is the size of G'QG
        if inputs and rank < count:
            names = ", ".join(labels[j] for j in inputs)
            why = (
                f" With {m} inputs and only {outputs} controlled output(s), some combinations "
                f"of moves leave every output unchanged."
                if outputs is not None and m > outputs
                else ""
            )
            if np.any(move_weight[np.ix_(inputs, inputs)]):
                # weights were given, but below the rounding of what the outputs see of these
                # inputs (gains of 1e10 moved together, say): in effect none
                penalty = (
                    f"carry move weights at rounding level next to what the outputs see of them "
                    f"(the Hessian's diagonal reaches {float(np.diag(hessian).max()):.3g}), in effect "
                    f"no move penalty"
                )
                fix = "Raise these inputs' move weights to a size next to that diagonal"
            else:
                penalty = "carry no move penalty"
                fix = "Give these inputs a positive move weight"
            detail = (
                f"The Hessian G'QG + R is not positive definite (smallest eigenvalue "
                f"{eigenvalues[0]:.3g}): the moves of {names} {penalty}, and the "
                f"outputs cannot see all of them (the step-response matrix has rank {rank} over "
                f"those {count} move directions; zero move weight needs full column rank "
                f"there).{why} {fix}, or remove inputs that act in the same direction."
            )
        else:
            detail = (
                f"The Hessian G'QG + R is not numerically positive definite (eigenvalues from "
                f"{eigenvalues[0]:.3g} to {eigenvalues[-1]:.3g}): next to what the outputs see of the "
                f"moves over the prediction horizon (the Hessian's diagonal reaches "
                f"{float(np.diag(hessian).max()):.3g}) the move weights are at rounding level. An open-loop unstable plant's predictions grow "
                f"over a long horizon: shorten the prediction horizon; otherwise raise the move weights."
            )
        raise HessianNotPositiveDefinite(detail, field=("weights", "move"))
    return FactoredHessian(
        matrix=hessian,
        factor=factor,
        smallest_eigenvalue=low,
        largest_eigenvalue=high,
        eigenvalue_method=ends.method,
        scaled_condition_number=scaled_condition,
    )


def first_move_gain(
    prediction: Prediction,
    hessian: FactoredHessian,
    weighted: NDArray[np.float64],
    output_root: NDArray[np.float64],
) -> PredictiveGain:
    """Return ``Kh`` (first m rows of ``H^-1 G' Q``) and ``Kx``, ``Ku``, ``Kr``.

    Parameters
    ----------
    prediction : Prediction
    hessian : FactoredHessian
    weighted : ndarray, shape (Np*p, Hu*m)
        ``Wbar G``.
    output_root : ndarray, shape (p, p)
        ``W`` with ``W' W = Q``.

    Returns
    -------
    PredictiveGain

    Notes
    -----
    ``H^-1`` is symmetric, so the first m rows of ``H^-1 G' Q`` are ``Y' G' Q`` with
    ``Y = H^-1 [I_m; 0]``: m pairs of triangular solves instead of Np*p.  Then
    ``G' Q = (Wbar G)' Wbar``.
    """
    m = prediction.free_input.shape[1]
    p = output_root.shape[0]
    selector = np.zeros((hessian.matrix.shape[0], m))
    selector[:m, :m] = np.eye(m)
    y = hessian.solve(selector)  # (Hu*m, m)
    seen = (weighted @ y).reshape(-1, p, m)  # blocks of Wbar G Y
    kh = np.einsum("ji,kjl->lki", output_root, seen).reshape(m, -1)  # (Wbar' Wbar G Y)'
    kx = kh @ prediction.free_state
    ku = kh @ prediction.free_input
    kr = kh.reshape(m, -1, p).sum(axis=1)
    return PredictiveGain(horizon=kh, state=kx, previous_input=ku, setpoint=kr)


def optimal_moves(
    hessian: FactoredHessian,
    weighted: NDArray[np.float64],
    output_root: NDArray[np.float64],
    error: NDArray[np.float64],
) -> NDArray[np.float64]:
    """Return the whole optimal move sequence ``dU* = H^-1 G' Q E``.

    Parameters
    ----------
    hessian : FactoredHessian
    weighted : ndarray, shape (Np*p, Hu*m)
    output_root : ndarray, shape (p, p)
    error : ndarray, shape (Np*p,)
        Free-response error ``E = T - Fx x(k) - Fu u(k-1)``.

    Returns
    -------
    ndarray, shape (Hu*m,)
        Moves ``[du(k); du(k+1); ...; du(k+Hu-1)]``.
    """
    p = output_root.shape[0]
    scaled = (error.reshape(-1, p) @ output_root.T).reshape(-1)  # Wbar E
    return hessian.solve(weighted.T @ scaled)

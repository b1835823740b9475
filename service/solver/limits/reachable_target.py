"""The steady-state target under input limits: the nearest reachable steady state.

When the setpoint asks for an input beyond its limits, no steady state inside the limits puts
the controlled outputs on the setpoint.  A controller that keeps chasing the setpoint then
pushes against the limit for ever (windup).  The remedy is to hand it the steady state it can
reach: with ``[x_s; u_s] = P0 d + N c`` the steady states of :mod:`service.solver.estimation.target`
(``N`` an orthonormal null-space basis of ``[I - A, -B]``), ::

    minimize   |W (Cz x_s + Dz d - r)|^2                  (W'W = Q, the output weight)
    subject to input_min <= u_s <= input_max

and among the minimizers the one of least norm ``|[x_s; u_s]|`` (the unconstrained target's
own tie-break, so both agree whenever the limits are not in the way).  The two objectives are
taken in order (a lexicographic target calculation, common practice):

1. the fit, a small QP in ``c`` whose Hessian ``(W F N)'(W F N)`` is singular when the weighted
   outputs do not see every steady-state direction (more inputs than outputs, a zero weight);
   DAQP solves it with its proximal-point iterations, which converge to an exact minimizer
   of a positive-semidefinite QP;
2. the least norm ``|c|`` on the set where the fit is optimal: ``V1' c = V1' c1``, with ``V1``
   the right singular vectors of ``W F N`` of nonzero singular value (``W F N c`` is unique at
   the optimum because the fit is strictly convex in ``W F N c``).  Skipped when there is no
   such freedom.

With an input weight ``S`` (the target problem's, ``weights.input``) a stage comes between
the two: the inputs nearest their targets, ``min |V (u_s - u_t)|^2`` (``V'V = S``) on the set
where the fit is optimal, again a positive-semidefinite QP with the fit's level as equality
rows; the least norm then holds both levels (the rows of an orthonormal basis of the row space
of ``[V1'; V J N]``, ``J`` picking ``u_s``).  Input targets so act in the spare directions only.

Units.  The fit and the input stage are solved with the inputs in units of moderate size,
``u = T v`` with ``T`` the powers of two of :func:`service.solver.estimation.target.input_scales`
(``N`` and ``P0`` then of ``[I - A, -B T]``, ``V T`` for ``V``, the limits and ``u_t`` divided
by ``T``): the change of variables is exact, and a change of an input's unit no longer changes
the target (in the request's units an input in units 1e9 times smaller had made the QPs stop at
their iteration limit or put the target off by more than its size).  The least norm is the
unconstrained target's own: with an input weight ``|[x_s; v_s]|``, in the same moderate units as
:func:`service.solver.estimation.target.target_problem`'s maps; without one ``|[x_s; u_s]|`` in
the request's units, solved in their basis ``N`` (:attr:`TargetProblem.null_space`), its level
``V1' c = Sigma1^-1 U1' W F ([x_s; u_s] - P0 d)`` (``W F N = U1 Sigma1 V1'``) read off the fit's
minimizer's outputs.  So the target is the same on both sides of the switch between the
unconstrained maps and the QPs, and it moves continuously as a limit starts to bind.

Scale.  DAQP's tolerances are absolute, so the QPs in the moderate units are posed at the
target's size: each Hessian divided by its 2-norm, the variable ``c`` divided by the size
``sigma`` of the unconstrained target (``max(|x_s|, |v_s|, |v_s clipped into the limits|)``,
infinity norms) and each limit row ``J_i N`` divided by its norm.  The tolerance on input
``i``'s limit so becomes ``tolerance * sigma * |J_i N|``, relative to the size the target can
give that input.  (Posed as they came, with the states and outputs in units 1e6 times smaller,
the QPs had come back "optimal" with the outputs at (1.12, -0.84) for the reachable setpoint
(1, -0.5).)  The least-norm stage without an input weight, in the request's units, keeps its
identity Hessian, its rows as they are and the tolerance absolute in those units: posed at
the target's size it lost digits (1e-7 of the target with the states 1e9 times larger than
the inputs).

Only the limits' row bounds change with ``(r, d, u_t)``: every workspace is set up once.
"""

from __future__ import annotations

from dataclasses import dataclass

import daqp
import numpy as np
import scipy.linalg
from numpy.typing import ArrayLike, NDArray

from service.solver.design.weights import weight_root
from service.solver.estimation.target import (
    REACHABLE_TOLERANCE,
    TargetProblem,
    input_scales,
    reachable_scale,
    steady_state_target,
)

__all__ = ["TARGET_TOLERANCE", "ReachableTarget", "ReachableTargetProblem", "reachable_target"]

#: Tolerance on the input limits of the target, relative to the target's size (the module's
#: notes, "Scale"): input ``i`` may pass its limit by ``TARGET_TOLERANCE * sigma * |J_i N|`` in
#: the moderate input units ``v`` (``u = T v``), so its meaning does not change with the units
#: (the least-norm stage without an input weight: by ``TARGET_TOLERANCE`` in the request's units).
TARGET_TOLERANCE = 1e-10
# DAQP's constraint-state value of an equality (its documentation, "sense").
_EQUALITY = 5


@dataclass(frozen=True)
class ReachableTarget:
    """A steady-state target inside the input limits.

    Attributes
    ----------
    state : ndarray, shape (n,)
        ``x_s``.
    input : ndarray, shape (m,)
        ``u_s``, inside the input limits.
    output : ndarray, shape (pz,)
        ``z_s = Cz x_s + Dz d``: the corrected setpoint for the controller.
    offset : ndarray, shape (pz,)
        ``z_s - r``; zero (to :data:`service.solver.estimation.target.REACHABLE_TOLERANCE`) when the
        setpoint is reachable inside the limits.
    reachable : bool
        Whether the setpoint itself is reachable inside the limits.
    input_at_min, input_at_max : ndarray of bool, shape (m,)
        Inputs whose target sits on a limit.
    solved : bool
        False when the QP failed; the target is then the unconstrained one clipped into the
        limits (and ``state``/``output`` follow from it only approximately).
    status : str
        ``"unconstrained"`` (the limits were not in the way), ``"optimal"``, or the failure.
    """

    state: NDArray[np.float64]
    input: NDArray[np.float64]
    output: NDArray[np.float64]
    offset: NDArray[np.float64]
    reachable: bool
    input_at_min: NDArray[np.bool_]
    input_at_max: NDArray[np.bool_]
    solved: bool
    status: str


class ReachableTargetProblem:
    """The target QP of one model and one set of input limits, set up once.

    Parameters
    ----------
    problem : TargetProblem
        From :func:`service.solver.estimation.target.target_problem` (model, disturbance layout, ``Q``).
    input_min, input_max : array_like, shape (m,)
        Input limits; ``-inf``/``+inf`` (or ``NaN``) where absent.
    tolerance : float, optional
        Tolerance on the limits, relative to the target's size (default
        :data:`TARGET_TOLERANCE`, which says how).

    Notes
    -----
    Holds solver workspaces: one instance per run, not shared between threads.
    """

    def __init__(
        self,
        problem: TargetProblem,
        *,
        input_min: ArrayLike,
        input_max: ArrayLike,
        tolerance: float = TARGET_TOLERANCE,
    ) -> None:
        # Solved in the balanced states the target maps were solved in (x = D x_b), so a change
        # of a state's unit changes nothing; only the answer's states are given back in x.
        self._state_scales = problem.state_scales
        problem = problem.balanced()
        n, m = problem.state_size, problem.b.shape[1]
        low = np.array(input_min, dtype=float).reshape(m)
        high = np.array(input_max, dtype=float).reshape(m)
        low[np.isnan(low)] = -np.inf
        high[np.isnan(high)] = np.inf
        self._problem, self._n, self._m = problem, n, m
        self._low, self._high, self._tolerance = low, high, tolerance
        # Moderate input units u = T v (those of target_problem's maps with an input weight).
        weighted = bool(np.any(problem.input_weight))
        self._weighted = weighted  # the least norm in the moderate units (else the request's)
        t = input_scales(problem.b, problem.input_weight)
        self._scales = t
        self._low_v, self._high_v = low / t, high / t
        steady = np.hstack([np.eye(n) - problem.a, -problem.b * t])
        null = scipy.linalg.null_space(steady)  # N in [x; v], (n+m, k)
        self._null = null
        self._particular = scipy.linalg.pinv(steady) @ problem.disturbance_input  # P0 in [x; v], (n+m, nd)
        k = null.shape[1]
        self._limited = np.flatnonzero(np.isfinite(low) | np.isfinite(high))
        # Each input's reach in the basis, ||J_i N|| (1 where zero): the limit rows are posed of
        # norm 1 and their tolerance is relative to the size of the input they bound.
        self._reach = _row_norms(null[n:])
        self._rows = np.ascontiguousarray((null[n:] / self._reach[:, None])[self._limited])  # v_s rows of N
        fit, _ = problem.output_equations(np.zeros(problem.c.shape[0]), np.zeros(problem.disturbance_input.shape[1]))
        root = weight_root(problem.output_weight)
        self._root = root
        self._seen = root @ fit @ null  # W F N, (pz, k)
        _, sv, vt = scipy.linalg.svd(self._seen, full_matrices=True)
        rank = int(np.count_nonzero(sv > max(self._seen.shape) * np.finfo(float).eps * sv.max(initial=0.0)))
        self._visible = vt[:rank].T  # V1, (k, rank)
        self._k, self._rank = k, rank
        bounds = (np.full(self._limited.size, np.inf), np.full(self._limited.size, -np.inf))
        self._norm_model: daqp.Model | None = None
        self._fit_model: daqp.Model | None = None
        if self._limited.size == 0:
            return  # no limit: the unconstrained target is always the answer
        self._fit_model = daqp.Model()
        self._fit_scale = _hessian_scale(self._seen)
        self._fit_model.setup(self._seen.T @ self._seen / self._fit_scale, np.zeros(k), self._rows, *bounds)
        self._fit_model.settings = {"primal_tol": tolerance, "eta_prox": 1e-12, "iter_limit": 2000}
        self._input_model: daqp.Model | None = None
        self._levels = self._visible  # the rows whose level the least norm keeps, (k, rank)
        if weighted and rank < k:
            v = weight_root(problem.input_weight * t[:, None] * t[None, :])  # V T
            self._input_root = v
            self._input_seen = v @ null[n:]  # V T J N, (m, k)
            rows = np.ascontiguousarray(np.vstack([self._visible.T, self._rows]))
            self._input_sense = np.concatenate([np.full(rank, _EQUALITY), np.zeros(self._limited.size)]).astype(
                np.int32
            )
            self._input_scale = _hessian_scale(self._input_seen)
            self._input_model = daqp.Model()
            self._input_model.setup(
                self._input_seen.T @ self._input_seen / self._input_scale,
                np.zeros(k),
                rows,
                np.concatenate([np.zeros(rank), bounds[0]]),
                np.concatenate([np.zeros(rank), bounds[1]]),
                self._input_sense,
            )
            self._input_model.settings = {"primal_tol": tolerance, "eta_prox": 1e-12, "iter_limit": 2000}
            stacked = np.vstack([self._visible.T, self._input_seen])
            _, sv2, vt2 = scipy.linalg.svd(stacked, full_matrices=True)
            both = int(np.count_nonzero(sv2 > max(stacked.shape) * np.finfo(float).eps * sv2.max(initial=0.0)))
            self._levels = vt2[:both].T
        # The least norm is the unconstrained target's own: |[x_s; v_s]| with an input weight (the
        # same basis), the request's |[x_s; u_s]| without one (its basis, levels and limit rows).
        self._norm_scales, self._norm_null, self._norm_particular = t, null, self._particular
        if not weighted:
            self._norm_scales, self._norm_null, self._norm_particular = (
                np.ones(m),
                problem.null_space,
                problem.particular,
            )
            seen = root @ fit @ problem.null_space
            u3, sv3, vt3 = scipy.linalg.svd(seen, full_matrices=True)
            kept = int(np.count_nonzero(sv3 > max(seen.shape) * np.finfo(float).eps * sv3.max(initial=0.0)))
            self._levels = vt3[:kept].T
            # V1' c from the fitted outputs alone (W F N = U1 Sigma1 V1'), not through u_s
            self._level_map = (u3[:, :kept] / sv3[:kept]).T @ root @ fit  # (rank, n+m)
        levels, k_norm = self._levels.shape[1], self._norm_null.shape[1]
        if levels < k_norm:
            # rows of norm 1 in the moderate units; as they are in the request's (notes, "Scale")
            self._norm_reach = _row_norms(self._norm_null[n:]) if weighted else np.ones(m)
            norm_rows = (self._norm_null[n:] / self._norm_reach[:, None])[self._limited]
            rows = np.ascontiguousarray(np.vstack([self._levels.T, norm_rows]))
            self._norm_sense = np.concatenate([np.full(levels, _EQUALITY), np.zeros(self._limited.size)]).astype(
                np.int32
            )
            upper = np.concatenate([np.zeros(levels), bounds[0]])
            lower = np.concatenate([np.zeros(levels), bounds[1]])
            self._norm_model = daqp.Model()
            self._norm_model.setup(np.eye(k_norm), np.zeros(k_norm), rows, upper, lower, self._norm_sense)
            self._norm_model.settings = {"primal_tol": tolerance, "eps_prox": 0.0, "iter_limit": 2000}

    def solve(
        self, setpoint: ArrayLike, disturbance: ArrayLike | None = None, input_target: ArrayLike | None = None
    ) -> ReachableTarget:
        """Return the nearest reachable steady state for a setpoint and disturbance estimate.

        Parameters
        ----------
        setpoint : array_like, shape (pz,)
            ``r``.
        disturbance : array_like, shape (nd,), optional
            ``d`` (default zero).
        input_target : array_like, shape (m,), optional
            ``u_t`` (default zero); used with the target problem's input weight.

        Returns
        -------
        ReachableTarget
            Never raises on a failed solve: see :attr:`ReachableTarget.solved`.
        """
        problem, n, t = self._problem, self._n, self._scales
        r = np.asarray(setpoint, dtype=float)
        nd = problem.disturbance_input.shape[1]
        d = np.zeros(nd) if disturbance is None else np.asarray(disturbance, dtype=float)
        ut = np.zeros(self._m) if input_target is None else np.asarray(input_target, dtype=float)
        free = steady_state_target(problem, r, d, ut)
        free_v = free.input / t
        # The target's size in the moderate units: the QPs are solved in c / size, so their
        # tolerances are relative to it (the module's notes, "Scale").
        size = _size(free.state, free_v, self._low_v, self._high_v)
        if self._fit_model is None or self._inside(free_v, size * self._reach):
            return self._target(np.concatenate([free.state, free.input]), r, d, True, "unconstrained", size)

        base = self._particular @ d  # P0 d in [x; v], orthogonal to every N c
        fit, goal = problem.output_equations(r, d)
        residual = self._root @ (goal - fit @ base)  # W (r - Dz d - F P0 d)
        reach = size * self._reach[self._limited]
        upper = (self._high_v[self._limited] - base[n:][self._limited]) / reach
        lower = (self._low_v[self._limited] - base[n:][self._limited]) / reach
        c, status = _run(self._fit_model, -(self._seen.T @ residual) / (self._fit_scale * size), upper, lower, None)
        if c is not None and self._input_model is not None:
            level = self._visible.T @ c
            pull = self._input_root @ (ut / t - base[n:])  # V T (T^-1 u_t - J P0 d)
            c3, _ = _run(
                self._input_model,
                -(self._input_seen.T @ pull) / (self._input_scale * size),
                np.concatenate([level, upper]),
                np.concatenate([level, lower]),
                self._input_sense,
            )
            c = c3 if c3 is not None else c  # the fit's minimizer stays optimal for the outputs
        if c is None:
            clipped = np.clip(free.input, self._low, self._high)
            return self._target(np.concatenate([free.state, clipped]), r, d, False, status, size)
        xv = base + self._null @ (size * c)
        xu = np.concatenate([xv[:n], t * xv[n:]])  # the fit's (and inputs') minimizer, [x_s; u_s]
        if self._norm_model is not None:
            ts = self._norm_scales
            norm_size = size if self._weighted else 1.0  # the module's notes, "Scale"
            base = self._norm_particular @ d
            if self._weighted:
                level = self._levels.T @ c  # the same basis: V' c, divided by the same size
            else:
                level = self._level_map @ (xu - base)  # from the fitted outputs (x_s only)
            limited, reach = self._limited, norm_size * self._norm_reach[self._limited]
            c2, _ = _run(
                self._norm_model,
                np.zeros(self._norm_null.shape[1]),
                np.concatenate([level, (self._high[limited] / ts[limited] - base[n:][limited]) / reach]),
                np.concatenate([level, (self._low[limited] / ts[limited] - base[n:][limited]) / reach]),
                self._norm_sense,
            )
            if c2 is not None:  # else the fit's own minimizer is optimal, just not least norm
                xn = base + self._norm_null @ (norm_size * c2)
                xu = np.concatenate([xn[:n], ts * xn[n:]])
        return self._target(xu, r, d, True, "optimal", size)

    def _inside(self, v: NDArray[np.float64], sizes: NDArray[np.float64]) -> bool:
        gap = self._tolerance * sizes
        return bool(np.all(v >= self._low_v - gap) and np.all(v <= self._high_v + gap))

    def _target(
        self,
        xu: NDArray[np.float64],
        r: NDArray[np.float64],
        d: NDArray[np.float64],
        solved: bool,
        status: str,
        size: float,
    ) -> ReachableTarget:
        problem, n = self._problem, self._n
        u = np.clip(xu[n:], self._low, self._high)  # remove tolerance-sized excursions
        v = u / self._scales
        output = problem.c @ xu[:n] + problem.disturbance_output @ d
        offset = output - r
        scale = reachable_scale(problem, r, d)  # d_m by its effect on the outputs, not its unit
        gap = self._tolerance * size * self._reach  # in the moderate units
        return ReachableTarget(
            state=xu[:n] * self._state_scales,
            input=u,
            output=output,
            offset=offset,
            reachable=bool(np.abs(offset).max(initial=0.0) <= REACHABLE_TOLERANCE * scale),
            input_at_min=np.abs(v - self._low_v) <= gap,
            input_at_max=np.abs(v - self._high_v) <= gap,
            solved=solved,
            status=status,
        )


def reachable_target(
    problem: TargetProblem,
    setpoint: ArrayLike,
    disturbance: ArrayLike | None = None,
    *,
    input_min: ArrayLike,
    input_max: ArrayLike,
) -> ReachableTarget:
    """Return the nearest reachable steady state inside the input limits (one-off call).

    Parameters are those of :class:`ReachableTargetProblem` and its ``solve``.

    Examples
    --------
    The plant ``x+ = 0.5 x + u``, ``z = x`` has steady-state gain 2; with ``u <= 1`` the output
    cannot pass 2, so the setpoint 3 is corrected to 2 with the input on its limit:

    >>> from service.solver.estimation.target import target_problem
    >>> t = reachable_target(target_problem([[0.5]], [[1.0]], [[1.0]]), [3.0],
    ...                      input_min=[-1.0], input_max=[1.0])
    >>> [round(float(t.output[0]), 12), round(float(t.input[0]), 12), bool(t.input_at_max[0])]
    [2.0, 1.0, True]
    """
    return ReachableTargetProblem(problem, input_min=input_min, input_max=input_max).solve(setpoint, disturbance)


def _hessian_scale(seen: NDArray[np.float64]) -> float:
    """``||G||_2^2`` of a Hessian ``G'G`` (1 when zero): the QPs are posed with Hessians of size 1."""
    top = float(np.linalg.norm(seen, 2)) if seen.size else 0.0
    return top * top if top > 0.0 else 1.0


def _row_norms(rows: NDArray[np.float64]) -> NDArray[np.float64]:
    """The 2-norms of the rows (1 where zero), shape (m,)."""
    norms = np.linalg.norm(rows, axis=1)
    return np.where(norms > 0.0, norms, 1.0)


def _size(
    state: NDArray[np.float64], inputs: NDArray[np.float64], low: NDArray[np.float64], high: NDArray[np.float64]
) -> float:
    """``max(|x_s|, |u_s|, |clip(u_s)|)`` (infinity norms) of the unconstrained target, 1 when zero.

    The scale of the target QPs' variables and of their tolerances: the target without limits and
    its inputs clipped into the limits bound the size of the answer's parts that the limits move.
    """
    clipped = np.clip(inputs, low, high)
    top = max(
        float(np.abs(state).max(initial=0.0)), float(np.abs(inputs).max(initial=0.0)), float(np.abs(clipped).max())
    )
    return top if top > 0.0 and np.isfinite(top) else 1.0


def _run(
    model: daqp.Model,
    linear: NDArray[np.float64],
    upper: NDArray[np.float64],
    lower: NDArray[np.float64],
    sense: NDArray[np.int32] | None,
) -> tuple[NDArray[np.float64] | None, str]:
    """Update and solve a DAQP workspace cold; return the solution or None and a status."""
    size = upper.size
    cold = np.zeros(size, dtype=np.int32) if sense is None else sense
    try:
        model.update(f=linear, bupper=upper, blower=lower, sense=cold)
        x, _, flag, _ = model.solve()
    except Exception:  # the solver must never end the run
        return None, "failed"
    if flag <= 0 or not np.isfinite(x).all():
        return None, {-1: "infeasible", -4: "iteration_limit"}.get(int(flag), "failed")
    return np.asarray(x, dtype=float), "optimal"

"""The offset-free steady-state target: where the plant must settle for ``z = r``.

Given the disturbance estimate ``d``, the steady state ``(x_s, u_s)`` whose controlled outputs
equal the setpoint ``r`` solves the target equations (Muske and Badgwell 2002; Pannocchia and
Rawlings 2003) ::

    [I - A   -B] [x_s]   [Bd d      ]          steady state of the disturbed model
    [Cz       0] [u_s] = [r - Dz d  ]          controlled outputs on the setpoint

The first block row is kept exactly (a steady state must be a steady state); the second is
met in the weighted least-squares sense ``min |W (Cz x_s + Dz d - r)|`` with ``W' W = Q``, so
the same function covers every shape:

- square and nonsingular (``m = pz``, no plant zero at ``z = 1``): the unique exact target;
- more inputs than controlled outputs: every setpoint reachable; among the exact targets the
  one of least norm ``|[x_s; u_s]|``;
- fewer inputs, or a singular steady-state gain: the reachable steady state nearest the
  setpoint in the ``Q``-weighted norm (least norm among ties).

With an input weight ``S`` (``weights.input``) and input targets ``u_t``, the ties of the
output fit are broken by the inputs first: among the steady states that fit the outputs best,
the one whose inputs are nearest their targets in the ``S``-weighted norm
``|S^(1/2) (u_s - u_t)|``, and least norm among what ties remain (a lexicographic target
calculation, common practice).  Input targets act in the spare directions only: the output
fit is settled before they are looked at, so a reachable setpoint is still met exactly.

The solution is linear in ``(r, d, u_t)``: ``[x_s; u_s] = S_r r + S_d d + S_t u_t``.  Both maps are formed
once (:func:`target_problem`), so a target costs two matrix-vector products.  A constrained
target (input limits, a nearest reachable steady state under limits) starts from the same
pieces: the equality block :meth:`TargetProblem.steady_state_equations`, the objective block
:meth:`TargetProblem.output_equations`, and the null-space parametrization ``[x_s; u_s] =
particular(d) + N c`` in :attr:`TargetProblem.null_space`.

Notes
-----
With ``d`` estimated by a detectable model with ``nd = p`` and the loop stable, the controlled
outputs settle on the target's outputs under any model mismatch (Pannocchia and Rawlings
2003, offset-free conditions); when the target is exact they settle on ``r``.

References
----------
K. R. Muske and T. A. Badgwell, "Disturbance modeling for offset-free linear model predictive
control", J. Process Control 12 (2002) 617-632, doi:10.1016/S0959-1524(01)00051-8.
G. Pannocchia and J. B. Rawlings, "Disturbance models for offset-free model-predictive
control", AIChE J. 49 (2003) 426-437, doi:10.1002/aic.690490213.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
import scipy.linalg
from numpy.typing import ArrayLike, NDArray

from service.solver.design.weights import weight_matrix, weight_root
from service.solver.numerics import balance_states, in_scaled_states

__all__ = [
    "REACHABLE_TOLERANCE",
    "SPARE_INPUT_TOLERANCE",
    "SteadyStateTarget",
    "TargetProblem",
    "input_scales",
    "reachable_scale",
    "steady_state_target",
    "target_problem",
    "with_measured_disturbances",
]

#: A target counts as exact when its output misses the setpoint by at most this much, relative
#: to ``max(1, |r|, |d|)`` (infinity norms; common practice for a least-squares residual; held
#: measured disturbances by their effect on the outputs, :func:`reachable_scale`).
REACHABLE_TOLERANCE = 1e-9

#: A direction of the spare steady states counts as moving no input when its weighted input
#: part is below this, relative to ``||V|| ||J N||`` (the weighted input part of the whole
#: orthonormal steady-state basis ``N``): far above its rounding (about ``1e-14`` of it for
#: the state of an integrator no weighted output sees, in a test of 57 states), far below
#: a direction that moves an input (common practice for rank decisions, a few orders of
#: magnitude above rounding).
SPARE_INPUT_TOLERANCE = 1e-10


@dataclass(frozen=True)
class SteadyStateTarget:
    """One target.

    Attributes
    ----------
    state : ndarray, shape (n,)
        ``x_s``.
    input : ndarray, shape (m,)
        ``u_s``.
    output : ndarray, shape (pz,)
        ``z_s = Cz x_s + Dz d``, the corrected setpoint to hand to the controller.
    offset : ndarray, shape (pz,)
        ``z_s - r``; zero (to :data:`REACHABLE_TOLERANCE`) when the setpoint is reachable.
    reachable : bool
    """

    state: NDArray[np.float64]
    input: NDArray[np.float64]
    output: NDArray[np.float64]
    offset: NDArray[np.float64]
    reachable: bool


@dataclass(frozen=True)
class TargetProblem:
    """The target equations of one model and disturbance layout, with their solution maps.

    Attributes
    ----------
    a : ndarray, shape (n, n)
    b : ndarray, shape (n, m)
    c : ndarray, shape (pz, n)
        ``Cz``.
    disturbance_input : ndarray, shape (n, nd)
        ``Bd``.
    disturbance_output : ndarray, shape (pz, nd)
        ``Dz``.
    output_weight : ndarray, shape (pz, pz)
        ``Q`` of the least-squares fit.
    null_space : ndarray, shape (n+m, k)
        Orthonormal basis ``N`` of the null space of ``[I - A, -B]``: the free directions of
        the steady state (``k >= m``).
    particular : ndarray, shape (n+m, nd)
        ``P0`` with ``P0 d`` the least-norm solution of ``[I - A, -B] [x; u] = Bd d``.
    setpoint_map : ndarray, shape (n+m, pz)
        ``S_r``.
    disturbance_map : ndarray, shape (n+m, nd)
        ``S_d``: ``[x_s; u_s] = S_r r + S_d d``.
    output_setpoint_map : ndarray, shape (pz, pz)
        ``Z_r``.
    output_disturbance_map : ndarray, shape (pz, nd)
        ``Z_d``: ``z_s = Z_r r + Z_d d``.  ``Z_r = I`` and ``Z_d = 0`` when every setpoint is
        reachable.
    every_setpoint_reachable : bool
        Whether ``[[I - A, -B], [Cz, 0]]`` has full row rank ``n + pz``.
    input_weight : ndarray, shape (m, m)
        ``S`` of the input targets (zeros: no input targets; ``S_t = 0``).
    input_target_map : ndarray, shape (n+m, m)
        ``S_t``: the part of ``[x_s; u_s]`` that follows the input targets ``u_t``.
    state_scales : ndarray, shape (n,)
        ``D`` (powers of two) of the balanced states ``x = D x_b`` the maps were solved in
        (:func:`service.solver.numerics.balance_states`; ones when the least norm picks
        something, ``free_directions > 0``: its tie-break is in the request's states);
        ``null_space`` is orthonormal in ``[x_b; u]``, and :meth:`balanced` gives the whole
        problem there.
    free_directions : int
        Steady-state directions that neither the output fit nor the input weight place: the
        least norm ``|[x_s; u_s]|`` picks them (0: the target is unique).
    measured : int
        How many of the last disturbance columns are held measured disturbances ``d_m``
        (:func:`with_measured_disturbances`; 0 otherwise).  Their values are in their own units,
        so :func:`reachable_scale` sizes them by their effect on the outputs instead.
    """

    a: NDArray[np.float64]
    b: NDArray[np.float64]
    c: NDArray[np.float64]
    disturbance_input: NDArray[np.float64]
    disturbance_output: NDArray[np.float64]
    output_weight: NDArray[np.float64]
    null_space: NDArray[np.float64]
    particular: NDArray[np.float64]
    setpoint_map: NDArray[np.float64]
    disturbance_map: NDArray[np.float64]
    output_setpoint_map: NDArray[np.float64]
    output_disturbance_map: NDArray[np.float64]
    every_setpoint_reachable: bool
    input_weight: NDArray[np.float64]
    input_target_map: NDArray[np.float64]
    state_scales: NDArray[np.float64]
    free_directions: int
    measured: int = 0

    @property
    def state_size(self) -> int:
        return int(self.a.shape[0])

    def in_states(
        self,
        scales: NDArray[np.float64],
        *,
        a: NDArray[np.float64],
        b: NDArray[np.float64],
        c: NDArray[np.float64],
        disturbance_input: NDArray[np.float64],
    ) -> TargetProblem:
        """The same problem in the states ``x = D x_b`` (``D = diag(scales)``), given its model there.

        Every map's state rows are multiplied by ``scales``; powers of two keep it exact.
        """
        lift = np.concatenate([scales, np.ones(self.b.shape[1])])[:, None]
        return replace(
            self,
            a=a,
            b=b,
            c=c,
            disturbance_input=disturbance_input,
            null_space=self.null_space * lift,
            particular=self.particular * lift,
            setpoint_map=self.setpoint_map * lift,
            disturbance_map=self.disturbance_map * lift,
            input_target_map=self.input_target_map * lift,
            state_scales=self.state_scales * scales,
        )

    def balanced(self) -> TargetProblem:
        """The problem in the balanced states ``x_b = D^-1 x`` it was solved in (``state_scales`` ones)."""
        ds = self.state_scales
        a, b, c = in_scaled_states(ds, self.a, self.b, self.c)
        return self.in_states(1.0 / ds, a=a, b=b, c=c, disturbance_input=self.disturbance_input / ds[:, None])

    def steady_state_equations(
        self, disturbance: NDArray[np.float64]
    ) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """Return ``(E, e)`` of the equality ``E [x_s; u_s] = e``: ``E = [I - A, -B]``, ``e = Bd d``.

        Shapes (n, n+m) and (n,).
        """
        n = self.state_size
        return np.hstack([np.eye(n) - self.a, -self.b]), self.disturbance_input @ disturbance

    def output_equations(
        self, setpoint: NDArray[np.float64], disturbance: NDArray[np.float64]
    ) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """Return ``(F, f)`` of the objective ``|W (F [x_s; u_s] - f)|^2``: ``F = [Cz, 0]``, ``f = r - Dz d``.

        Shapes (pz, n+m) and (pz,).
        """
        m = self.b.shape[1]
        return (
            np.hstack([self.c, np.zeros((self.c.shape[0], m))]),
            setpoint - self.disturbance_output @ disturbance,
        )


def target_problem(
    a: ArrayLike,
    b: ArrayLike,
    c: ArrayLike,
    *,
    disturbance_input: ArrayLike | None = None,
    disturbance_output: ArrayLike | None = None,
    output_weight: ArrayLike | None = None,
    input_weight: ArrayLike | None = None,
) -> TargetProblem:
    """Form the target equations and their least-squares solution maps.

    Parameters
    ----------
    a : array_like, shape (n, n)
    b : array_like, shape (n, m)
    c : array_like, shape (pz, n)
        Controlled-output matrix ``Cz``.
    disturbance_input : array_like, shape (n, nd), optional
        ``Bd`` (default: no disturbance, ``nd = 0``).
    disturbance_output : array_like, shape (pz, nd), optional
        ``Dz`` (default zeros of the matching size).
    output_weight : array_like, shape (pz,) or (pz, pz), optional
        ``Q`` of the fit for unreachable setpoints (default identity).  Use the controller's
        output weight so that the target agrees with the controller's own compromise.
    input_weight : array_like, shape (m,) or (m, m), optional
        ``S``, the weight of the input targets (default none).  Use the controller's input
        weight, so that the target's inputs are those its input penalty pulls towards.

    Returns
    -------
    TargetProblem

    Notes
    -----
    With ``N`` an orthonormal null-space basis of ``E = [I - A, -B]`` (``scipy.linalg.null_space``)
    and ``P0 = E^+ Bd`` (``scipy.linalg.pinv``), every steady state is ``P0 d + N c``; the fit
    ``min |W (F N c - (r - Dz d - F P0 d))|`` has the least-norm solution
    ``c = (W F N)^+ W (r - Dz d - F P0 d)``.  ``P0 d`` lies in the row space of ``E``,
    orthogonal to ``N c``, so ``[x_s; u_s]`` is of least norm among the best fits.

    With an input weight, the best fits are ``c = c0 + N2 w`` with ``N2`` an orthonormal basis of
    the null space of ``W F N`` (directions that no weighted output sees at steady state).  The
    inputs' fit ``min |V (J (xi0 + N N2 w) - u_t)|`` (``V' V = S``, ``J`` picks ``u_s`` out of
    ``[x_s; u_s]``, ``xi0`` the target without input targets) has the least-norm solution
    ``w = (V J N N2)^+ V (u_t - J xi0)``; ``N N2 w`` is orthogonal to ``xi0``, so the result is
    again of least norm among its ties.  With ``S = 0`` it is ``xi0``.  The pseudo-inverse
    drops the directions whose weighted input part is below :data:`SPARE_INPUT_TOLERANCE`:
    they move no input (such as the state of an integrating output of weight 0, a level in a
    zone), so the least-norm solution leaves them at zero; inverting their rounding would move
    ``u_s`` off the setpoints' steady state.  With an input weight the maps are formed with the
    inputs in units of moderate size (``u = T v``, ``T`` powers of two from the columns of ``[B;
    S^(1/2)]``), so a change of an input's unit changes no target; the least-norm choice among
    ties ``S`` leaves open is then the one in those units.  A unique target (no direction left
    to the least norm, ``free_directions = 0``) is solved in balanced states ``x = D x_b``
    (:func:`service.solver.numerics.balance_states`, powers of two), so a change of a state's
    unit changes neither the target nor the verdict ``every_setpoint_reachable``; where the
    least norm picks something, it is taken in the request's states, as it always was.
    """
    a_ = np.asarray(a, dtype=float)
    b_ = np.asarray(b, dtype=float)
    c_ = np.asarray(c, dtype=float)
    n, m, pz = a_.shape[0], b_.shape[1], c_.shape[0]
    bd = np.zeros((n, 0)) if disturbance_input is None else np.asarray(disturbance_input, dtype=float)
    nd = bd.shape[1]
    dz = np.zeros((pz, nd)) if disturbance_output is None else np.asarray(disturbance_output, dtype=float)
    assert bd.shape == (n, nd) and dz.shape == (pz, nd), (bd.shape, dz.shape)
    q = np.eye(pz) if output_weight is None else weight_matrix(output_weight, pz)
    s_in = np.zeros((m, m)) if input_weight is None else weight_matrix(input_weight, m)
    # A unique target is solved in balanced states x = D x_b (powers of two, so exact): with a
    # state in units 1e9 apart the maps had lost 1e-9 of the target, enough to call a reachable
    # setpoint out of reach, and 1e12 lost 4e-6.  Where the least norm picks something its
    # tie-break stays in the request's states (a least norm is defined in some units).
    ds = balance_states(a_, b_, c_)
    if np.all(ds == 1.0):
        return _solved_target_problem(a_, b_, c_, bd, dz, q, s_in)
    inner = _solved_target_problem(*in_scaled_states(ds, a_, b_, c_), bd / ds[:, None], dz, q, s_in)
    if inner.free_directions:  # the least norm picks something: its tie-break in the request's states
        return _solved_target_problem(a_, b_, c_, bd, dz, q, s_in)
    return inner.in_states(ds, a=a_, b=b_, c=c_, disturbance_input=bd)


def _solved_target_problem(
    a_: NDArray[np.float64],
    b_: NDArray[np.float64],
    c_: NDArray[np.float64],
    bd: NDArray[np.float64],
    dz: NDArray[np.float64],
    q: NDArray[np.float64],
    s_in: NDArray[np.float64],
) -> TargetProblem:
    """:func:`target_problem` solved in the states given (``state_scales`` ones)."""
    n, m, pz = a_.shape[0], b_.shape[1], c_.shape[0]
    nd = bd.shape[1]
    w = weight_root(q)
    steady = np.hstack([np.eye(n) - a_, -b_])
    fit = np.hstack([c_, np.zeros((pz, m))])
    null = scipy.linalg.null_space(steady)  # (n+m, k)
    particular = scipy.linalg.pinv(steady) @ bd  # (n+m, nd)
    if np.any(s_in):
        # Solved in input units where every input's column of [B; S^(1/2)] is about 1 in size
        # (powers of two, so the change of variables is exact): u = T v.  In the request's
        # units an input scaled by 1e9 (its input weight by 1e-18, the same problem) had left
        # the spare input's target wrong by more than its own size, and 1e6 by 1e-4.
        t = input_scales(b_, s_in)
        maps = _target_maps(a_, b_ * t, c_, bd, dz, w, s_in * t[:, None] * t[None, :])
        setpoint_map, disturbance_map, target_map, free = maps
        setpoint_map[n:] *= t[:, None]
        disturbance_map[n:] *= t[:, None]
        target_map[n:] *= t[:, None]
        target_map /= t[None, :]
    else:
        setpoint_map, disturbance_map, target_map, free = _target_maps(a_, b_, c_, bd, dz, w, s_in)
    output_setpoint_map = fit @ setpoint_map
    output_disturbance_map = fit @ disturbance_map + dz
    full = np.vstack([steady, fit])
    sv = scipy.linalg.svdvals(full)
    reach = bool(sv.size >= n + pz and sv[n + pz - 1] > REACHABLE_TOLERANCE * sv[0])
    if reach:  # exact in exact arithmetic: clean off the rounding
        output_setpoint_map = np.eye(pz)
        output_disturbance_map = np.zeros((pz, nd))
    return TargetProblem(
        a=a_,
        b=b_,
        c=c_,
        disturbance_input=bd,
        disturbance_output=dz,
        output_weight=q,
        null_space=null,
        particular=particular,
        setpoint_map=setpoint_map,
        disturbance_map=disturbance_map,
        output_setpoint_map=output_setpoint_map,
        output_disturbance_map=output_disturbance_map,
        every_setpoint_reachable=reach,
        input_weight=s_in,
        input_target_map=target_map,
        state_scales=np.ones(n),
        free_directions=free,
    )


def with_measured_disturbances(problem: TargetProblem, b_disturbance: ArrayLike) -> TargetProblem:
    """The same target equations with held measured disturbances ``d_m`` after the estimated ``d``.

    A measured disturbance enters the steady state like an estimated one that the controlled
    outputs do not see directly: the disturbance columns become ``[Bd, Bd_m]`` and
    ``[Dz, 0]``, so the target of ``[d; d_m]`` is ``S_d d + S_m d_m`` (the maps are linear,
    column by column: the first ``nd`` columns are ``problem``'s own, to rounding).  ``S_m`` moves
    the target's states and inputs (a steady state under ``Bd_m d_m`` needs other inputs), and
    ``Z_m``, its output map, is nonzero only where a setpoint is not reachable: the best fit to
    the setpoint then moves with ``d_m``.

    Parameters
    ----------
    problem : TargetProblem
    b_disturbance : array_like, shape (n, md)
        ``Bd_m`` of the measured disturbances, in the problem's signals.

    Returns
    -------
    TargetProblem
        With ``nd + md`` disturbance columns.
    """
    bd_m = np.asarray(b_disturbance, dtype=float)
    n, pz = problem.state_size, problem.c.shape[0]
    assert bd_m.ndim == 2 and bd_m.shape[0] == n, bd_m.shape
    joined = target_problem(
        problem.a,
        problem.b,
        problem.c,
        disturbance_input=np.hstack([problem.disturbance_input, bd_m]),
        disturbance_output=np.hstack([problem.disturbance_output, np.zeros((pz, bd_m.shape[1]))]),
        output_weight=problem.output_weight,
        input_weight=problem.input_weight if np.any(problem.input_weight) else None,
    )
    return replace(joined, measured=problem.measured + bd_m.shape[1])


def reachable_scale(problem: TargetProblem, setpoint: ArrayLike, disturbance: ArrayLike) -> float:
    """Return the size a target's offset is judged against: ``max(1, |r|, |d|, |Cz x0(d_m)|)``.

    A target counts as exact when ``|z_s - r| <= REACHABLE_TOLERANCE * scale`` (infinity norms).
    ``r`` and the estimated ``d`` enter by their values; the held measured disturbances (the
    problem's last :attr:`TargetProblem.measured` columns) are in units of their own, so they
    enter by their effect on the controlled outputs, ``Cz x0`` with ``[x0; u0] = P0 d_m`` the
    least-norm steady state under ``Bd_m d_m`` (the size of what the inputs cancel, where the
    rounding comes from).  A change of a measured disturbance's unit then changes no verdict:
    by its raw value, a feed in a unit 1e9 times smaller without a span had called a setpoint
    out of reach by several spans reachable.

    Parameters
    ----------
    problem : TargetProblem
    setpoint : array_like, shape (pz,)
    disturbance : array_like, shape (nd,)
        The estimated ``d``, then ``d_m``.

    Returns
    -------
    float
    """
    r = np.asarray(setpoint, dtype=float)
    d = np.asarray(disturbance, dtype=float)
    split = d.size - problem.measured
    scale = max(1.0, float(np.abs(r).max(initial=0.0)), float(np.abs(d[:split]).max(initial=0.0)))
    if problem.measured:
        n = problem.state_size
        effect = problem.c @ (problem.particular[:n, split:] @ d[split:])
        scale = max(scale, float(np.abs(effect).max(initial=0.0)))
    return scale


def input_scales(b: NDArray[np.float64], input_weight: NDArray[np.float64]) -> NDArray[np.float64]:
    """Return the input scales ``T`` of the target's moderate input units ``u = T v``.

    Parameters
    ----------
    b : ndarray, shape (n, m)
        ``B``, in the request's input units.
    input_weight : ndarray, shape (m, m)
        ``S`` (zeros: none).

    Returns
    -------
    ndarray, shape (m,)
        Powers of two (so the change of variables is exact) with each column of
        ``[B T; (T S T)^(1/2)]`` about 1 in size: a change of an input's unit scales both alike,
        so ``v`` does not depend on it (to a factor of at most ``sqrt(2)``).  An input with a
        zero column keeps ``T = 1``.
    """
    column = np.sqrt(np.einsum("ij,ij->j", b, b) + np.clip(np.diag(input_weight), 0.0, None))
    return np.exp2(-np.round(np.log2(np.where(column > 0.0, column, 1.0))))


def _target_maps(
    a: NDArray[np.float64],
    b: NDArray[np.float64],
    c: NDArray[np.float64],
    bd: NDArray[np.float64],
    dz: NDArray[np.float64],
    w: NDArray[np.float64],
    s_in: NDArray[np.float64],
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64], int]:
    """``S_r``, ``S_d`` and ``S_t`` of :func:`target_problem` (its notes) in the units given, and
    the number of steady-state directions that neither the fit nor the input weight place (the
    least norm picks them)."""
    n, m, pz = a.shape[0], b.shape[1], c.shape[0]
    steady = np.hstack([np.eye(n) - a, -b])
    fit = np.hstack([c, np.zeros((pz, m))])
    null = scipy.linalg.null_space(steady)  # (n+m, k)
    particular = scipy.linalg.pinv(steady) @ bd  # (n+m, nd)
    solve = scipy.linalg.pinv(w @ fit @ null)  # (k, pz)
    setpoint_map = null @ solve @ w
    disturbance_map = particular - setpoint_map @ (dz + fit @ particular)
    target_map = np.zeros((n + m, m))
    spare = null @ scipy.linalg.null_space(w @ fit @ null)  # N N2: (n+m, k2), orthonormal columns
    free = spare.shape[1]  # steady-state directions the fit leaves free
    if np.any(s_in):
        if spare.shape[1]:
            v = weight_root(s_in)
            # A spare direction that moves no input (the state of an integrator no weighted
            # output sees: a level in a zone) has an input part of rounding size; it must not
            # be inverted, or the target's inputs leave the setpoints' steady state.
            floor = SPARE_INPUT_TOLERANCE * float(np.linalg.norm(v, 2)) * float(np.linalg.norm(null[n:], 2))
            placed, fixed = scipy.linalg.pinv(v @ spare[n:], atol=floor, rtol=0.0, return_rank=True)
            free -= int(fixed)  # less those the input weight places
            pull = spare @ placed @ v  # N N2 (V J N N2)^+ V
            target_map = pull
            setpoint_map = setpoint_map - pull @ setpoint_map[n:]
            disturbance_map = disturbance_map - pull @ disturbance_map[n:]
    return setpoint_map, disturbance_map, target_map, free


def steady_state_target(
    problem: TargetProblem,
    setpoint: ArrayLike,
    disturbance: ArrayLike | None = None,
    input_target: ArrayLike | None = None,
) -> SteadyStateTarget:
    """Return the target for a setpoint and a disturbance estimate.

    Parameters
    ----------
    problem : TargetProblem
    setpoint : array_like, shape (pz,)
        ``r``.
    disturbance : array_like, shape (nd,), optional
        ``d``, the disturbance estimate (default zero).
    input_target : array_like, shape (m,), optional
        ``u_t``, the input targets (default zero: the model's origin); they matter only with
        the problem's input weight.

    Returns
    -------
    SteadyStateTarget

    Examples
    --------
    The plant ``x+ = 0.5 x + u``, ``z = x + d`` with an output disturbance ``d = 0.5``: reaching
    ``r = 1`` needs ``x_s = r - d = 0.5`` and ``u_s = (1 - 0.5) x_s = 0.25``:

    >>> t = steady_state_target(target_problem([[0.5]], [[1.0]], [[1.0]],
    ...     disturbance_input=[[0.0]], disturbance_output=[[1.0]]), [1.0], [0.5])
    >>> [round(float(t.state[0]), 12), round(float(t.input[0]), 12), t.reachable]
    [0.5, 0.25, True]
    """
    r = np.asarray(setpoint, dtype=float)
    nd = problem.disturbance_input.shape[1]
    d = np.zeros(nd) if disturbance is None else np.asarray(disturbance, dtype=float)
    n = problem.state_size
    xu = problem.setpoint_map @ r + problem.disturbance_map @ d
    if input_target is not None:
        xu = xu + problem.input_target_map @ np.asarray(input_target, dtype=float)
    output = problem.c @ xu[:n] + problem.disturbance_output @ d
    offset = output - r
    reachable = bool(np.abs(offset).max(initial=0.0) <= REACHABLE_TOLERANCE * reachable_scale(problem, r, d))
    return SteadyStateTarget(state=xu[:n], input=xu[n:], output=output, offset=offset, reachable=reachable)

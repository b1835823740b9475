"""Closed-loop simulation of a run: a true plant, the estimator and a move policy.

One step ``k = 0 .. steps-1`` of :func:`simulate_loop` (the plant may differ from the model)::

    z(k)     = C_true x(k) + d_out(k)                      true outputs (controlled)
    y_m(k)   = Cy_true x(k) + Dy u(k) + H d_out(k) + v(k)  measured, v ~ N(0, diag(std^2))
    x(k|k)   = x(k|k-1) + L (y_m(k) - Dy u(k) - Cy x(k|k-1))   estimate (full_state: x(k|k) = x(k))
    z_s(k)   = Z_r r(k) + Z_d d(k|k)                       target outputs (target.py)
    free     = Fx_aug x(k|k) + Fu u(k-1) [+ Fd d_m(k)]     free prediction (loop.py)
    E        = (1 (x) I_p) z_s(k) - free
    du(k)    = policy(error=E, free_prediction=free, previous_input=u(k-1), step=k).move
               [+ target_input=u_s(k) with an input weight]
    u(k)     = u(k-1) + du(k)
    x(k+1)   = A_true x(k) + B_true (u(k) + d_in(k)) [+ Bd_true d_m(k)]
    x(k+1|k) = A_aug x(k|k) + B_aug u(k) [+ [Bd; 0] d_m(k)]

Measured outputs.  By default they are the controlled outputs (``Cy_true = C_true``, ``Dy = 0``,
``H = I``).  With measured outputs of their own (``TruePlant.c_measured``, ``d_measured``; the
estimator designed on the model's) an output disturbance is a step on a controlled output's
signal: it shows in a measured output only when that is the same signal (the same row of
``C_true``, no feed-through; ``H`` of :func:`measured_output_map`), and the noise is on the
measured outputs.  The feed-through ``Dy`` follows the model's definition ``y_m(k) = Cy x(k) +
Dy u(k)``: the measurement at sample ``k`` sees the input applied at ``k``, and the estimator
subtracts ``Dy u(k)`` of that same input.  The true plant's ``Dy`` must be the model's, so what
the filter reads, ``Cy_true x(k) + H d_out(k) + v(k)``, does not depend on ``u(k)``, and ``u(k)``
follows from it explicitly (a different ``Dy`` would make ``u(k)`` depend on itself through the
measurement: an algebraic loop).

The bracketed terms are there with measured disturbances ``d_m`` (``b_disturbance``): the
model's ``Bd`` enters the estimator's prediction, and its free response ``Fd`` (``Cz sum_{l<i}
A^l Bd`` at steps ``Hw..Hp``, :func:`service.solver.design.feedforward.disturbance_free_response`)
the free prediction, so the unconstrained law is ``du = Kr r - Kx x - Ku u(k-1) - Kd d_m`` with
``Kd = Kh Fd``.  The steady-state target moves with the held ``d_m`` too
(:func:`service.solver.estimation.target.with_measured_disturbances`): its inputs and states
always (``U_m``, ``X_m``: a steady state under ``Bd d_m`` needs other inputs), its outputs
by ``Z_m d_m`` only where a setpoint is not reachable (the best fit moves with ``d_m``; a
reachable setpoint is met whatever ``d_m`` is), so ``z_s(k) = Z_r r(k) + Z_d d(k|k) + Z_m
d_m(k)``.

With an input weight (``weights.input``) the target also takes the input targets ``u_t``
(``Scenario.input_targets``, held over the run, or changed by ``input_target_changes``):
``u_s(k) = U_r r(k) + U_d d(k|k) + U_t u_t(k) [+ U_m d_m(k)]``, and the policy receives ``target_input=u_s(k)``,
which its input penalty pulls towards (:mod:`service.solver.design.input_target`); the
unconstrained move is ``du = Kh E + Kt0 (u_s - u(k-1))``.  Without an input weight the policy
is called as before and the input targets play no part.

With the Riccati terminal weight (``weights.terminal = "riccati"``) the cost also holds
``|xi(k+Hp) - xi_s(k)|^2_P`` on the last predicted ``xi = [x; u]``, with ``xi_s(k) = [x_s; u_s]``
the step's steady-state target (the linear maps ``X_r r(k) + X_d d(k|k)``, plus ``X_t u_t(k)``
with input targets, or the target rule's steady state).  Its gradient adds ``Gamma' P e_t`` to ``G'Q E``, with the terminal
error ::

    e_t(k) = xi_s(k) - (Phi_a x(k|k) + Phi_u u(k-1))        (n+m,)

(:class:`service.solver.estimation.loop.TerminalTerm`), and the policy receives
``terminal_error=e_t(k)``; the unconstrained move is ``du = Kh E + Kt e_t``.  With measured
disturbances both sides move with the held ``d_m(k)``: ``e_t`` gains ``(X_m - Phi_m) d_m(k)``
(the steady state under ``d_m`` and its free response to the horizon's end,
:func:`service.solver.design.feedforward.measured_target`,
:func:`service.solver.design.terminal.terminal_free_disturbance`); a target rule is given
``d_m(k)`` and its steady state holds ``X_m d_m(k)`` itself, so ``e_t`` gains ``- Phi_m d_m(k)``.

Events hold from their step on: a setpoint change sets ``r``, an output (input) disturbance
event sets the level of ``d_out`` (``d_in``) — each event replaces the previous level, it does
not add to it.  Before the first setpoint change the setpoint is ``initial_setpoint`` (default:
the true output at the initial state, so the loop starts at rest); disturbances start at zero.
The estimator starts from ``x(0|-1) = [x(0); 0]``: it knows the initial state, not the
disturbances.  A true plant with another state count than the model starts from rest,
``x_true(0) = 0`` (``initial_state`` must then be left out), and so does the estimator.  Noise comes from ``numpy.random.default_rng(seed)``, drawn once as a
``(steps, p)`` standard-normal array times ``std``: the same scenario always gives the same run.
For ``full_state`` the measured outputs are still recorded (with noise), but the controller
reads the true state, noise-free.

The move computation is a :class:`MovePolicy`, so a constrained quadratic program can replace
the fixed gain without touching the loop; :class:`UnconstrainedPolicy` is the design's
``du = Kh E``.  Likewise the target: by default the linear maps of ``loop.target`` above; a
:class:`TargetRule` (``target_rule=``) replaces them, e.g. by the nearest steady state that is
reachable inside input limits (:mod:`service.solver.limits.limited_run`).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any, Protocol

import numpy as np
from numpy.typing import ArrayLike, NDArray

from service.solver.design.controller import ControllerDesign
from service.solver.design.feedforward import disturbance_free_response, measured_target
from service.solver.estimation.estimator import Estimator
from service.solver.estimation.loop import ControlLoop, TerminalTerm, control_loop, terminal_term

__all__ = [
    "DIVERGENCE_LIMIT",
    "Event",
    "MovePolicy",
    "PolicyStep",
    "Scenario",
    "Simulation",
    "TargetRule",
    "TruePlant",
    "UnconstrainedPolicy",
    "measured_output_map",
    "simulate_loop",
]

#: The run stops as diverged once the squared norm of the plant state or of the estimate
#: passes this (far below overflow, so no floating-point warning is ever raised).
DIVERGENCE_LIMIT = 1e200


@dataclass(frozen=True)
class PolicyStep:
    """What a move policy returns for one step.

    Attributes
    ----------
    move : ndarray, shape (m,)
        ``du(k)``, applied as ``u(k) = u(k-1) + du(k)``.
    report : object or None
        Anything the policy wants recorded for this step, stored as-is in
        :attr:`Simulation.reports` (the constrained policy records a typed
        :class:`service.solver.limits.policy.StepReport`).  ``None`` when there is nothing
        to say.
    """

    move: NDArray[np.float64]
    report: object | None = None


class MovePolicy(Protocol):
    """Computes the move of one step from the free-response error.

    The loop calls the policy once per step, in order ``step = 0, 1, ...``, with keyword
    arguments only::

        policy(error=E, free_prediction=F, previous_input=u_prev, step=k) -> PolicyStep

    Parameters (all fresh arrays; the policy may keep them but must not change them)

    - ``error``, shape (Np*p,): ``E = T - F`` with ``T`` the reference over the penalized
      steps ``Hw..Hp`` (the target outputs held constant), stacked step by step
      (``p`` outputs per block).  The unconstrained optimum of the design's cost is
      ``dU* = H^-1 G' Q E``.
    - ``free_prediction``, shape (Np*p,): ``F``, the controlled outputs predicted at steps
      ``Hw..Hp`` if every future move is zero (disturbance estimate included); the
      prediction with moves ``dU`` is ``F + G dU`` with ``G = design.prediction.moves``
      — what an output-limit constraint needs.
    - ``previous_input``, shape (m,): ``u(k-1)`` — what input-level and move limits need
      (``u(k+j) = u(k-1) + du(k) + ... + du(k+j)``).
    - ``step``: ``k``, the index of the simulated step (for logging or time-varying limits).
    - ``target_input``, shape (m,), only when the design has an input weight: ``u_s(k)``, the
      steady-state target's input that the input penalty pulls towards.
    - ``terminal_error``, shape (n+m,), only when the design has the Riccati terminal weight:
      ``e_t = xi_s - Phi xi(k)``, the free terminal prediction's distance to the steady-state
      target (module notes); the cost's gradient gains ``Gamma' P e_t``.

    A policy with state (a warm start) keeps it on itself; the loop builds no copy.
    Return a :class:`PolicyStep` with ``move`` of shape (m,) and finite values.
    """

    def __call__(
        self,
        *,
        error: NDArray[np.float64],
        free_prediction: NDArray[np.float64],
        previous_input: NDArray[np.float64],
        step: int,
        target_input: NDArray[np.float64] | None = None,
        terminal_error: NDArray[np.float64] | None = None,
    ) -> PolicyStep: ...


class TargetRule(Protocol):
    """Computes the steady-state target of one step from the setpoint and the disturbance estimate.

    The loop calls it once per step, in order, with keyword arguments only::

        rule(setpoint=r, disturbance=d) -> (z_s, u_s)

    With an input weight the loop also passes ``input_target=u_t(k)`` (shape (m,)).  With the
    Riccati terminal weight it passes ``with_state=True`` and the rule returns ``(z_s, u_s,
    x_s)``: the terminal target needs the steady state's plant states ``x_s`` (n,) as well.

    With measured disturbances the loop also passes ``measured_disturbance=d_m(k)`` (shape
    (md,)), and the rule's steady state must be the one under them (inputs, states and, where
    a setpoint is not reachable, outputs all move with ``d_m``).

    ``setpoint`` has shape (p,) (``r(k)``), ``disturbance`` shape (nd,) (the disturbance part
    of ``x(k|k)``; empty without a disturbance model), both in the design's signals; the rule
    returns the target outputs ``z_s`` (p,), which the controller tracks, and the target
    inputs ``u_s`` (m,), which the loop records.  The rule must not change its arguments; a
    rule with state keeps it on itself.
    """

    def __call__(
        self,
        *,
        setpoint: NDArray[np.float64],
        disturbance: NDArray[np.float64],
        input_target: NDArray[np.float64] | None = None,
        with_state: bool = False,
        measured_disturbance: NDArray[np.float64] | None = None,
    ) -> tuple[NDArray[np.float64], ...]: ...


@dataclass(frozen=True)
class UnconstrainedPolicy:
    """The design's fixed law ``du(k) = Kh E [+ Kt0 (u_s - u(k-1))] [+ Kt e_t]`` (no limits); reports nothing.

    Attributes
    ----------
    horizon_gain : ndarray, shape (m, Np*p)
        ``Kh`` (``ControllerDesign.gain.horizon``).
    target_gain : ndarray, shape (m, m), optional
        ``Kt0`` (``ControllerDesign.input_target_gain``) with an input weight.
    terminal_gain : ndarray, shape (m, n+m), optional
        ``Kt`` (``ControllerDesign.terminal_gain``) with the Riccati terminal weight.
    """

    horizon_gain: NDArray[np.float64]
    target_gain: NDArray[np.float64] | None = None
    terminal_gain: NDArray[np.float64] | None = None

    def __call__(
        self,
        *,
        error: NDArray[np.float64],
        free_prediction: NDArray[np.float64],
        previous_input: NDArray[np.float64],
        step: int,
        target_input: NDArray[np.float64] | None = None,
        terminal_error: NDArray[np.float64] | None = None,
    ) -> PolicyStep:
        move = self.horizon_gain @ error
        if self.target_gain is not None:
            assert target_input is not None, "a design with input targets needs target_input"
            move = move + self.target_gain @ (target_input - previous_input)
        if self.terminal_gain is not None:
            assert terminal_error is not None, "a design with a terminal weight needs terminal_error"
            move = move + self.terminal_gain @ terminal_error
        return PolicyStep(move)


@dataclass(frozen=True)
class Event:
    """A change that holds from ``step`` on: a new setpoint or a new disturbance level.

    Attributes
    ----------
    step : int
        ``0 <= step < steps``.
    value : ndarray
        Shape (p,) for setpoints and output disturbances, (m,) for input disturbances,
        (md,) for measured disturbances.
    """

    step: int
    value: NDArray[np.float64]


@dataclass(frozen=True)
class TruePlant:
    """The plant the loop runs on: the model's inputs and outputs, possibly other numbers.

    Its state count ``nt`` may differ from the model's ``n`` (a longer dead time, a lag the
    model leaves out); the run then starts from rest (see the module notes).  ``full_state``
    reads the true state, so it needs ``nt = n``.

    Attributes
    ----------
    a : ndarray, shape (nt, nt)
    b : ndarray, shape (nt, m)
    c : ndarray, shape (p, nt)
    b_disturbance : ndarray, shape (nt, md), optional
        How the measured disturbances enter the true plant; required when the loop has
        measured disturbances (``simulate_loop(..., b_disturbance=...)``).
    c_measured : ndarray, shape (py, nt), optional
        The true plant's measured outputs (default ``c``); as many as the estimator reads.
    d_measured : ndarray, shape (py, m), optional
        Their feed-through (default zero); it must equal the estimator's (module notes).
    """

    a: NDArray[np.float64]
    b: NDArray[np.float64]
    c: NDArray[np.float64]
    b_disturbance: NDArray[np.float64] | None = None
    c_measured: NDArray[np.float64] | None = None
    d_measured: NDArray[np.float64] | None = None


@dataclass(frozen=True)
class Scenario:
    """A run: its length, its events, its noise and where it starts.

    Attributes
    ----------
    steps : int
        Number of simulated steps (>= 1).
    setpoint_changes, output_disturbances, input_disturbances : sequence of Event
        Applied in order of step; for equal steps the later in the sequence wins.
    measured_disturbances : sequence of Event
        Levels of the measured disturbances ``d_m`` (start at zero); only with
        ``simulate_loop(..., b_disturbance=...)``.
    noise_std : ndarray, shape (py,), optional
        Standard deviation of the measurement noise per measured output (default: none).
    seed : int
        Seed of ``numpy.random.default_rng`` (default 0).
    initial_state : ndarray, shape (n,), optional
        ``x(0)`` of the true plant (default zeros).
    initial_input : ndarray, shape (m,), optional
        ``u(-1)`` (default zeros).
    initial_setpoint : ndarray, shape (p,), optional
        Setpoint before the first change (default ``C_true x(0)``).
    input_targets : ndarray, shape (m,), optional
        ``u_t`` before the first change (default zeros); used only with an input weight.
    input_target_changes : sequence of Event
        New input targets (m,), held from their step on.
    sample_time : float
        Time between steps (default 1); sets the ``time`` axis only.
    """

    steps: int
    setpoint_changes: Sequence[Event] = ()
    output_disturbances: Sequence[Event] = ()
    input_disturbances: Sequence[Event] = ()
    measured_disturbances: Sequence[Event] = ()
    noise_std: NDArray[np.float64] | None = None
    seed: int = 0
    initial_state: NDArray[np.float64] | None = None
    initial_input: NDArray[np.float64] | None = None
    initial_setpoint: NDArray[np.float64] | None = None
    input_targets: NDArray[np.float64] | None = None
    input_target_changes: Sequence[Event] = ()
    sample_time: float = 1.0


@dataclass(frozen=True)
class Simulation:
    """The time series of a run, one row per step ``k = 0 .. steps-1``.

    Attributes
    ----------
    time : ndarray, shape (steps,)
        ``k * sample_time``.
    outputs : ndarray, shape (steps, p)
        True controlled outputs ``y(k) = C_true x(k) + d_out(k)`` (noise-free).
    measured : ndarray, shape (steps, py)
        ``y_m(k)``, the measured outputs with noise (their feed-through included); the estimator
        read ``y_m(k) - Dy u(k)``.
    inputs : ndarray, shape (steps, m)
        ``u(k)``, applied from step ``k`` to ``k+1``.
    moves : ndarray, shape (steps, m)
        ``du(k) = u(k) - u(k-1)``.
    setpoints : ndarray, shape (steps, p)
        ``r(k)``.
    targets : ndarray, shape (steps, p)
        ``z_s(k)``, the target outputs handed to the controller (equal to ``r(k)`` when the
        setpoint is reachable).
    target_inputs : ndarray, shape (steps, m)
        ``u_s(k)``.
    estimates : ndarray, shape (steps, na)
        ``x(k|k)`` = [plant states; disturbance estimate].  The true state for ``full_state``.
    disturbance_estimates : ndarray, shape (steps, nd)
        The disturbance part of ``estimates``.
    states : ndarray, shape (steps, nt)
        True plant states ``x(k)``.
    reports : list
        ``PolicyStep.report`` of every step (``None`` for the unconstrained policy).
    diverged_at : int or None
        First step whose values were not computed because the run blew up (those rows are
        NaN); ``None`` when the run completed.
    initial_input : ndarray, shape (m,)
        ``u(-1)``.
    initial_setpoint : ndarray, shape (p,)
        Setpoint before step 0.
    measured_disturbances : ndarray, shape (steps, md)
        ``d_m(k)`` (no columns without measured disturbances).
    """

    time: NDArray[np.float64]
    outputs: NDArray[np.float64]
    measured: NDArray[np.float64]
    inputs: NDArray[np.float64]
    moves: NDArray[np.float64]
    setpoints: NDArray[np.float64]
    targets: NDArray[np.float64]
    target_inputs: NDArray[np.float64]
    estimates: NDArray[np.float64]
    disturbance_estimates: NDArray[np.float64]
    states: NDArray[np.float64]
    reports: list[object | None] = field(repr=False)
    diverged_at: int | None
    initial_input: NDArray[np.float64]
    initial_setpoint: NDArray[np.float64]
    measured_disturbances: NDArray[np.float64] = field(default_factory=lambda: np.zeros((0, 0)))


def measured_output_map(
    c: NDArray[np.float64], c_measured: NDArray[np.float64], d_measured: NDArray[np.float64] | None = None
) -> NDArray[np.float64]:
    """``H`` (py, p): 1 where measured output ``i`` is controlled output ``j``'s own signal.

    Parameters
    ----------
    c : ndarray, shape (p, n)
        Controlled outputs.
    c_measured : ndarray, shape (py, n)
    d_measured : ndarray, shape (py, m), optional

    Returns
    -------
    ndarray, shape (py, p)
        ``H[i, j] = 1`` when row ``i`` of ``c_measured`` equals row ``j`` of ``c`` (within
        ``1e-12`` of its size) and measured output ``i`` has no feed-through; an output
        disturbance ``d_out`` then adds ``H d_out`` to the measurements.  The identity when the
        measured outputs are the controlled ones.
    """
    py, p = c_measured.shape[0], c.shape[0]
    if c_measured.shape == c.shape and np.array_equal(c_measured, c) and (d_measured is None or not np.any(d_measured)):
        return np.eye(p)
    h = np.zeros((py, p))
    for i in range(py):
        if d_measured is not None and np.any(d_measured[i]):
            continue
        for j in range(p):
            size = max(float(np.abs(c[j]).max(initial=0.0)), float(np.abs(c_measured[i]).max(initial=0.0)))
            if size > 0 and float(np.abs(c_measured[i] - c[j]).max()) <= 1e-12 * size:
                h[i, j] = 1.0
                break
    return h


def _held(events: Sequence[Event], steps: int, initial: NDArray[np.float64]) -> NDArray[np.float64]:
    """Row ``k`` holds the value of the last event at or before ``k`` (``initial`` before).

    Each row is written once (an event fills up to the next one), so many events cost no more
    than one.
    """
    out = np.tile(initial, (steps, 1))
    ordered = sorted(events, key=lambda e: e.step)  # stable: at equal steps the later wins
    for i, event in enumerate(ordered):
        value = np.asarray(event.value, dtype=float)
        assert 0 <= event.step < steps and value.shape == initial.shape, (event.step, value.shape)
        end = ordered[i + 1].step if i + 1 < len(ordered) else steps
        out[event.step : end] = value
    return out


def _vector(value: ArrayLike | None, size: int) -> NDArray[np.float64]:
    out = np.zeros(size) if value is None else np.asarray(value, dtype=float).reshape(-1)
    assert out.shape == (size,), (out.shape, size)
    return out


@dataclass(frozen=True)
class _FixedLaw:
    """The fixed law ``du = Kh E`` folded into the few numbers that change at each step.

    With ``E = (1 (x) I_p) z_s - Fx x(k|k) - Fu u(k-1) - Fd d_m(k)`` and ``z_s = Z_r r +
    Z_d d(k|k)`` the move is ``du(k) = reference[k] - state x(k|k) - previous_input u(k-1)``:
    the products with the prediction matrices (``Np p`` rows) are formed once.
    """

    reference: NDArray[np.float64]  # (steps, m): Kh (1 (x) I_p) Z_r r(k) - Kh Fd d_m(k) [+ Kt0 u_s part]
    state: NDArray[np.float64]  # (m, na): Kh Fx, less Kh (1 (x) I_p) Z_d on the disturbance states
    previous_input: NDArray[np.float64]  # (m, m): Kh Fu [+ Kt0]


def _fixed_law(
    horizon_gain: NDArray[np.float64],
    *,
    targets_r: NDArray[np.float64],
    z_d: NDArray[np.float64] | None,
    dsl: slice,
    fx: NDArray[np.float64],
    fu: NDArray[np.float64],
    fd: NDArray[np.float64] | None,
    d_meas: NDArray[np.float64],
    penalized_steps: int,
    target_gain: NDArray[np.float64] | None = None,
    target_inputs_r: NDArray[np.float64] | None = None,
    u_d: NDArray[np.float64] | None = None,
    terminal: TerminalTerm | None = None,
    setpoints: NDArray[np.float64] | None = None,
    input_targets: NDArray[np.float64] | None = None,
) -> _FixedLaw:
    """Fold :class:`UnconstrainedPolicy`'s ``Kh`` (and ``Kt0``, ``Kt``) into the pieces of :class:`_FixedLaw`.

    With an input weight the policy adds ``Kt0 (u_s(k) - u(k-1))``, ``u_s(k) = U_r r(k) +
    U_t u_t(k) + U_d d(k|k)`` (``target_inputs_r`` holds the first two terms): linear too.
    With the terminal weight it adds ``Kt e_t``, ``e_t = X_r r(k) + X_d d(k|k) - Phi_a x(k|k) -
    Phi_u u(k-1)`` (:class:`service.solver.estimation.loop.TerminalTerm`; ``setpoints`` holds
    ``r(k)``): the reference gains ``Kt X_r r(k)``, the state gain ``Kt Phi_a`` less ``Kt X_d``
    on the disturbance states, the previous-input gain ``Kt Phi_u``.  With both, ``e_t`` gains
    ``X_t u_t(k)`` (``input_targets`` holds ``u_t(k)``), so the reference gains ``Kt X_t u_t(k)``.
    """
    p = targets_r.shape[1]
    kz = horizon_gain @ np.tile(np.eye(p), (penalized_steps, 1))  # (m, p)
    state = horizon_gain @ fx
    if z_d is not None:
        state[:, dsl] -= kz @ z_d
    reference = targets_r @ kz.T
    if fd is not None:
        reference -= d_meas @ (horizon_gain @ fd).T
    previous_input = horizon_gain @ fu
    if target_gain is not None:
        assert target_inputs_r is not None
        reference += target_inputs_r @ target_gain.T
        previous_input = previous_input + target_gain
        if u_d is not None:
            state[:, dsl] -= target_gain @ u_d
    if terminal is not None:
        assert setpoints is not None
        kt = terminal.gain
        reference += setpoints @ (kt @ terminal.setpoint_map).T
        if terminal.input_target_map is not None:
            assert input_targets is not None
            reference += input_targets @ (kt @ terminal.input_target_map).T
        if fd is not None:  # - Kt (Phi_m - X_m) d_m(k)
            reference -= d_meas @ terminal.feedforward.T
        state = state + kt @ terminal.free_state
        if terminal.disturbance_map.shape[1]:
            state[:, dsl] -= kt @ terminal.disturbance_map
        previous_input = previous_input + kt @ terminal.free_input
    return _FixedLaw(reference=reference, state=state, previous_input=previous_input)


@dataclass(frozen=True)
class _LinearRun:
    """The rows of a fixed-law run up to (and including) the step it diverged at, if any."""

    rows: int
    states: NDArray[np.float64]  # (rows, nt): x(k)
    estimates: NDArray[np.float64]  # (rows, na): x(k|k)
    inputs: NDArray[np.float64]  # (rows, m): u(k)
    moves: NDArray[np.float64]  # (rows, m): du(k)


def _linear_run(
    law: _FixedLaw,
    *,
    true: tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]],
    model: tuple[
        NDArray[np.float64], NDArray[np.float64], NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]
    ],
    full: bool,
    start: tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]],
    offset: NDArray[np.float64],
    d_in: NDArray[np.float64],
    d_meas: NDArray[np.float64],
) -> _LinearRun:
    """The loop with the fixed law as one linear recursion ``s(k+1) = M s(k) + w(k)``.

    ``s(k) = [x(k); x(k|k-1); u(k-1)]`` (true plant state, predicted estimate, last input).
    With the fixed law every equation of a step (module notes) is linear in ``s(k)`` and the
    step's exogenous signals (setpoint, measurement offset and noise, input and measured
    disturbances): ``x(k|k) = Ex s(k) + L o(k)`` with ``Ex = [L C_t, I - L Cy, 0]`` (``[I, 0,
    0]`` for ``full_state``; ``C_t`` the true measured outputs, whose feed-through the filter has
    subtracted), ``u(k) = U s(k) + c(k)``, ``x(k+1) = A_t x + B_t (u(k) + d_u(k))
    + B_dt d_m(k)``, ``x(k+1|k) = A x(k|k) + B u(k) + B_d d_m(k)``.  So each step is one
    matrix-vector product; everything else is formed for all steps at once.  The numbers equal
    the step-by-step loop's to rounding (the products are grouped differently).

    Divergence is judged as in the step-by-step loop (:data:`DIVERGENCE_LIMIT` on
    ``|x(k+1)|^2``, ``|x(k+1|k)|^2`` and ``|u(k)|^2``); the run stops at the first step that
    breaks it.
    """
    at, bt, cmt, bdt = true  # cmt: the true plant's measured outputs
    aa, ba, bda, gain, cy = model
    x0, xp0, u0 = start
    nt, na, m = at.shape[0], aa.shape[0], ba.shape[1]
    steps = offset.shape[0]
    # x(k|k) = ex @ s + el @ o(k)
    ex = np.zeros((na, nt + na + m))
    if full:
        ex[:, :nt] = np.eye(na, nt)
        el = np.zeros((na, offset.shape[1]))
    else:
        ex[:, :nt] = gain @ cmt
        ex[:, nt : nt + na] = np.eye(na) - gain @ cy
        el = gain
    # u(k) = ux @ s + c(k), c(k) = reference(k) - S L o(k)
    ux = -law.state @ ex
    ux[:, nt + na :] += np.eye(m) - law.previous_input
    c = law.reference - offset @ (law.state @ el).T
    into = np.vstack([bt, ba, np.eye(m)])  # how u(k) enters s(k+1)
    transition = into @ ux
    transition[:nt, :nt] += at
    transition[nt : nt + na] += aa @ ex
    forcing = c @ into.T
    forcing[:, :nt] += d_in @ bt.T + d_meas @ bdt.T
    forcing[:, nt : nt + na] += offset @ (aa @ el).T + d_meas @ bda.T
    trajectory = np.empty((steps + 1, nt + na + m))
    trajectory[0] = np.concatenate([x0, xp0, u0])
    with np.errstate(over="ignore", invalid="ignore"):
        s = trajectory[0]
        for k in range(steps):
            s = transition @ s + forcing[k]
            trajectory[k + 1] = s
        after = trajectory[1:]
        sizes = np.stack(
            [
                np.einsum("ij,ij->i", after[:, :nt], after[:, :nt]),
                np.einsum("ij,ij->i", after[:, nt : nt + na], after[:, nt : nt + na]),
                np.einsum("ij,ij->i", after[:, nt + na :], after[:, nt + na :]),
            ]
        )
        broken = np.flatnonzero(~np.all(sizes < DIVERGENCE_LIMIT, axis=0))
        rows = int(broken[0]) + 1 if broken.size else steps
        now = trajectory[:rows]
        inputs = trajectory[1 : rows + 1, nt + na :]
        return _LinearRun(
            rows=rows,
            states=now[:, :nt].copy(),
            estimates=now @ ex.T + offset[:rows] @ el.T,
            inputs=inputs.copy(),
            moves=inputs - now[:, nt + na :],
        )


def simulate_loop(
    design: ControllerDesign,
    estimator: Estimator,
    scenario: Scenario,
    *,
    plant: TruePlant | None = None,
    policy: MovePolicy | None = None,
    loop: ControlLoop | None = None,
    b_disturbance: ArrayLike | None = None,
    target_rule: TargetRule | None = None,
) -> Simulation:
    """Simulate the closed loop of a scenario (see the module notes for one step).

    Parameters
    ----------
    design : ControllerDesign
    estimator : Estimator
        Designed on the same model as ``design``.
    scenario : Scenario
    plant : TruePlant, optional
        The plant the loop runs on (default: the model itself, no mismatch).
    policy : MovePolicy, optional
        Default ``UnconstrainedPolicy(design.gain.horizon)``.
    loop : ControlLoop, optional
        ``control_loop(design, estimator)`` when already formed.
    b_disturbance : array_like, shape (n, md), optional
        The model's measured-disturbance matrix ``Bd``, in the units of the design: the
        loop then reads ``scenario.measured_disturbances`` and feeds them forward (module
        notes).  ``plant``, when given, must carry its own ``b_disturbance``.
    target_rule : TargetRule, optional
        Replaces the linear target maps ``z_s = Z_r r + Z_d d`` (default: those maps, the
        unconstrained target of :mod:`service.solver.estimation.target`).

    Returns
    -------
    Simulation

    Notes
    -----
    Everything constant is formed before the loop (noise, event levels, target maps); a
    step is a handful of small matrix-vector products, so 10^5 steps of a small plant take
    seconds (``tests/bench/bench_simulation.py``).  With the fixed law (the default
    :class:`UnconstrainedPolicy` and no target rule) the whole step is linear in the state
    and runs as one recursion ``s(k+1) = M s(k) + w(k)`` (one product per step), equal to
    the step-by-step loop to rounding.
    """
    loop = control_loop(design, estimator) if loop is None else loop
    est = loop.estimator
    n, nd, na = est.state_size, est.disturbance_size, est.augmented_size
    m, p = est.b.shape[1], est.c_controlled.shape[0]
    bd = np.zeros((n, 0)) if b_disturbance is None else np.asarray(b_disturbance, dtype=float)
    md = bd.shape[1]
    if plant is None:
        own = not est.full_state
        plant = TruePlant(
            est.model_a,
            est.model_b,
            est.model_c,
            bd,
            c_measured=est.model_c_measured if own else None,
            d_measured=est.measured_feedthrough if own else None,
        )
    true = plant
    at, bt, ct = (np.asarray(v, dtype=float) for v in (true.a, true.b, true.c))
    nt = at.shape[0]
    assert at.shape == (nt, nt) and bt.shape == (nt, m) and ct.shape == (p, nt), (at.shape, bt.shape, ct.shape)
    cmt = ct if true.c_measured is None else np.asarray(true.c_measured, dtype=float)
    py = cmt.shape[0]
    dmt = np.zeros((py, m)) if true.d_measured is None else np.asarray(true.d_measured, dtype=float)
    assert cmt.shape == (py, nt) and dmt.shape == (py, m), (cmt.shape, dmt.shape)
    # the filter reads y_m - Dy u(k): explicit only when the true feed-through is the model's (module notes)
    assert est.full_state or (py == est.c_measured.shape[0] and np.array_equal(dmt, est.feedthrough)), (py, dmt)
    seen = measured_output_map(ct, cmt, dmt)  # H: the output disturbances the measurements see
    assert nt == n or (scenario.initial_state is None and not est.full_state), (nt, n)
    bdt = np.zeros((nt, 0)) if true.b_disturbance is None else np.asarray(true.b_disturbance, dtype=float)
    assert bd.shape == (n, md) and bdt.shape == (nt, md), (bd.shape, bdt.shape)
    steps = int(scenario.steps)
    assert steps >= 1, steps
    pulled = loop.design.input_target_gain is not None
    term = loop.terminal
    # the target equations under the held measured disturbances: Z_m, U_m (and X_m below)
    under_dm = measured_target(est.model_a, est.model_b, est.model_c, bd, loop.design) if md else None
    if term is not None and md:
        term = terminal_term(loop.design, est, loop.target, b_disturbance=bd, measured=under_dm)
    if policy is None:
        policy = UnconstrainedPolicy(
            loop.horizon_gain, loop.design.input_target_gain, None if term is None else term.gain
        )

    x0 = _vector(scenario.initial_state, n)
    xt0 = x0 if nt == n else np.zeros(nt)
    u0 = _vector(scenario.initial_input, m)
    r0 = ct @ xt0 if scenario.initial_setpoint is None else _vector(scenario.initial_setpoint, p)
    setpoints = _held(scenario.setpoint_changes, steps, r0)
    d_out = _held(scenario.output_disturbances, steps, np.zeros(p))
    d_in = _held(scenario.input_disturbances, steps, np.zeros(m))
    d_meas = _held(scenario.measured_disturbances, steps, np.zeros(md))
    u_targets = _held(scenario.input_target_changes, steps, _vector(scenario.input_targets, m))
    if md:
        pred = loop.design.prediction
        fd = disturbance_free_response(
            est.a,
            np.vstack([bd, np.zeros((nd, md))]),
            est.c_controlled,
            prediction=pred.prediction,
            first_penalized=pred.first_penalized,
        )
        bda = np.vstack([bd, np.zeros((nd, md))])
    rng = np.random.default_rng(scenario.seed)
    noise = np.zeros((steps, py))
    if scenario.noise_std is not None:
        noise = rng.standard_normal((steps, py)) * _vector(scenario.noise_std, py)
    offset = d_out @ seen.T + noise  # what adds to Cy_true x in what the filter reads

    target = loop.target
    targets_r = setpoints @ target.output_setpoint_map.T  # Z_r r(k), all steps at once
    target_inputs_r = setpoints @ target.setpoint_map[n:].T
    if pulled:
        target_inputs_r = target_inputs_r + u_targets @ target.input_target_map[n:].T  # + U_t u_t(k)
    if under_dm is not None:  # + Z_m d_m(k), U_m d_m(k): the target under the held measured disturbances
        targets_r = targets_r + d_meas @ under_dm.output_disturbance_map.T
        target_inputs_r = target_inputs_r + d_meas @ under_dm.disturbance_map[n:].T
    z_d = target.output_disturbance_map
    u_d = target.disturbance_map[n:]
    use_d = nd > 0 and bool(np.any(z_d) or np.any(u_d))
    dsl = est.disturbance_slice
    fx, fu, np_ = loop.free_state, loop.free_input, loop.penalized_steps
    gain, cy, aa, ba = est.gain, est.c_measured, est.a, est.b
    full = est.full_state

    outputs = np.full((steps, p), np.nan)
    measured = np.full((steps, py), np.nan)
    inputs = np.full((steps, m), np.nan)
    moves = np.full((steps, m), np.nan)
    targets = np.full((steps, p), np.nan)
    target_inputs = np.full((steps, m), np.nan)
    estimates = np.full((steps, na), np.nan)
    states = np.full((steps, nt), np.nan)
    reports: list[object | None] = []
    diverged_at: int | None = None

    x, u = xt0, u0
    xp = np.concatenate([x0, np.zeros(nd)])
    if type(policy) is UnconstrainedPolicy and target_rule is None:
        law = _fixed_law(
            policy.horizon_gain,
            targets_r=targets_r,
            z_d=z_d if use_d else None,
            dsl=dsl,
            fx=fx,
            fu=fu,
            fd=fd if md else None,
            d_meas=d_meas,
            penalized_steps=np_,
            target_gain=policy.target_gain,
            target_inputs_r=target_inputs_r,
            u_d=u_d if use_d else None,
            terminal=term,
            setpoints=setpoints,
            input_targets=u_targets if pulled else None,
        )
        run = _linear_run(
            law,
            true=(at, bt, cmt, bdt),
            model=(aa, ba, bda if md else np.zeros((na, 0)), gain, cy),
            full=full,
            start=(x, xp, u),
            offset=offset,
            d_in=d_in,
            d_meas=d_meas,
        )
        rows = run.rows
        diverged_at = rows if rows < steps else None
        states[:rows], estimates[:rows], inputs[:rows], moves[:rows] = run.states, run.estimates, run.inputs, run.moves
        measured[:rows] = run.states @ cmt.T + run.inputs @ dmt.T + offset[:rows]
        outputs[:rows] = run.states @ ct.T + d_out[:rows]
        targets[:rows] = targets_r[:rows]
        target_inputs[:rows] = target_inputs_r[:rows]
        if use_d:
            d = estimates[:rows, dsl]
            targets[:rows] += d @ z_d.T
            target_inputs[:rows] += d @ u_d.T
    else:
        with np.errstate(over="ignore", invalid="ignore"):
            for k in range(steps):
                y = ct @ x
                ym = cmt @ x + offset[k]  # y_m(k) - Dy u(k): what the filter reads
                xf = x if full else xp + gain @ (ym - cy @ xp)
                xs = None
                if target_rule is not None:
                    extra: dict[str, Any] = {}
                    if term is not None:
                        extra["with_state"] = True
                    if pulled:
                        extra["input_target"] = u_targets[k]
                    if md:
                        extra["measured_disturbance"] = d_meas[k]
                    ruled = target_rule(setpoint=setpoints[k], disturbance=xf[dsl], **extra)
                    zs, us = ruled[0], ruled[1]
                    if term is not None:  # the rule's steady state holds X_m d_m already
                        xs = np.concatenate([ruled[2], us])
                else:
                    zs = targets_r[k]
                    us = target_inputs_r[k]
                    if term is not None:
                        xs = term.setpoint_map @ setpoints[k]
                        if term.input_target_map is not None:
                            xs = xs + term.input_target_map @ u_targets[k]
                    if use_d:
                        d = xf[dsl]
                        zs = zs + z_d @ d
                        us = us + u_d @ d
                    if term is not None and nd:
                        xs = xs + term.disturbance_map @ xf[dsl]
                free = fx @ xf + fu @ u
                if md:
                    free = free + fd @ d_meas[k]
                error = (zs - free.reshape(np_, p)).reshape(-1)  # (1 (x) I_p) z_s - free
                asked: dict[str, NDArray[np.float64]] = {}
                if pulled:
                    asked["target_input"] = us
                if term is not None:
                    assert xs is not None
                    terminal_error = xs - term.free_prediction(xf, u)
                    if md and target_rule is None:  # + (X_m - Phi_m) d_m
                        terminal_error = terminal_error + term.feedforward_shift @ d_meas[k]
                    elif md:  # the rule's steady state holds X_m d_m: - Phi_m d_m
                        assert term.free_measured is not None
                        terminal_error = terminal_error - term.free_measured @ d_meas[k]
                    asked["terminal_error"] = terminal_error
                result = policy(error=error, free_prediction=free, previous_input=u, step=k, **asked)
                du = np.asarray(result.move, dtype=float)
                assert du.shape == (m,), du.shape
                u = u + du
                outputs[k] = y + d_out[k]
                measured[k] = ym + dmt @ u
                inputs[k] = u
                moves[k] = du
                targets[k] = zs
                target_inputs[k] = us
                estimates[k] = xf
                states[k] = x
                reports.append(result.report)
                x = at @ x + bt @ (u + d_in[k])
                xp = aa @ xf + ba @ u
                if md:
                    x = x + bdt @ d_meas[k]
                    xp = xp + bda @ d_meas[k]
                if not (x @ x < DIVERGENCE_LIMIT and xp @ xp < DIVERGENCE_LIMIT and u @ u < DIVERGENCE_LIMIT):
                    if k + 1 < steps:
                        diverged_at = k + 1
                    break
    reports.extend([None] * (steps - len(reports)))
    return Simulation(
        time=np.arange(steps, dtype=np.float64) * float(scenario.sample_time),
        outputs=outputs,
        measured=measured,
        inputs=inputs,
        moves=moves,
        setpoints=setpoints,
        targets=targets,
        target_inputs=target_inputs,
        estimates=estimates,
        disturbance_estimates=estimates[:, dsl],
        states=states,
        reports=reports,
        diverged_at=diverged_at,
        initial_input=u0,
        initial_setpoint=r0,
        measured_disturbances=d_meas,
    )

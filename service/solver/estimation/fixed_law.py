"""The fixed unconstrained law with its estimator: measurements, setpoints, disturbances to inputs.

Without limits the controller with its estimator is a linear time-invariant system.  One
step of the loop (:mod:`service.solver.evaluation.simulation`), with ``x(k|k-1)`` the
prior estimate (plant states and disturbance estimate) and ``u(k-1)`` the last input ::

    x(k|k)   = M x(k|k-1) + L y(k),               M = I - L Cy
    u(k)     = (I - Ku) u(k-1) - K x(k|k) + Kr r(k) - Kd dm(k) [+ Kt u_t(k)]
    x(k+1|k) = A_a x(k|k) + B_a u(k) + Bd_a dm(k)

``K = Kh (Fx_a - (1 (x) I_p) Z_d S)`` is the feedback on the augmented estimate of
:func:`service.solver.estimation.realization.estimate_feedback_gain`, ``Kr = Kh (1 (x) Z_r)``
the setpoint gain through the steady-state target's setpoint map ``Z_r`` (the identity for a
reachable setpoint), ``Kd = Kh (Fd - 1 (x) Z_m)`` the feed-forward gain on the measured
disturbances (:mod:`service.solver.design.feedforward`; ``Z_m``, how a held measured
disturbance moves the target's outputs, is zero when every setpoint is reachable).

With the Riccati terminal weight the cost also holds ``|xi(k+Hp) - xi_s|^2_P`` on ``xi = [x;
u]``, whose gradient adds ``Kt e_t`` to the first move with the terminal error ::

    e_t = xi_s - xi_free(k+Hp) = X_r r + X_d d(k|k) - Phi_a x(k|k) - Phi_u u(k-1)

(:class:`service.solver.estimation.loop.TerminalTerm`: ``xi_s = X_r r + X_d d`` the estimator's
steady-state target, ``Phi = [Phi_a, Phi_u]`` the free prediction to the horizon's end).
Every term is linear in the estimate, the last input and the setpoint, so the law keeps its
form with ``K += Kt (Phi_a - X_d S)`` (in ``estimate_feedback_gain``), ``Ku += Kt Phi_u`` (in
the design's previous-input gain) and ``Kr += Kt X_r``; with measured disturbances ``e_t``
gains ``(X_m - Phi_m) d_m`` (:func:`service.solver.design.terminal.terminal_free_disturbance`),
so ``Kd += Kt (Phi_m - X_m)``.  With an input weight (input targets,
:mod:`service.solver.design.input_target`) ``Ku`` includes ``Kt0``, ``K`` and ``Kr`` the
target's input maps (``- Kt0 U_d S`` and ``+ Kt0 U_r``), and the input targets ``u_t`` are
inputs of the law through ``Kt = Kt0 U_t`` (with the terminal weight also ``+ Kt X_t``, the
terminal target's input-target map); with measured disturbances the target's inputs move by
``U_m d_m`` as well, so ``Kd -= Kt0 U_m``
(:func:`service.solver.design.feedforward.measured_target`).  On the law's state ``s = [x(k|k-1); u(k-1)]``
and its inputs ``w = [y; r; dm; u_t]`` (``u_t`` only with an input weight; substitution) ::

    u(k)   = Cu s + Du w,        Cu = [-K M, I - Ku],   Du = [-K L, Kr, -Kd, Kt]
    s(k+1) = Ap s + Bp w + Bu u(k)
    Ap = [[A_a M, 0], [0, 0]],   Bp = [[A_a L, 0, Bd_a, 0], [0, 0, 0, 0]],   Bu = [B_a; I]

The *split form* ``(Ap, Bp, Bu)`` lets a control system feed back the input it really
applied (after clamping to limits), so that the estimator and ``u(k-1)`` stay true to the
plant.  With ``u`` applied unchanged it is the linear system ::

    s(k+1) = (Ap + Bu Cu) s + (Bp + Bu Du) w
    [u; du] = [Cu; Cu - [0, I]] s + [Du; Du] w

whose outputs are the inputs and the input moves ``du = u(k) - u(k-1)``.

Measurements.  ``y`` are the measured outputs the estimator reads (``Cy``, ``py`` of them;
the controlled outputs unless the model has measured outputs of its own), the setpoints
``r`` belong to the ``pz`` controlled outputs.  For ``full_state`` the measurements are the
plant states themselves: ``L = I`` and ``Cy = I`` make ``M = 0``, so ``x(k|k) = y(k)`` and the
law's estimator states only hold the prediction ``x(k|k-1) = A x(k-1) + B u(k-1) + Bd dm(k-1)``
(what replaces a bad measurement).  A measured feed-through ``y = Cy x + Dy u(k)`` has no law
here: the estimator would subtract ``Dy u(k)`` of the input it is computing, so ``u(k)`` would
depend on a measurement that depends on ``u(k)`` (an algebraic loop a control system, which
reads its measurements before it writes its outputs, cannot close).  The estimator's
prediction of the measurements, ``y(k|k-1) = [Cy, 0] s``, replaces a bad measurement: the
innovation of that output is then zero and the estimate runs on the model for that step.

Everything here is in the design's (scaled) signals; :func:`law_in_units` changes the
units of every signal and state by diagonal spans (a change of coordinates ``s_e = T s``,
``w_e = W w``, ``u_e = S u``, common practice).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from service.solver.design.controller import ControllerDesign
from service.solver.design.feedforward import design_feedforward_gain, measured_target
from service.solver.estimation.estimator import Estimator
from service.solver.estimation.loop import estimator_target, terminal_term
from service.solver.estimation.realization import StateSpace, estimate_feedback_gain

__all__ = ["FixedLaw", "fixed_law", "law_in_units"]


@dataclass(frozen=True)
class FixedLaw:
    """The unconstrained law with its estimator, in split form and as one LTI system.

    Attributes
    ----------
    input_state : ndarray, shape (m, ns)
        ``Cu``: ``u(k) = Cu s + Du w``; ``ns = na + m``.
    input_direct : ndarray, shape (m, nw)
        ``Du``; ``nw = py + pz + md + mt`` (measurements, setpoints of the controlled outputs,
        measured disturbances, input targets).
    state_update : ndarray, shape (ns, ns)
        ``Ap``.
    signal_update : ndarray, shape (ns, nw)
        ``Bp``.
    applied_update : ndarray, shape (ns, m)
        ``Bu``: how the applied input enters ``s(k+1)``.
    prediction : ndarray, shape (py, ns)
        ``[Cy, 0]``: the estimator's prediction ``y(k|k-1)`` of the measurements.
    measured, setpoints, disturbances, estimates : int
        ``py``, ``pz``, ``md`` inputs; ``na`` estimator states (then ``m`` previous inputs).
    targets : int
        ``mt``: ``m`` input-target inputs with an input weight, else 0.
    """

    input_state: NDArray[np.float64]
    input_direct: NDArray[np.float64]
    state_update: NDArray[np.float64]
    signal_update: NDArray[np.float64]
    applied_update: NDArray[np.float64]
    prediction: NDArray[np.float64]
    measured: int
    setpoints: int
    disturbances: int
    estimates: int
    targets: int = 0

    @property
    def inputs(self) -> int:
        """``m``, the manipulated variables."""
        return int(self.input_state.shape[0])

    @property
    def system(self) -> StateSpace:
        """The law as one LTI system ``w -> [u; du]`` (module notes), the input applied unchanged."""
        m, na = self.inputs, self.estimates
        a = self.state_update + self.applied_update @ self.input_state
        b = self.signal_update + self.applied_update @ self.input_direct
        previous = np.zeros((m, na + m))
        previous[:, na:] = np.eye(m)
        c = np.vstack([self.input_state, self.input_state - previous])
        d = np.vstack([self.input_direct, self.input_direct])
        return StateSpace(a=a, b=b, c=c, d=d)


def fixed_law(
    design: ControllerDesign,
    estimator: Estimator,
    *,
    b_disturbance: NDArray[np.float64] | None = None,
) -> FixedLaw:
    """Return the design's unconstrained law with its estimator (module notes).

    Parameters
    ----------
    design : ControllerDesign
        With the Riccati terminal weight the law holds its terminal term (module notes).
        With an input weight the law also takes the input
        targets (its last ``m`` inputs).
    estimator : Estimator
        Of the same model, without a measured feed-through (module notes).  ``full_state``
        gives the law on the measured plant states (``L = I``, ``Cy = I``).  With an input
        weight the law also takes the input targets ``u_t`` (its last ``m`` inputs).
    b_disturbance : ndarray, shape (n, md), optional
        The model's measured-disturbance matrix ``Bd`` in the design's signals.

    Returns
    -------
    FixedLaw
        Equal, step by step, to :func:`service.solver.evaluation.simulation.simulate_loop`
        with the unconstrained policy and the linear target maps.
    """
    assert estimator.measured_feedthrough is None, "a measured feed-through makes the law implicit (module notes)"
    na, m = estimator.b.shape
    p = estimator.c_measured.shape[0]  # measured outputs (the plant states for full_state)
    pz = estimator.c_controlled.shape[0]  # controlled outputs: the setpoints
    pred = design.prediction
    bd = np.zeros((estimator.state_size, 0)) if b_disturbance is None else np.asarray(b_disturbance, dtype=float)
    md = bd.shape[1]
    bda = np.vstack([bd, np.zeros((estimator.disturbance_size, md))])
    kh = design.gain.horizon
    feedback = estimate_feedback_gain(design, estimator)  # K, (m, na)
    target = estimator_target(design, estimator)
    setpoint_gain = kh @ np.tile(target.output_setpoint_map, (pred.penalized_steps, 1))  # Kh (1 (x) Z_r)
    kt0 = design.input_target_gain
    n = estimator.state_size
    target_gain = np.zeros((m, 0))
    if kt0 is not None:  # u_s = U_r r + U_d d + U_t u_t; U_d is in K already
        setpoint_gain = setpoint_gain + kt0 @ target.setpoint_map[n:]
        target_gain = kt0 @ target.input_target_map[n:]
    model = (estimator.model_a, estimator.model_b, estimator.model_c)
    under_dm = measured_target(*model, bd, design) if md else None  # S_m, Z_m: formed once for both
    terminal = terminal_term(design, estimator, target, b_disturbance=bd if md else None, measured=under_dm)
    if terminal is not None:  # Kt X_r: the setpoint's way through the terminal target
        setpoint_gain = setpoint_gain + terminal.gain @ terminal.setpoint_map
        if terminal.input_target_map is not None:  # Kt X_t: the input targets' way through it
            target_gain = target_gain + terminal.gain @ terminal.input_target_map
    mt = target_gain.shape[1]
    if md:  # the design's whole Kd (the same function as /design's answer)
        feedforward = design_feedforward_gain(design, *model, bd, target_outputs=True, measured=under_dm)
    else:
        feedforward = np.zeros((m, 0))
    lg, cy = estimator.gain, estimator.c_measured
    update = np.eye(na) - lg @ cy  # M
    cu = np.hstack([-feedback @ update, np.eye(m) - design.gain.previous_input])
    du = np.hstack([-feedback @ lg, setpoint_gain, -feedforward, target_gain])
    ns, nw = na + m, p + pz + md + mt
    ap = np.zeros((ns, ns))
    ap[:na, :na] = estimator.a @ update
    bp = np.zeros((ns, nw))
    bp[:na, :p] = estimator.a @ lg
    bp[:na, p + pz : p + pz + md] = bda
    bu = np.vstack([estimator.b, np.eye(m)])
    prediction = np.hstack([cy, np.zeros((p, m))])
    return FixedLaw(
        input_state=cu,
        input_direct=du,
        state_update=ap,
        signal_update=bp,
        applied_update=bu,
        prediction=prediction,
        measured=p,
        setpoints=pz,
        disturbances=md,
        estimates=na,
        targets=mt,
    )


def law_in_units(
    law: FixedLaw,
    *,
    state_span: NDArray[np.float64],
    signal_span: NDArray[np.float64],
    input_span: NDArray[np.float64],
    measured_span: NDArray[np.float64],
) -> FixedLaw:
    """Return the same law with every signal and state multiplied by its span.

    Parameters
    ----------
    law : FixedLaw
    state_span : ndarray, shape (ns,)
        ``T``: the new state is ``T s``.
    signal_span : ndarray, shape (nw,)
        ``W``: the new inputs are ``W w``.
    input_span : ndarray, shape (m,)
        ``S``: the new manipulated variables are ``S u``.
    measured_span : ndarray, shape (p,)
        The spans of the measurements (for the prediction ``y(k|k-1)``).

    Returns
    -------
    FixedLaw
        ``Cu_e = S Cu T^-1``, ``Du_e = S Du W^-1``, ``Ap_e = T Ap T^-1``, ``Bp_e = T Bp W^-1``,
        ``Bu_e = T Bu S^-1``, prediction ``P Cp T^-1`` (diagonal scalings, no inverse formed).
    """
    t, w, s, pm = (np.asarray(v, dtype=float) for v in (state_span, signal_span, input_span, measured_span))
    assert t.shape == (law.state_update.shape[0],) and w.shape == (law.signal_update.shape[1],), (t.shape, w.shape)
    assert s.shape == (law.inputs,) and pm.shape == (law.measured,), (s.shape, pm.shape)
    return FixedLaw(
        input_state=s[:, None] * law.input_state / t[None, :],
        input_direct=s[:, None] * law.input_direct / w[None, :],
        state_update=t[:, None] * law.state_update / t[None, :],
        signal_update=t[:, None] * law.signal_update / w[None, :],
        applied_update=t[:, None] * law.applied_update / s[None, :],
        prediction=pm[:, None] * law.prediction / t[None, :],
        measured=law.measured,
        setpoints=law.setpoints,
        disturbances=law.disturbances,
        estimates=law.estimates,
        targets=law.targets,
    )

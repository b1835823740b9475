"""Scaling signals by their typical span, so that weights compare like with like.

With a span per signal (its typical range in engineering units), the scaled signals are
``u_s = u / span_u``, ``z_s = z / span_z`` and ``d_s = d / span_d``.  The state is not
scaled.  For ``x+ = A x + B u + Bd d``, ``z = C x`` this gives ::

    x+ = A x + (B S_u) u_s + (Bd S_d) d_s,     z_s = (S_z^-1 C) x

with ``S = diag(span)``.  A controller designed on the scaled model, ``du_s = Kh_s E_s``,
acts in engineering units as ::

    Kx = S_u Kx_s,  Ku = S_u Ku_s S_u^-1,  Kr = S_u Kr_s S_z^-1,
    Kh = S_u Kh_s blockdiag(S_z^-1),  Kd = S_u Kd_s S_d^-1

(a change of units on each signal; common practice).  The closed-loop poles do not change.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from service.solver.design.gain import PredictiveGain

__all__ = ["ScaledPlant", "scale_plant", "unscale_feedforward", "unscale_gain"]


@dataclass(frozen=True)
class ScaledPlant:
    """The plant in scaled signals.

    Attributes
    ----------
    a : ndarray, shape (n, n)
    b : ndarray, shape (n, m)
        ``B S_u``.
    c : ndarray, shape (p, n)
        ``S_z^-1 C``.
    b_disturbance : ndarray, shape (n, md), or None
        ``Bd S_d``.
    """

    a: NDArray[np.float64]
    b: NDArray[np.float64]
    c: NDArray[np.float64]
    b_disturbance: NDArray[np.float64] | None


def scale_plant(
    a: NDArray[np.float64],
    b: NDArray[np.float64],
    c: NDArray[np.float64],
    *,
    input_span: NDArray[np.float64],
    output_span: NDArray[np.float64],
    b_disturbance: NDArray[np.float64] | None = None,
    disturbance_span: NDArray[np.float64] | None = None,
) -> ScaledPlant:
    """Return the plant in scaled signals (see the module docstring).

    Parameters
    ----------
    a : ndarray, shape (n, n)
    b : ndarray, shape (n, m)
    c : ndarray, shape (p, n)
    input_span : ndarray, shape (m,)
        Positive spans of the manipulated variables.
    output_span : ndarray, shape (p,)
        Positive spans of the controlled outputs.
    b_disturbance : ndarray, shape (n, md), optional
    disturbance_span : ndarray, shape (md,), optional
        Required with ``b_disturbance``.

    Returns
    -------
    ScaledPlant
    """
    bd = None
    if b_disturbance is not None:
        assert disturbance_span is not None
        bd = b_disturbance * disturbance_span[None, :]
    return ScaledPlant(a=a, b=b * input_span[None, :], c=c / output_span[:, None], b_disturbance=bd)


def unscale_gain(
    gain: PredictiveGain, *, input_span: NDArray[np.float64], output_span: NDArray[np.float64]
) -> PredictiveGain:
    """Return the gains of a scaled design in engineering units.

    Parameters
    ----------
    gain : PredictiveGain
        Designed on the scaled plant.
    input_span : ndarray, shape (m,)
    output_span : ndarray, shape (p,)

    Returns
    -------
    PredictiveGain
        ``Kh`` (m, Np*p), ``Kx`` (m, n), ``Ku`` (m, m), ``Kr`` (m, p) and ``Kt`` (m, m) in
        engineering units.
    """
    su, sz = input_span[:, None], output_span[None, :]
    steps = gain.horizon.shape[1] // output_span.size
    return PredictiveGain(
        horizon=su * gain.horizon / np.tile(output_span, steps)[None, :],
        state=su * gain.state,
        previous_input=su * gain.previous_input / input_span[None, :],
        setpoint=su * gain.setpoint / sz,
        input_target=None if gain.input_target is None else su * gain.input_target / input_span[None, :],
    )


def unscale_feedforward(
    gain: NDArray[np.float64], *, input_span: NDArray[np.float64], disturbance_span: NDArray[np.float64]
) -> NDArray[np.float64]:
    """Return ``Kd = S_u Kd_s S_d^-1`` (shape (m, md)) in engineering units."""
    return input_span[:, None] * gain / disturbance_span[None, :]

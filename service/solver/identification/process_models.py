"""Low-order process models with dead time, simulated exactly at the sample instants.

Structures of one input/output pair (``theta`` the dead time, ``K`` the gain; for the
integrating ones ``K`` is the ramp rate, output units per input unit per time unit)::

    first_order_dead_time              K e^(-theta s) / (tau s + 1)
    second_order_dead_time             K e^(-theta s) / ((tau1 s + 1)(tau2 s + 1))
    integrating_dead_time              K e^(-theta s) / s
    integrating_first_order_dead_time  K e^(-theta s) / (s (tau s + 1))

The input is held over each sample (zero-order hold) and the response is taken at the
sample instants.  Each pair's contribution is simulated exactly, fractional dead times
included, with the sampled element of :func:`service.solver.models.transfer.sampled_element`
(the modified z-transform of the delayed element) as a difference equation run by
``scipy.signal.lfilter`` from rest.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.signal
from numpy.typing import NDArray

from service.solver.models.transfer import TransferElement, sampled_element

__all__ = ["STRUCTURES", "Structure", "element_of", "pair_response", "parameter_names", "step_values"]

Structure = str

#: Parameters of each structure, in the order of a parameter vector.
STRUCTURES: dict[Structure, tuple[str, ...]] = {
    "first_order_dead_time": ("gain", "time_constant", "dead_time"),
    "second_order_dead_time": ("gain", "time_constant_1", "time_constant_2", "dead_time"),
    "integrating_dead_time": ("gain", "dead_time"),
    "integrating_first_order_dead_time": ("gain", "time_constant", "dead_time"),
}


def parameter_names(structure: Structure) -> tuple[str, ...]:
    """Names of the parameters of ``structure``, in vector order."""
    return STRUCTURES[structure]


@dataclass(frozen=True)
class _Filter:
    numerator: NDArray[np.float64]
    denominator: NDArray[np.float64]
    delay: int


def element_of(structure: Structure, theta: NDArray[np.float64]) -> TransferElement:
    """The transfer element of a parameter vector (time constants sorted, longest first)."""
    names = STRUCTURES[structure]
    values = dict(zip(names, (float(v) for v in theta), strict=True))
    taus = tuple(sorted((values[n] for n in names if n.startswith("time_constant")), reverse=True))
    return TransferElement(
        gain=values["gain"],
        time_constants=taus,
        dead_time=max(values["dead_time"], 0.0),
        integrating=structure.startswith("integrating"),
    )


def _filter(element: TransferElement, sample_time: float) -> _Filter:
    phi, gamma, c, d, delay = sampled_element(element, sample_time)
    if phi.shape[0] == 0:
        return _Filter(np.array([d]), np.array([1.0]), delay)
    numerator, denominator = scipy.signal.ss2tf(phi, gamma, c, np.array([[d]]))
    return _Filter(np.asarray(numerator[0], dtype=float), np.asarray(denominator, dtype=float), delay)


def pair_response(
    structure: Structure, theta: NDArray[np.float64], u: NDArray[np.float64], *, sample_time: float
) -> NDArray[np.float64]:
    """Response of one pair to an input sequence from rest, at the sample instants.

    Parameters
    ----------
    structure : str
        One of :data:`STRUCTURES`.
    theta : ndarray, shape (q,)
        Parameters in the order of :func:`parameter_names`; times in the sample time's unit.
    u : ndarray, shape (N,)
        Input deviations ``u(0) .. u(N-1)``, each held over its sample.
    sample_time : float, keyword-only

    Returns
    -------
    ndarray, shape (N,)
        ``y(0) .. y(N-1)``; ``y(0) = 0`` (nothing acts within the first sample).
    """
    f = _filter(element_of(structure, theta), sample_time)
    n = u.size
    shifted = np.zeros(n)
    if f.delay < n:
        shifted[f.delay :] = u[: n - f.delay]
    out: NDArray[np.float64] = scipy.signal.lfilter(f.numerator, f.denominator, shifted)
    return out


def step_values(
    structure: Structure, theta: NDArray[np.float64], steps: int, *, sample_time: float
) -> NDArray[np.float64]:
    """Unit-step response ``y(0) .. y(steps)`` of one pair (the step applied at ``k = 0``)."""
    return pair_response(structure, theta, np.ones(steps + 1), sample_time=sample_time)

"""Exact zero-order-hold sampling of a continuous-time state-space model.

For ``dx/dt = A x + B u + Bd d`` with ``u`` and ``d`` held constant between samples (a
zero-order hold), integrating the state equation over one sample time ``Ts`` gives the
exact discrete model ::

    x(k+1) = Phi x(k) + Gamma u(k) + Gamma_d d(k)
    Phi = e^(A Ts),    [Gamma  Gamma_d] = integral_0^Ts e^(A s) ds [B  Bd]

Both come from one matrix exponential of a block matrix (common practice; it is what
``scipy.signal.cont2discrete(method="zoh")`` does as well)::

    expm([[A, B], [0, 0]] * t) = [[e^(A t), integral_0^t e^(A s) ds B], [0, I]]

The output matrices are unchanged by the sampling (``C`` and ``D`` act at the sample
instants).  The exponential is computed by ``scipy.linalg.expm`` (scaling and squaring
with a Pade approximant); a model whose exponential overflows over one sample time is
reported as a :class:`service.errors.NumericalError`, never returned with infinities.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.linalg
from numpy.typing import ArrayLike, NDArray

from service.errors import FieldKey, NumericalError

__all__ = ["SampledModel", "hold_integrals", "sample_zero_order_hold"]


@dataclass(frozen=True)
class SampledModel:
    """The discrete matrices of a continuous model sampled under zero-order hold.

    Attributes
    ----------
    a : ndarray, shape (n, n)
        ``Phi = e^(A Ts)``.
    b : ndarray, shape (n, m)
        ``Gamma``, the held-input matrix of the manipulated variables.
    b_disturbance : ndarray, shape (n, md), or None
        ``Gamma_d`` of the measured disturbances; ``None`` when the model has none.
    sample_time : float
        ``Ts``, in the time unit of the continuous model.
    """

    a: NDArray[np.float64]
    b: NDArray[np.float64]
    b_disturbance: NDArray[np.float64] | None
    sample_time: float


def hold_integrals(
    a: NDArray[np.float64],
    b: NDArray[np.float64],
    interval: float,
    *,
    field: FieldKey = ("model",),
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Return ``e^(A t)`` and ``integral_0^t e^(A s) ds B`` for ``t = interval``.

    Parameters
    ----------
    a : ndarray, shape (n, n)
        Continuous state matrix.
    b : ndarray, shape (n, m)
        Continuous input matrix (any number of columns, also zero).
    interval : float
        ``t >= 0``, in the time unit of ``a``.
    field : tuple of str and int, keyword-only
        Key of the request field put on the error, naming the field a user should change.

    Returns
    -------
    transition : ndarray, shape (n, n)
    hold : ndarray, shape (n, m)

    Raises
    ------
    service.errors.NumericalError
        When the exponential is not finite (the model grows beyond double precision over
        ``interval``).

    Notes
    -----
    One ``scipy.linalg.expm`` of the (n+m) square block matrix ``[[A, B], [0, 0]] t``;
    its top blocks are the two results (see the module docstring).
    """
    n, m = b.shape
    assert a.shape == (n, n), (a.shape, b.shape)
    assert interval >= 0.0, interval
    block = np.zeros((n + m, n + m))
    block[:n, :n] = a * interval
    block[:n, n:] = b * interval
    with np.errstate(over="ignore", invalid="ignore"):
        exponential = scipy.linalg.expm(block)
    if not np.all(np.isfinite(exponential)):
        growth = np.linalg.eigvals(a).real
        raise NumericalError(
            f"The continuous model cannot be sampled: its matrix exponential over {interval:g} "
            f"time units is not finite in double precision (the state matrix has eigenvalues "
            f"with real parts from {growth.min():.3g} to {growth.max():.3g} per time unit). "
            f"Check the units of the state matrix and of the sample time.",
            field=field,
        )
    return exponential[:n, :n], exponential[:n, n:]


def sample_zero_order_hold(
    a: ArrayLike,
    b: ArrayLike,
    *,
    sample_time: float,
    b_disturbance: ArrayLike | None = None,
    field: FieldKey = ("model",),
) -> SampledModel:
    """Sample ``dx/dt = A x + B u + Bd d`` exactly under zero-order hold.

    Parameters
    ----------
    a : array_like, shape (n, n)
        Continuous state matrix, per time unit.
    b : array_like, shape (n, m)
        Continuous input matrix of the manipulated variables.
    sample_time : float, keyword-only
        ``Ts > 0``, in the same time unit as ``a``.
    b_disturbance : array_like, shape (n, md), optional
        Continuous input matrix of the measured disturbances (also held between samples).
    field : tuple of str and int, keyword-only
        Key of the model field, put on a :class:`~service.errors.NumericalError`.

    Returns
    -------
    SampledModel

    Raises
    ------
    service.errors.NumericalError
        When ``e^(A Ts)`` is not finite.

    Notes
    -----
    ``B`` and ``Bd`` share one exponential: the block matrix is
    ``[[A, B, Bd], [0, 0, 0]] Ts`` (see the module docstring).

    Examples
    --------
    A first-order lag ``dx/dt = (-x + u) / tau`` sampled at ``Ts`` has pole ``e^(-Ts/tau)``
    and input gain ``1 - e^(-Ts/tau)``:

    >>> s = sample_zero_order_hold([[-0.5]], [[0.5]], sample_time=1.0)
    >>> bool(np.isclose(s.a[0, 0], np.exp(-0.5)) and np.isclose(s.b[0, 0], 1 - np.exp(-0.5)))
    True
    """
    assert sample_time > 0.0, sample_time
    a_ = np.asarray(a, dtype=float)
    b_ = np.asarray(b, dtype=float)
    n, m = b_.shape
    if b_disturbance is None:
        inputs = b_
    else:
        bd_ = np.asarray(b_disturbance, dtype=float)
        assert bd_.shape[0] == n, (bd_.shape, b_.shape)
        inputs = np.hstack([b_, bd_])
    transition, hold = hold_integrals(a_, inputs, float(sample_time), field=field)
    return SampledModel(
        a=transition,
        b=hold[:, :m],
        b_disturbance=None if b_disturbance is None else hold[:, m:],
        sample_time=float(sample_time),
    )

"""Limits on the inputs, their moves and the controlled outputs, as arrays.

A limit that is absent is stored as an infinite bound (``-inf`` for a minimum, ``+inf`` for a
maximum); ``NaN`` on the way in means the same thing, so a schema can pass ``null`` straight
through as ``nan``.  Input and move limits are hard.  Output limits are soft: each bound that
is present carries one non-negative slack in the move QP, penalized linearly by the output's
``output_softness`` weight (an exact penalty, see :mod:`service.solver.limits.qp`).

The schema edge has already checked the user's numbers (min not above max, move limit above
zero, lengths, non-negative softness); :class:`Limits` only asserts them.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

__all__ = [
    "DEFAULT_OUTPUT_SOFTNESS",
    "LimitViolation",
    "Limits",
    "limit_violations",
    "make_limits",
]

#: Default linear penalty per unit of output-limit violation, in the units of the cost
#: ``|z - r|^2_Q`` per unit of the output.  Large, so that the penalty stays exact (above the
#: multiplier of every feasible output limit) for weights and signals of ordinary size; a
#: request with large weights or signals should raise it (common practice).
DEFAULT_OUTPUT_SOFTNESS = 1.0e5


def _bound(value: ArrayLike | None, size: int, missing: float, name: str) -> NDArray[np.float64]:
    """Return a float vector of ``size`` with ``None``/``NaN`` replaced by ``missing``."""
    if value is None:
        return np.full(size, missing)
    array = np.array(value, dtype=float)
    if array.ndim == 0:
        array = np.full(size, float(array))
    assert array.shape == (size,), f"{name} has shape {array.shape}, expected ({size},)"
    array[np.isnan(array)] = missing
    return array


@dataclass(frozen=True)
class Limits:
    """Limits of a predictive controller with m inputs and p controlled outputs.

    Attributes
    ----------
    input_min, input_max : ndarray, shape (m,)
        Hard bounds on the input ``u`` (engineering units); ``-inf``/``+inf`` where absent.
    move_max : ndarray, shape (m,)
        Hard bound on the move ``|du| = |u(k) - u(k-1)|`` per sample; ``+inf`` where absent.
    output_min, output_max : ndarray, shape (p,)
        Soft bounds on the controlled outputs ``z``; ``-inf``/``+inf`` where absent.
    output_softness : ndarray, shape (p,)
        Linear penalty weight per unit of violation of output ``j``'s bounds (cost units per
        output unit), applied to the slack of each bound that is present.

    Notes
    -----
    Build one with :func:`make_limits`, which accepts ``None`` and ``NaN`` for absent limits.
    Constructing the class directly normalizes ``NaN`` the same way.
    """

    input_min: NDArray[np.float64]
    input_max: NDArray[np.float64]
    move_max: NDArray[np.float64]
    output_min: NDArray[np.float64]
    output_max: NDArray[np.float64]
    output_softness: NDArray[np.float64]

    def __post_init__(self) -> None:
        m = np.size(self.input_min)
        p = np.size(self.output_min)
        fields = {
            "input_min": (m, -np.inf),
            "input_max": (m, np.inf),
            "move_max": (m, np.inf),
            "output_min": (p, -np.inf),
            "output_max": (p, np.inf),
            "output_softness": (p, DEFAULT_OUTPUT_SOFTNESS),
        }
        for name, (size, missing) in fields.items():
            value = _bound(getattr(self, name), size, missing, name)
            value.setflags(write=False)
            object.__setattr__(self, name, value)
        assert np.all(self.input_min <= self.input_max), "input_min above input_max"
        assert np.all(self.output_min <= self.output_max), "output_min above output_max"
        assert np.all(self.move_max > 0.0), "move_max must be positive"
        assert np.all(self.output_softness >= 0.0) and np.all(np.isfinite(self.output_softness))

    @property
    def inputs(self) -> int:
        """``m``, the number of inputs."""
        return int(self.input_min.size)

    @property
    def outputs(self) -> int:
        """``p``, the number of controlled outputs."""
        return int(self.output_min.size)

    @property
    def has_input_limits(self) -> bool:
        return bool(np.isfinite(self.input_min).any() or np.isfinite(self.input_max).any())

    @property
    def has_move_limits(self) -> bool:
        return bool(np.isfinite(self.move_max).any())

    @property
    def has_output_limits(self) -> bool:
        return bool(np.isfinite(self.output_min).any() or np.isfinite(self.output_max).any())

    @property
    def any(self) -> bool:
        """Whether any limit is present at all."""
        return self.has_input_limits or self.has_move_limits or self.has_output_limits


def make_limits(
    inputs: int,
    outputs: int,
    *,
    input_min: ArrayLike | None = None,
    input_max: ArrayLike | None = None,
    move_max: ArrayLike | None = None,
    output_min: ArrayLike | None = None,
    output_max: ArrayLike | None = None,
    output_softness: ArrayLike | float = DEFAULT_OUTPUT_SOFTNESS,
) -> Limits:
    """Return :class:`Limits` for m ``inputs`` and p ``outputs``.

    Parameters
    ----------
    inputs, outputs : int
        ``m`` and ``p``.
    input_min, input_max, move_max : array_like, shape (m,), or scalar, optional
        ``None`` (no limit on any input) or one value per input, ``NaN`` for "no limit".
    output_min, output_max : array_like, shape (p,), or scalar, optional
        As above, per controlled output.
    output_softness : array_like, shape (p,), or float
        Linear penalty weight per output (default :data:`DEFAULT_OUTPUT_SOFTNESS`).

    Returns
    -------
    Limits

    Examples
    --------
    >>> lim = make_limits(2, 1, input_max=[1.0, float("nan")], move_max=0.5)
    >>> lim.input_max.tolist(), lim.move_max.tolist(), lim.has_output_limits
    ([1.0, inf], [0.5, 0.5], False)
    """
    return Limits(
        input_min=_bound(input_min, inputs, -np.inf, "input_min"),
        input_max=_bound(input_max, inputs, np.inf, "input_max"),
        move_max=_bound(move_max, inputs, np.inf, "move_max"),
        output_min=_bound(output_min, outputs, -np.inf, "output_min"),
        output_max=_bound(output_max, outputs, np.inf, "output_max"),
        output_softness=_bound(output_softness, outputs, DEFAULT_OUTPUT_SOFTNESS, "output_softness"),
    )


@dataclass(frozen=True)
class LimitViolation:
    """The largest excess over each kind of limit along a trajectory (0 where none)."""

    input: NDArray[np.float64]
    move: NDArray[np.float64]
    output: NDArray[np.float64]


def limit_violations(
    limits: Limits,
    *,
    inputs: ArrayLike,
    previous_input: ArrayLike,
    outputs: ArrayLike | None = None,
) -> LimitViolation:
    """Return the largest violation of each limit along a trajectory.

    Parameters
    ----------
    limits : Limits
    inputs : array_like, shape (N, m)
        Applied inputs ``u(0) .. u(N-1)``.
    previous_input : array_like, shape (m,)
        ``u(-1)``, the input held before the first step (for the first move).
    outputs : array_like, shape (N, p), optional
        Controlled outputs to check against the (soft) output limits.

    Returns
    -------
    LimitViolation
        ``input`` (m,), ``move`` (m,) and ``output`` (p,): per signal, the largest amount by
        which a bound is exceeded (0 when it always holds).
    """
    u = np.atleast_2d(np.asarray(inputs, dtype=float))
    du = np.diff(np.vstack([np.asarray(previous_input, dtype=float)[None, :], u]), axis=0)
    over = np.maximum(u - limits.input_max, limits.input_min - u).max(axis=0, initial=0.0)
    fast = (np.abs(du) - limits.move_max).max(axis=0, initial=0.0)
    if outputs is None:
        out = np.zeros(limits.outputs)
    else:
        z = np.atleast_2d(np.asarray(outputs, dtype=float))
        out = np.maximum(z - limits.output_max, limits.output_min - z).max(axis=0, initial=0.0)
    return LimitViolation(input=np.maximum(over, 0.0), move=np.maximum(fast, 0.0), output=np.maximum(out, 0.0))

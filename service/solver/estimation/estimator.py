"""State estimation for the predictive controller: disturbance models and the Kalman filter.

The design core assumes the plant state is known.  Here the state, and where asked a constant
disturbance, is estimated from the measured outputs with the augmented model ::

    [x(k+1)]   [A  Bd] [x(k)]   [B]               y(k) = [C  Cd] [x(k); d(k)]
    [d(k+1)] = [0  I ] [d(k)] + [0] u(k)          z(k) = [C  Dz] [x(k); d(k)]

(``y`` measured, ``z`` controlled; in movecast every output is both, so ``Dz = Cd``).  The
disturbance models are

- ``"output_disturbance"``: one constant disturbance on each measured output,
  ``Bd = 0``, ``Cd = I_p`` (``nd = p``) — the default;
- ``"input_disturbance"``: one constant disturbance entering with each input,
  ``Bd = B``, ``Cd = 0`` (``nd = m``);
- ``"full_state"``: no estimator at all; the state is taken as measured (analysis only);
- ``"kalman"``: a steady-state Kalman filter from the given noise covariances, on the plant
  alone (``disturbance="none"``) or combined with either disturbance model above.

Every kind except ``full_state`` is a steady-state Kalman filter in *current-estimator*
(filter) form ::

    x(k|k)   = x(k|k-1) + L (y(k) - Cy x(k|k-1))            innovation e(k) = y(k) - Cy x(k|k-1)
    x(k+1|k) = A x(k|k) + B u(k)

with ``P`` the stabilizing solution of the filter Riccati equation (the dual of the control
equation, solved by ``scipy.linalg.solve_discrete_are(A', Cy', Qw, Rv)``) ::

    P = A P A' - A P Cy' S^-1 Cy P A' + Qw,     S = Cy P Cy' + Rv,     L = P Cy' S^-1

(the steady-state Kalman filter; Kalman 1960, standard form).  The prior estimation error
obeys ``e(k+1) = A (I - L Cy) e(k)``, so the estimator poles are the eigenvalues of
``(I - L Cy) A`` (the same as those of ``A (I - L Cy)``).  The disturbance kinds use default
covariances (:data:`DEFAULT_STATE_NOISE`, :data:`DEFAULT_DISTURBANCE_NOISE`,
:data:`DEFAULT_MEASUREMENT_NOISE`) unless covariances are given: the filter then trusts the
plant model and explains a persistent output error mostly by the disturbance, which it
tracks with a pole near 0.38 per channel.

Detectability.  The augmented pair is detectable if and only if ``(A, C)`` is detectable and ::

    rank [[I - A, -Bd], [C, Cd]] = n + nd

(Pannocchia and Rawlings 2003; it follows from the PBH test: at an eigenvalue
``z != 1`` the identity block ``(z - 1) I`` removes the disturbance columns, and at ``z = 1``
the PBH matrix is the one above).  The rank condition needs ``nd <= p`` — at most one
disturbance per measured output — and fails when a disturbance direction produces no
steady-state change in the measured outputs, i.e. when the plant has a zero at ``z = 1`` in
that direction (or, for output disturbances, a pole there: an integrator's drift is
indistinguishable from a constant output bias).  With ``nd = p`` the estimator removes the
steady-state offset under any model mismatch that leaves the loop stable (Muske and Badgwell
2002; Pannocchia and Rawlings 2003).

References
----------
R. E. Kalman, "A new approach to linear filtering and prediction problems", J. Basic Eng.
82 (1960) 35-45, doi:10.1115/1.3662552.
K. R. Muske and T. A. Badgwell, "Disturbance modeling for offset-free linear model predictive
control", J. Process Control 12 (2002) 617-632, doi:10.1016/S0959-1524(01)00051-8.
G. Pannocchia and J. B. Rawlings, "Disturbance models for offset-free model-predictive
control", AIChE J. 49 (2003) 426-437, doi:10.1002/aic.690490213.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal

import numpy as np
import scipy.linalg
from numpy.typing import ArrayLike, NDArray

from service.errors import NumericalError
from service.solver.design.weights import weight_matrix
from service.solver.models.properties import integrating_poles
from service.solver.numerics import equilibrated_rank

__all__ = [
    "DEFAULT_DISTURBANCE_NOISE",
    "DEFAULT_MEASUREMENT_NOISE",
    "DEFAULT_STATE_NOISE",
    "DETECTABILITY_TOLERANCE",
    "DisturbanceModel",
    "Estimator",
    "EstimatorKind",
    "augmented_model",
    "design_estimator",
    "kalman_filter",
]

EstimatorKind = Literal["full_state", "output_disturbance", "input_disturbance", "kalman"]
DisturbanceModel = Literal["output", "input", "none"]

#: Default process-noise variance of each plant state (per sample, model units squared).
DEFAULT_STATE_NOISE = 1e-2
#: Default process-noise variance of each integrated disturbance (its random-walk step).
DEFAULT_DISTURBANCE_NOISE = 1.0
#: Default variance of the noise on each measured output.
DEFAULT_MEASUREMENT_NOISE = 1.0
#: Relative singular-value tolerance of the rank tests (times the matrix's largest singular
#: value); a looser threshold than ``numpy.linalg.matrix_rank`` so that nearly hidden
#: directions, which would need enormous estimator gains, are also refused (common practice).
DETECTABILITY_TOLERANCE = 1e-9

_KIND_POINTER = "/estimator/kind"
_MODEL_POINTER = "/model"
_NOISE_POINTER = "/estimator"


@dataclass(frozen=True)
class Estimator:
    """A designed estimator: augmented model, filter gain, poles and disturbance layout.

    Attributes
    ----------
    kind : str
        ``"full_state"``, ``"output_disturbance"``, ``"input_disturbance"`` or ``"kalman"``.
    disturbance : str
        Disturbance model in use: ``"output"``, ``"input"`` or ``"none"``.
    a : ndarray, shape (na, na)
        Augmented state matrix ``[[A, Bd], [0, I]]``; ``na = n + nd``.
    b : ndarray, shape (na, m)
        ``[B; 0]``.
    c_measured : ndarray, shape (py, na)
        ``[C, Cd]``.  For ``full_state`` the identity ``I_n`` (the state is the measurement).
    c_controlled : ndarray, shape (pz, na)
        ``[C, Dz]``: what the controller predicts, disturbance estimate included.
    gain : ndarray, shape (na, py)
        ``L`` of the current-estimator form ``x(k|k) = x(k|k-1) + L (y(k) - Cy x(k|k-1))``.
        For ``full_state`` the identity, so that ``x(k|k) = x(k)``.
    poles : ndarray of complex, shape (na,)
        Eigenvalues of ``(I - L Cy) A``, by descending modulus.  Empty for ``full_state``
        (there is no estimator).
    state_size : int
        ``n``, the plant states; the estimate is ``[x (n); d (nd)]``.
    disturbance_size : int
        ``nd``: ``p`` for output, ``m`` for input disturbances, 0 for none.
    disturbance_input : ndarray, shape (n, nd)
        ``Bd``.
    disturbance_output : ndarray, shape (p, nd)
        ``Cd`` (measured outputs).
    disturbance_controlled : ndarray, shape (p, nd)
        ``Dz`` (controlled outputs; equal to ``Cd`` here).
    process_noise : ndarray, shape (na, na) or None
        ``Qw`` used for the filter (``None`` for ``full_state``).
    measurement_noise : ndarray, shape (py, py) or None
        ``Rv``.
    covariance : ndarray, shape (na, na) or None
        ``P``, steady-state covariance of the prior error ``x - x(k|k-1)``.
    innovation_covariance : ndarray, shape (py, py) or None
        ``S = Cy P Cy' + Rv``.
    """

    kind: str
    disturbance: str
    a: NDArray[np.float64]
    b: NDArray[np.float64]
    c_measured: NDArray[np.float64]
    c_controlled: NDArray[np.float64]
    gain: NDArray[np.float64]
    poles: NDArray[np.complex128]
    state_size: int
    disturbance_size: int
    disturbance_input: NDArray[np.float64]
    disturbance_output: NDArray[np.float64]
    disturbance_controlled: NDArray[np.float64]
    process_noise: NDArray[np.float64] | None
    measurement_noise: NDArray[np.float64] | None
    covariance: NDArray[np.float64] | None
    innovation_covariance: NDArray[np.float64] | None

    @property
    def full_state(self) -> bool:
        """True when the state is taken as measured (no estimator dynamics)."""
        return self.kind == "full_state"

    @property
    def augmented_size(self) -> int:
        """``na = n + nd``."""
        return self.state_size + self.disturbance_size

    @property
    def disturbance_slice(self) -> slice:
        """Where the disturbance estimate sits in the augmented estimate."""
        return slice(self.state_size, self.state_size + self.disturbance_size)

    @property
    def model_a(self) -> NDArray[np.float64]:
        """The plant's ``A`` (n, n)."""
        n = self.state_size
        return self.a[:n, :n]

    @property
    def model_b(self) -> NDArray[np.float64]:
        """The plant's ``B`` (n, m)."""
        return self.b[: self.state_size]

    @property
    def model_c(self) -> NDArray[np.float64]:
        """The plant's output matrix ``C`` (p, n) (controlled outputs)."""
        return self.c_controlled[:, : self.state_size]

    @property
    def spectral_radius(self) -> float:
        """Largest estimator pole modulus (0 for ``full_state``)."""
        return float(np.abs(self.poles).max(initial=0.0))


def augmented_model(
    a: NDArray[np.float64],
    b: NDArray[np.float64],
    c: NDArray[np.float64],
    disturbance: DisturbanceModel,
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Return ``(A_aug, B_aug, C_aug, Bd, Cd)`` for a disturbance model.

    Parameters
    ----------
    a : ndarray, shape (n, n)
    b : ndarray, shape (n, m)
    c : ndarray, shape (p, n)
        Output matrix (measured and controlled outputs).
    disturbance : {"output", "input", "none"}

    Returns
    -------
    a_aug : ndarray, shape (n+nd, n+nd)
        ``[[A, Bd], [0, I]]``.
    b_aug : ndarray, shape (n+nd, m)
        ``[B; 0]``.
    c_aug : ndarray, shape (p, n+nd)
        ``[C, Cd]``.
    bd : ndarray, shape (n, nd)
    cd : ndarray, shape (p, nd)
    """
    n, m, p = a.shape[0], b.shape[1], c.shape[0]
    if disturbance == "output":
        bd, cd = np.zeros((n, p)), np.eye(p)
    elif disturbance == "input":
        bd, cd = b.copy(), np.zeros((p, m))
    elif disturbance == "none":
        bd, cd = np.zeros((n, 0)), np.zeros((p, 0))
    else:  # pragma: no cover - the schema edge allows only the three
        raise ValueError(f"unknown disturbance model {disturbance!r}")
    nd = bd.shape[1]
    a_aug = np.block([[a, bd], [np.zeros((nd, n)), np.eye(nd)]])
    b_aug = np.vstack([b, np.zeros((nd, m))])
    c_aug = np.hstack([c, cd])
    return a_aug, b_aug, c_aug, bd, cd


def _rank(matrix: NDArray[np.float64] | NDArray[np.complex128]) -> tuple[int, NDArray[np.float64]]:
    """Numerical rank with :data:`DETECTABILITY_TOLERANCE` on the equilibrated matrix, and a null vector.

    Rows and columns are scaled first (:func:`service.solver.numerics.equilibrate`), so the
    verdict does not depend on the units of states, outputs, inputs or disturbances.
    """
    rank, null = equilibrated_rank(matrix, DETECTABILITY_TOLERANCE)
    return rank, np.real(null)


def _format_vector(v: NDArray[np.float64], labels: Sequence[str]) -> str:
    """``"on y2"`` for one signal, ``"along 0.5 u1 - u2"`` for a combination (largest entry 1)."""
    v = v / v[np.argmax(np.abs(v))]
    used = [(float(x), name) for x, name in zip(v, labels, strict=False) if abs(x) > 1e-9]
    if used[0][0] < 0:  # a direction's sign is arbitrary: lead with a plus
        used = [(-x, name) for x, name in used]
    if len(used) == 1:
        return f"on {used[0][1]}"
    text = ""
    for i, (x, name) in enumerate(used):
        sign = "-" if x < 0 else "+"
        size = "" if abs(abs(x) - 1.0) < 1e-9 else f"{abs(x):.3g} "
        text += ("" if i == 0 else f" {sign} ") + size + name
    return "along " + text


def _format_complex(z: complex) -> str:
    return f"{z.real:.6g}" if abs(z.imag) < 1e-12 else f"{z.real:.6g}{z.imag:+.6g}j"


def _check_detectable(
    a: NDArray[np.float64],
    c: NDArray[np.float64],
    bd: NDArray[np.float64],
    cd: NDArray[np.float64],
    *,
    disturbance: DisturbanceModel,
    output_labels: Sequence[str],
    input_labels: Sequence[str],
) -> None:
    """Raise ``NumericalError`` unless the augmented model is detectable (see module notes)."""
    n, p, nd = a.shape[0], c.shape[0], bd.shape[1]
    # 1. the plant itself: PBH at every eigenvalue on or outside the unit circle.
    for z in scipy.linalg.eigvals(a, check_finite=False):
        if abs(z) < 1.0 - 1e-9:
            continue
        rank, _ = _rank(np.vstack([z * np.eye(n) - a, c.astype(complex)]))
        if rank < n:
            raise NumericalError(
                f"The plant is not detectable from its measured outputs: the mode at "
                f"z = {_format_complex(z)} (on or outside the unit circle) does not "
                f"show in any measured output (PBH test), so no estimator can track it. "
                f"Measure an output that sees this mode.",
                pointer=_MODEL_POINTER,
            )
    if nd == 0:
        return
    name = f"{disturbance}_disturbance"
    # 2. counting: at most one disturbance per measured output.
    if nd > p:
        raise NumericalError(
            f"The {name} model adds {nd} disturbances but the plant has only {p} measured "
            f"output(s): at most one constant disturbance per measured output can be "
            f"estimated, so the augmented model is not detectable (rank [[I - A, -Bd], "
            f"[C, Cd]] < n + nd; Pannocchia and Rawlings 2003). Use output_disturbance.",
            pointer=_KIND_POINTER,
        )
    # 3. the rank condition at z = 1.
    matrix = np.block([[np.eye(n) - a, -bd], [c, cd]])
    rank, vt = _rank(matrix)
    if rank == n + nd:
        return
    hidden = vt[n:]  # disturbance part of a null vector
    labels = output_labels if disturbance == "output" else input_labels
    direction = _format_vector(hidden, labels) if np.abs(hidden).max() > 1e-9 else "(unnamed)"
    integrates = integrating_poles(a) > 0
    if disturbance == "output" and integrates:
        why = (
            "the plant integrates (it has a pole at z = 1), and a constant disturbance on "
            "its outputs looks exactly like a steady drift of its integrating state. Use "
            "input_disturbance for an integrating plant."
        )
    else:
        why = (
            "a zero of the plant at z = 1 hides that disturbance direction: it causes no "
            "steady-state change in any measured output, so it cannot be told apart from "
            "a shift of the state. Use output_disturbance for this plant."
        )
    raise NumericalError(
        f"The {name} model makes the augmented model undetectable: rank [[I - A, -Bd], "
        f"[C, Cd]] = {rank} < n + nd = {n + nd} (Pannocchia and Rawlings 2003). The "
        f"disturbance direction {direction} cannot be estimated: {why}",
        pointer=_KIND_POINTER,
    )


def kalman_filter(
    a: NDArray[np.float64],
    c: NDArray[np.float64],
    process_noise: NDArray[np.float64],
    measurement_noise: NDArray[np.float64],
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Return the steady-state Kalman filter ``(L, P, S)`` in current-estimator form.

    Parameters
    ----------
    a : ndarray, shape (na, na)
    c : ndarray, shape (py, na)
    process_noise : ndarray, shape (na, na)
        ``Qw``, symmetric positive semidefinite; the noise enters every state directly.
    measurement_noise : ndarray, shape (py, py)
        ``Rv``, symmetric positive definite.

    Returns
    -------
    gain : ndarray, shape (na, py)
        ``L = P C' S^-1``.
    covariance : ndarray, shape (na, na)
        ``P``, stabilizing solution of ``P = A P A' - A P C' S^-1 C P A' + Qw``.
    innovation_covariance : ndarray, shape (py, py)
        ``S = C P C' + Rv``.

    Raises
    ------
    service.errors.NumericalError
        When the Riccati equation has no stabilizing solution (a mode on the unit circle
        that the process noise does not excite, or a singular ``Rv``).

    Notes
    -----
    The filter Riccati equation is the control one for ``(A', C')``, so it is solved by
    ``scipy.linalg.solve_discrete_are(A', C', Qw, Rv)``.  ``L`` is formed by a Cholesky
    solve with ``S``, no inverse.
    """
    try:
        with np.errstate(all="ignore"):
            p = scipy.linalg.solve_discrete_are(a.T, c.T, process_noise, measurement_noise)
        p = 0.5 * (p + p.T)
        s = c @ p @ c.T + measurement_noise
        s = 0.5 * (s + s.T)
        gain = scipy.linalg.cho_solve(scipy.linalg.cho_factor(s), c @ p).T
    except (np.linalg.LinAlgError, ValueError) as exc:
        raise NumericalError(
            f"The Kalman filter's Riccati equation has no stabilizing solution ({exc}). "
            f"Give every mode on the unit circle some process noise and make the "
            f"measurement noise covariance positive definite.",
            pointer=_NOISE_POINTER,
        ) from exc
    if not np.all(np.isfinite(gain)):
        raise NumericalError(
            "The Kalman filter's Riccati equation gave a non-finite gain. Check the noise covariances.",
            pointer=_NOISE_POINTER,
        )
    return gain, p, s


def _covariance(value: ArrayLike | None, size: int, default: float) -> NDArray[np.float64]:
    if value is None:
        return default * np.eye(size)
    return weight_matrix(value, size)


def design_estimator(
    a: ArrayLike,
    b: ArrayLike,
    c: ArrayLike,
    *,
    kind: EstimatorKind = "output_disturbance",
    disturbance: DisturbanceModel | None = None,
    process_noise: ArrayLike | None = None,
    disturbance_noise: ArrayLike | None = None,
    measurement_noise: ArrayLike | None = None,
    output_labels: Sequence[str] | None = None,
    input_labels: Sequence[str] | None = None,
) -> Estimator:
    """Design the estimator of the given kind for the plant ``(A, B, C)``.

    Parameters
    ----------
    a : array_like, shape (n, n)
    b : array_like, shape (n, m)
    c : array_like, shape (p, n)
        Outputs, each both measured and controlled (the design's output matrix).
    kind : {"full_state", "output_disturbance", "input_disturbance", "kalman"}
        Default ``"output_disturbance"``.
    disturbance : {"output", "input", "none"}, optional
        Disturbance model; only for ``kind="kalman"`` (default ``"output"`` there).  The
        other kinds imply theirs, and passing a different one is an error.
    process_noise : array_like, shape (n,) or (n, n), optional
        Process-noise covariance of the plant states (a diagonal or a full matrix); default
        ``DEFAULT_STATE_NOISE * I``.
    disturbance_noise : array_like, shape (nd,) or (nd, nd), optional
        Covariance of the disturbances' random-walk steps; default
        ``DEFAULT_DISTURBANCE_NOISE * I``.
    measurement_noise : array_like, shape (p,) or (p, p), optional
        Measurement-noise covariance ``Rv`` (positive definite); default
        ``DEFAULT_MEASUREMENT_NOISE * I``.
    output_labels, input_labels : sequence of str, optional
        Names for error messages (default ``y1..yp``, ``u1..um``).

    Returns
    -------
    Estimator

    Raises
    ------
    service.errors.NumericalError
        Pointer ``/estimator/kind`` when the disturbance model makes the augmented model
        undetectable (more disturbances than measured outputs, or a direction hidden at
        ``z = 1``); ``/model`` when the plant itself is undetectable; ``/estimator`` when the
        Riccati equation has no stabilizing solution.

    Examples
    --------
    A scalar plant with an output disturbance; the gain satisfies ``L = P C' S^-1``:

    >>> e = design_estimator([[0.5]], [[1.0]], [[1.0]])
    >>> s = e.c_measured @ e.covariance @ e.c_measured.T + e.measurement_noise
    >>> bool(np.allclose(e.gain, e.covariance @ e.c_measured.T @ np.linalg.inv(s)))
    True
    """
    a_ = np.asarray(a, dtype=float)
    b_ = np.asarray(b, dtype=float)
    c_ = np.asarray(c, dtype=float)
    n, m, p = a_.shape[0], b_.shape[1], c_.shape[0]
    assert a_.shape == (n, n) and b_.shape == (n, m) and c_.shape == (p, n), (a_.shape, b_.shape, c_.shape)
    implied: dict[str, DisturbanceModel] = {
        "full_state": "none",
        "output_disturbance": "output",
        "input_disturbance": "input",
        "kalman": "output",
    }
    if kind not in implied:
        raise ValueError(f"unknown estimator kind {kind!r}")
    model: DisturbanceModel = implied[kind] if disturbance is None else disturbance
    if kind != "kalman" and model != implied[kind]:
        raise ValueError(f"kind {kind!r} implies disturbance {implied[kind]!r}, got {model!r}")

    if kind == "full_state":
        empty = np.zeros((n, 0))
        return Estimator(
            kind=kind,
            disturbance="none",
            a=a_.copy(),
            b=b_.copy(),
            c_measured=np.eye(n),
            c_controlled=c_.copy(),
            gain=np.eye(n),
            poles=np.zeros(0, dtype=complex),
            state_size=n,
            disturbance_size=0,
            disturbance_input=empty,
            disturbance_output=np.zeros((p, 0)),
            disturbance_controlled=np.zeros((p, 0)),
            process_noise=None,
            measurement_noise=None,
            covariance=None,
            innovation_covariance=None,
        )

    outputs = list(output_labels) if output_labels else [f"y{i + 1}" for i in range(p)]
    inputs = list(input_labels) if input_labels else [f"u{j + 1}" for j in range(m)]
    a_aug, b_aug, c_aug, bd, cd = augmented_model(a_, b_, c_, model)
    nd = bd.shape[1]
    _check_detectable(a_, c_, bd, cd, disturbance=model, output_labels=outputs, input_labels=inputs)
    qw = scipy.linalg.block_diag(
        _covariance(process_noise, n, DEFAULT_STATE_NOISE),
        _covariance(disturbance_noise, nd, DEFAULT_DISTURBANCE_NOISE),
    )
    rv = _covariance(measurement_noise, p, DEFAULT_MEASUREMENT_NOISE)
    gain, cov, innovation = kalman_filter(a_aug, c_aug, qw, rv)
    error_matrix = (np.eye(n + nd) - gain @ c_aug) @ a_aug
    poles = scipy.linalg.eigvals(error_matrix, check_finite=False)
    poles = poles[np.argsort(-np.abs(poles), kind="stable")]
    if poles.size and np.abs(poles).max() >= 1.0:
        raise NumericalError(
            f"The Kalman filter is not stable (largest estimator pole modulus "
            f"{np.abs(poles).max():.6f}). Give every mode on the unit circle some process "
            f"noise.",
            pointer=_NOISE_POINTER,
        )
    return Estimator(
        kind=kind,
        disturbance=model,
        a=a_aug,
        b=b_aug,
        c_measured=c_aug,
        c_controlled=c_aug.copy(),
        gain=gain,
        poles=poles,
        state_size=n,
        disturbance_size=nd,
        disturbance_input=bd,
        disturbance_output=cd,
        disturbance_controlled=cd.copy(),
        process_noise=qw,
        measurement_noise=rv,
        covariance=cov,
        innovation_covariance=innovation,
    )

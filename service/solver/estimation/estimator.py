"""State estimation for the predictive controller: disturbance models and the Kalman filter.

The design core assumes the plant state is known.  Here the state, and where asked a constant
disturbance, is estimated from the measured outputs with the augmented model ::

    [x(k+1)]   [A  Bd] [x(k)]   [B]               y(k) = [C  Cd] [x(k); d(k)]
    [d(k+1)] = [0  I ] [d(k)] + [0] u(k)          z(k) = [C  Dz] [x(k); d(k)]

(``y`` measured, ``z`` controlled).  By default every output is both (``Cy = Cz``), so
``Dz = Cd``.  With measured outputs of their own (``c_measured``, ``py`` rows) the disturbances
belong to the measured outputs, and a controlled output sees a disturbance only where it *is*
a combination of measured outputs: ``Dz_i = h_i Cd`` when ``Cz_i = h_i Cy`` exactly, else
``Dz_i = 0`` (the controlled output then follows the model from the estimated state; offset-free
tracking of an unmeasured output holds only for mismatch the disturbance model explains, such
as an input gain error with input disturbances; Pannocchia and Rawlings 2003 state
offset-freedom for controlled outputs that are functions of the measured ones).  A measured
feed-through ``y = Cy x + Dy u`` is subtracted before the filter reads the measurement:
the innovation is ``y(k) - Dy u(k) - Cy x(k|k-1)`` with ``u(k)`` the input applied at sample
``k`` (the model's definition), so ``Dy`` leaves the filter's gain and poles alone.  The
disturbance models are

- ``"per_output"`` (the default): one disturbance per output, chosen per output — a step
  bias on the output (``Bd`` column 0, ``Cd`` column ``e_i``) for a self-regulating output,
  a step bias on its rate for an integrating output (``Bd`` column ``v_i`` in the null space
  of ``I - A`` with ``C v_i = e_i`` on the integrating outputs, ``Cd`` column 0: an
  unmeasured inflow into a level).  By default an output is integrating when it sees a
  mode of ``A`` at ``z = 1`` (:func:`default_disturbances`); ``disturbances`` overrides it;
- ``"output_disturbance"``: one constant disturbance on each measured output,
  ``Bd = 0``, ``Cd = I_p`` (``nd = p``);
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
from service.solver.estimation.sizes import natural_sizes
from service.solver.memo import plant_cache
from service.solver.models.properties import integrating_poles, open_loop_poles
from service.solver.numerics import (
    balance_states,
    eigenvalues_by_modulus,
    equilibrated_rank,
    format_complex,
    pbh_matrix,
)

__all__ = [
    "DEFAULT_DISTURBANCE_NOISE",
    "DEFAULT_MEASUREMENT_NOISE",
    "DEFAULT_STATE_NOISE",
    "DETECTABILITY_TOLERANCE",
    "DisturbanceModel",
    "Estimator",
    "EstimatorKind",
    "OutputDisturbance",
    "augmented_model",
    "controlled_disturbance",
    "default_disturbances",
    "design_estimator",
    "integrating_outputs",
    "kalman_filter",
    "unmeasured_outputs",
]

EstimatorKind = Literal["full_state", "per_output", "output_disturbance", "input_disturbance", "kalman"]
DisturbanceModel = Literal["output", "input", "none", "per_output"]
#: The disturbance of one output in the per-output model: a bias on the output or on its rate.
OutputDisturbance = Literal["output", "rate"]

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

_KIND_FIELD = ("estimator", "kind")
_DISTURBANCE_FIELD = ("estimator", "disturbance")
_DISTURBANCES_FIELD = ("estimator", "disturbances")
_MODEL_FIELD = ("model",)
_NOISE_FIELD = ("estimator",)


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
        ``[Cy, Cd]``.  For ``full_state`` the identity ``I_n`` (the state is the measurement).
    c_controlled : ndarray, shape (pz, na)
        ``[Cz, Dz]``: what the controller predicts, disturbance estimate included.
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
    disturbance_output : ndarray, shape (py, nd)
        ``Cd`` (measured outputs).
    disturbance_controlled : ndarray, shape (pz, nd)
        ``Dz`` (controlled outputs; equal to ``Cd`` when the measured outputs are the controlled
        ones, see the module notes).
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
    #: Per measured output, ``"output"`` or ``"rate"``, for the per-output model; empty otherwise.
    disturbances: tuple[str, ...] = ()
    #: ``Dy`` (py, m), the measured outputs' feed-through, subtracted before the filter reads them
    #: (``None``: zero; always zero for ``full_state``).
    measured_feedthrough: NDArray[np.float64] | None = None

    @property
    def feedthrough(self) -> NDArray[np.float64]:
        """``Dy`` (py, m): zeros when there is none."""
        if self.measured_feedthrough is None:
            return np.zeros((self.c_measured.shape[0], self.b.shape[1]))
        return self.measured_feedthrough

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
    def model_c_measured(self) -> NDArray[np.float64]:
        """The plant's measured-output matrix ``Cy`` (py, n) (``I_n`` for ``full_state``)."""
        return self.c_measured[:, : self.state_size]

    @property
    def spectral_radius(self) -> float:
        """Largest estimator pole modulus (0 for ``full_state``)."""
        return float(np.abs(self.poles).max(initial=0.0))


@plant_cache
def _integrator_space(a: NDArray[np.float64]) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """The modes at ``z = 1``: a basis ``N`` (n, k) of the null space of ``I - A``, and the state scales.

    Decided on ``A`` balanced by LAPACK's ``gebal`` (``A_b = D^-1 A D``, powers of two), so that
    the states' units do not move the rank decision: ``N = D N_b`` with ``N_b`` orthonormal,
    and the count of integrators is the one of
    :func:`service.solver.models.properties.integrating_poles` (poles at 1 relative to the
    sample time).  Returns ``(N, d)``; ``N`` has no columns when no pole is at 1.
    """
    n = a.shape[0]
    count = 0 if n == 0 else integrating_poles(a, poles=open_loop_poles(a))
    if count == 0:
        return np.zeros((n, 0)), np.ones(n)
    _, (scale, _) = scipy.linalg.matrix_balance(a, permute=False, separate=True)
    balanced = a / scale[:, None] * scale[None, :]
    _, s, vt = np.linalg.svd(np.eye(n) - balanced)
    limit = DETECTABILITY_TOLERANCE * max(float(np.linalg.norm(balanced, 1)), 1.0)
    # At least one mode and at most ``count`` (the geometric multiplicity of the eigenvalue 1 is
    # at most its algebraic one): a slow mode off 1 whose singular value the tolerance cannot
    # tell from zero on a badly scaled model is not an integrator.
    rank = min(max(int(np.count_nonzero(s > limit)), n - count), n - 1)
    return scale[:, None] * vt[rank:].T, scale


def integrating_outputs(a: ArrayLike, c: ArrayLike) -> NDArray[np.bool_]:
    """Return which outputs integrate: those that see a mode of ``A`` at ``z = 1``.

    Parameters
    ----------
    a : array_like, shape (n, n)
    c : array_like, shape (p, n)

    Returns
    -------
    ndarray of bool, shape (p,)
        ``|C_i N| > 1e-6 |C_i D|`` with ``N = D N_b`` the modes at 1 of
        :func:`_integrator_space` (``N_b`` orthonormal in the balanced states): a relative
        test per row on the balanced states, so a change of output or state units changes
        nothing.
    """
    a_ = np.asarray(a, dtype=float)
    c_ = np.asarray(c, dtype=float)
    null, scale = _integrator_space(a_)
    if null.shape[1] == 0:
        return np.zeros(c_.shape[0], dtype=bool)
    seen = np.linalg.norm(c_ @ null, axis=1)
    size = np.linalg.norm(c_ * scale[None, :], axis=1)
    return np.asarray(seen > 1e-6 * size, dtype=bool)


def default_disturbances(a: ArrayLike, c: ArrayLike) -> tuple[OutputDisturbance, ...]:
    """The default per-output model: ``"rate"`` for integrating outputs, ``"output"`` otherwise."""
    return tuple("rate" if flag else "output" for flag in integrating_outputs(a, c))


def _rate_directions(
    a: NDArray[np.float64], c: NDArray[np.float64], rows: Sequence[int], output_labels: Sequence[str]
) -> NDArray[np.float64]:
    """``V`` (n, r) in the null space of ``I - A`` with ``C[rows] V = I``: a unit rate per output."""
    null, _ = _integrator_space(a)
    seen = c[list(rows)] @ null
    if null.shape[1] == 0 or np.linalg.matrix_rank(seen, tol=1e-6 * max(float(np.abs(seen).max()), 1e-300)) < len(rows):
        flags = integrating_outputs(a, c)
        lonely = [output_labels[i] for i in rows if not flags[i]]
        what = (
            f"{', '.join(repr(x) for x in lonely)} does not integrate (it sees no mode of the model at z = 1)"
            if lonely
            else f"{', '.join(repr(output_labels[i]) for i in rows)} share their integrating modes, so their rates "
            f"cannot be biased independently"
        )
        raise NumericalError(
            f"A bias on the rate of an output needs an integrator of its own: {what}. Use 'output' for "
            f"such an output in estimator.disturbances.",
            field=_DISTURBANCES_FIELD,
        )
    return np.asarray(null @ np.linalg.lstsq(seen, np.eye(len(rows)), rcond=None)[0])


def augmented_model(
    a: NDArray[np.float64],
    b: NDArray[np.float64],
    c: NDArray[np.float64],
    disturbance: DisturbanceModel,
    disturbances: Sequence[OutputDisturbance] | None = None,
    output_labels: Sequence[str] | None = None,
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Return ``(A_aug, B_aug, C_aug, Bd, Cd)`` for a disturbance model.

    Parameters
    ----------
    a : ndarray, shape (n, n)
    b : ndarray, shape (n, m)
    c : ndarray, shape (p, n)
        Output matrix (measured and controlled outputs).
    disturbance : {"per_output", "output", "input", "none"}
    disturbances : sequence of {"output", "rate"}, shape (p,), optional
        For ``"per_output"``: each output's model (default :func:`default_disturbances`).
    output_labels : sequence of str, optional
        Output names for the error message of a rate bias without an integrator.

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
    elif disturbance == "per_output":
        kinds = tuple(disturbances) if disturbances is not None else default_disturbances(a, c)
        assert len(kinds) == p, (kinds, p)
        labels = list(output_labels) if output_labels else [f"y{i + 1}" for i in range(p)]
        rate = [i for i, k in enumerate(kinds) if k == "rate"]
        bd, cd = np.zeros((n, p)), np.zeros((p, p))
        for i, k in enumerate(kinds):
            if k == "output":
                cd[i, i] = 1.0
        if rate:
            bd[:, rate] = _rate_directions(a, c, rate, labels)
    else:  # pragma: no cover - the schema edge allows only the three
        raise ValueError(f"unknown disturbance model {disturbance!r}")
    nd = bd.shape[1]
    a_aug = np.block([[a, bd], [np.zeros((nd, n)), np.eye(nd)]])
    b_aug = np.vstack([b, np.zeros((nd, m))])
    c_aug = np.hstack([c, cd])
    return a_aug, b_aug, c_aug, bd, cd


def controlled_disturbance(
    c_controlled: NDArray[np.float64], c_measured: NDArray[np.float64], cd: NDArray[np.float64]
) -> NDArray[np.float64]:
    """``Dz`` (pz, nd): how the measured outputs' disturbances show in the controlled outputs.

    Parameters
    ----------
    c_controlled : ndarray, shape (pz, n)
        ``Cz``.
    c_measured : ndarray, shape (py, n)
        ``Cy``.
    cd : ndarray, shape (py, nd)
        ``Cd``, the disturbances' entry into the measured outputs.

    Returns
    -------
    ndarray, shape (pz, nd)
        ``Cd`` itself when ``Cz = Cy``; otherwise per controlled output ``h_i Cd`` where
        ``Cz_i = h_i Cy`` holds (least squares, residual within ``1e-9 |Cz_i|``: the output is a
        combination of measured ones) and zero where it does not (module notes).
    """
    if c_controlled.shape == c_measured.shape and np.array_equal(c_controlled, c_measured):
        return cd.copy()
    pz, nd = c_controlled.shape[0], cd.shape[1]
    dz = np.zeros((pz, nd))
    if nd == 0 or c_measured.shape[0] == 0:
        return dz
    h, combined = _measured_combinations(c_controlled, c_measured)
    dz[combined] = h[combined] @ cd
    return dz


def _measured_combinations(
    c_controlled: NDArray[np.float64], c_measured: NDArray[np.float64]
) -> tuple[NDArray[np.float64], NDArray[np.bool_]]:
    """``H`` (pz, py) by least squares with ``H Cy ~ Cz``, and which rows hold exactly (``1e-9 |Cz_i|``)."""
    h = np.asarray(np.linalg.lstsq(c_measured.T, c_controlled.T, rcond=None)[0].T, dtype=np.float64)  # (pz, py)
    residual = np.linalg.norm(h @ c_measured - c_controlled, axis=1)
    size = np.linalg.norm(c_controlled, axis=1)
    combined: NDArray[np.bool_] = np.asarray(residual <= 1e-9 * np.maximum(size, np.finfo(float).tiny), dtype=bool)
    return h, combined


def unmeasured_outputs(c_controlled: ArrayLike, c_measured: ArrayLike) -> NDArray[np.bool_]:
    """Which controlled outputs are no combination of the measured outputs, shape (pz,).

    Such an output is inferred from the model alone (its ``Dz`` row is zero,
    :func:`controlled_disturbance`): offset-free only for model error that the disturbance
    model explains through the state.
    """
    cz, cm = np.asarray(c_controlled, dtype=float), np.asarray(c_measured, dtype=float)
    if cm.shape[0] == 0:
        return np.ones(cz.shape[0], dtype=bool)
    return ~_measured_combinations(cz, cm)[1]


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
    used = [(float(x), name) for x, name in zip(v, labels, strict=True) if abs(x) > 1e-9]
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


def _check_detectable(
    a: NDArray[np.float64],
    c: NDArray[np.float64],
    bd: NDArray[np.float64],
    cd: NDArray[np.float64],
    *,
    disturbance: DisturbanceModel,
    output_labels: Sequence[str],
    input_labels: Sequence[str],
    disturbances: Sequence[str] = (),
    kalman: bool = False,
) -> None:
    """Raise ``NumericalError`` unless the augmented model is detectable (see module notes).

    ``kalman``: the disturbance model was chosen by ``estimator.disturbance`` of a kalman
    estimator (given or its default 'output'), so a model that fails is that field's, and the
    advice is its value 'per_output'; otherwise the kind implies the model (``estimator.kind``).

    The rank decisions are made on the states balanced by a diagonal similarity (powers of
    two, exact; :func:`service.solver.numerics.balance_states`): detectability does not depend
    on the states' units, and a state in units 1e12 times another's had read as hidden.
    """
    n, p, nd = a.shape[0], c.shape[0], bd.shape[1]
    if n:
        scale = balance_states(a, bd, c)
        a, bd, c = a / scale[:, None] * scale[None, :], bd / scale[:, None], c * scale[None, :]
    # 1. the plant itself: PBH at every eigenvalue on or outside the unit circle.
    for z in scipy.linalg.eigvals(a, check_finite=False):
        if abs(z) < 1.0 - 1e-9:
            continue
        rank, _ = _rank(pbh_matrix(a, z, outputs=c))
        if rank < n:
            raise NumericalError(
                f"The plant is not detectable from its measured outputs: the mode at "
                f"z = {format_complex(z)} (on or outside the unit circle) does not "
                f"show in any measured output (PBH test), so no estimator can track it. "
                f"Measure an output that sees this mode.",
                field=_MODEL_FIELD,
            )
    if nd == 0:
        return
    name = "per_output" if disturbance == "per_output" else f"{disturbance}_disturbance"
    model_field = _DISTURBANCE_FIELD if kalman else _KIND_FIELD
    use = "disturbance 'per_output'" if kalman else "per_output (the default)"
    # 2. counting: at most one disturbance per measured output.
    if nd > p:
        raise NumericalError(
            f"The {name} model adds {nd} disturbances but the plant has only {p} measured "
            f"output(s): at most one constant disturbance per measured output can be "
            f"estimated, so the augmented model is not detectable (rank [[I - A, -Bd], "
            f"[C, Cd]] < n + nd; Pannocchia and Rawlings 2003). Use {use}, "
            f"which puts one disturbance on each output.",
            field=model_field,
        )
    # 3. the rank condition at z = 1.
    matrix = np.block([[np.eye(n) - a, -bd], [c, cd]])
    rank, vt = _rank(matrix)
    if rank == n + nd:
        return
    hidden = vt[n:]  # disturbance part of a null vector
    if disturbance == "per_output":
        labels = [
            f"{o} ({'rate' if k == 'rate' else 'output'} bias)"
            for o, k in zip(output_labels, disturbances, strict=True)
        ]
    else:
        labels = list(output_labels if disturbance == "output" else input_labels)
    direction = _format_vector(hidden, labels) if np.abs(hidden).max() > 1e-9 else "(unnamed)"
    flags = integrating_outputs(a, c)
    integrates = bool(np.any(flags))
    where = model_field
    if disturbance == "output" and integrates:
        levels = ", ".join(repr(o) for o, f in zip(output_labels, flags, strict=True) if f)
        why = (
            f"the plant integrates ({levels} see a pole at z = 1), and a constant bias on an "
            f"integrating output looks exactly like a steady drift of its integrator. Use "
            f"{use}, which models a bias on the rate of {levels} instead."
        )
    elif disturbance == "per_output":
        where = _DISTURBANCES_FIELD
        involved = [i for i in range(len(hidden)) if abs(hidden[i]) > 1e-6 * np.abs(hidden).max()]
        named = ", ".join(repr(output_labels[i]) for i in involved)
        wrong = [i for i in involved if (disturbances[i] == "output") == bool(flags[i])]
        if wrong:
            fix = "; ".join(
                f"{output_labels[i]!r} {'integrates' if flags[i] else 'does not integrate'}, so use "
                f"'{'rate' if flags[i] else 'output'}' for it"
                for i in wrong
            )
            why = f"the chosen model does not fit the output's structure: {fix}."
        else:
            why = (
                f"no choice of bias on {named} can be told apart from a shift of the state: a zero of "
                f"the plant at z = 1 (or integrators shared between these outputs) hides it in every "
                f"measured output. No disturbance model per output is detectable for {named}; measure "
                f"another output that sees this direction, or correct the model."
            )
    else:
        why = (
            "a zero of the plant at z = 1 hides that disturbance direction: it causes no "
            "steady-state change in any measured output, so it cannot be told apart from "
            f"a shift of the state. Use {use}, which puts one disturbance on each output."
        )
    raise NumericalError(
        f"The {name} model makes the augmented model undetectable: rank [[I - A, -Bd], "
        f"[C, Cd]] = {rank} < n + nd = {n + nd} (Pannocchia and Rawlings 2003). The "
        f"disturbance direction {direction} cannot be estimated: {why}",
        field=where,
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
        with np.errstate(all="ignore"):  # an overflow is found below, by the finite checks
            p = scipy.linalg.solve_discrete_are(a.T, c.T, process_noise, measurement_noise)
            p = 0.5 * (p + p.T)
            s = c @ p @ c.T + measurement_noise
            s = 0.5 * (s + s.T)
            gain = scipy.linalg.cho_solve(scipy.linalg.cho_factor(s), c @ p).T
    except (np.linalg.LinAlgError, ValueError) as exc:
        # said in the trade's words, not the library's ("array must not contain infs or NaNs").
        # LinAlgError is a ValueError: only another ValueError (non-finite numbers) or extreme
        # covariances mean overflow; a LinAlgError on moderate numbers is a mode without noise.
        extreme = not isinstance(exc, np.linalg.LinAlgError) or _extreme(process_noise, measurement_noise)
        unexcited = [] if extreme else _unexcited_modes(a, process_noise)
        if extreme:
            why = (
                "its numbers overflowed double precision: some entries of the model or of the noise "
                "covariances are too large (or too small) for their units"
            )
        elif unexcited:
            why = (
                f"the process noise does not reach the mode{'s' if len(unexcited) > 1 else ''} at z = "
                f"{', '.join(format_complex(z) for z in unexcited)} (on or outside the unit circle): no noise "
                f"moves {'them' if len(unexcited) > 1 else 'it'}, so the filter has no steady state that "
                f"tracks {'them' if len(unexcited) > 1 else 'it'} (an integrator or a disturbance state given "
                f"a variance of 0)"
            )
        else:
            why = "the solver found none"
        raise NumericalError(
            f"The Kalman filter's Riccati equation has no stabilizing solution ({why}). "
            f"Give every mode on the unit circle some process noise, make the "
            f"measurement noise covariance positive definite, and keep the numbers moderate.",
            field=_NOISE_FIELD,
        ) from exc
    if not np.all(np.isfinite(gain)):
        raise NumericalError(
            "The Kalman filter's Riccati equation gave a non-finite gain. Check the noise covariances.",
            field=_NOISE_FIELD,
        )
    return gain, p, s


def _extreme(*covariances: NDArray[np.float64]) -> bool:
    """Whether a nonzero entry of the covariances lies outside ``[1e-150, 1e150]`` (or is not finite).

    Variances that far from 1 are the squares of numbers beyond ``1e+-75`` in the scaled
    signals: the Riccati equation then loses itself in overflow or underflow, whatever the
    model (common practice: keep the squares of the numbers inside double precision).
    """
    for w in covariances:
        values = np.abs(w[w != 0.0])
        if values.size and not (np.all(np.isfinite(values)) and values.min() >= 1e-150 and values.max() <= 1e150):
            return True
    return False


def _unexcited_modes(a: NDArray[np.float64], process_noise: NDArray[np.float64]) -> list[complex]:
    """The modes of ``A`` on or outside the unit circle that the process noise does not move.

    PBH test of stabilizability of ``(A, Qw^1/2)``: rank ``[zI - A, Qw] < na`` at an eigenvalue
    ``z`` with ``|z| >= 1 - 1e-9`` (``Qw`` and ``Qw^1/2`` have the same range; the rank on the
    equilibrated matrix, :func:`service.solver.numerics.equilibrated_rank`).  Without these
    the filter Riccati equation has a stabilizing solution, given ``Rv`` positive definite and
    the augmented pair detectable (the standard existence condition of the discrete Riccati
    equation, the dual of the control one's; common practice).  One conjugate of each pair is
    listed.
    """
    found: list[complex] = []
    na = a.shape[0]
    for z in scipy.linalg.eigvals(a, check_finite=False):
        if abs(z) < 1.0 - 1e-9 or z.imag < -1e-12:
            continue
        if any(abs(z - w) <= 1e-9 * max(1.0, abs(z)) for w in found):
            continue
        rank, _ = _rank(pbh_matrix(a, complex(z), inputs=process_noise))
        if rank < na:
            found.append(complex(z))
    return found


def _covariance(
    value: ArrayLike | None, size: int, default: float, *, sizes: NDArray[np.float64]
) -> NDArray[np.float64]:
    """The given covariance, or ``default`` per signal in units of its natural size (``default * diag(sizes**2)``)."""
    if value is None:
        assert sizes.shape == (size,), (sizes.shape, size)
        return default * np.diag(sizes**2)
    return weight_matrix(value, size)


def design_estimator(
    a: ArrayLike,
    b: ArrayLike,
    c: ArrayLike,
    *,
    kind: EstimatorKind = "per_output",
    disturbance: DisturbanceModel | None = None,
    disturbances: Sequence[OutputDisturbance] | None = None,
    process_noise: ArrayLike | None = None,
    disturbance_noise: ArrayLike | None = None,
    measurement_noise: ArrayLike | None = None,
    output_labels: Sequence[str] | None = None,
    input_labels: Sequence[str] | None = None,
    c_measured: ArrayLike | None = None,
    d_measured: ArrayLike | None = None,
    measured_labels: Sequence[str] | None = None,
    fixed_outputs: ArrayLike | None = None,
    fixed_inputs: ArrayLike | None = None,
) -> Estimator:
    """Design the estimator of the given kind for the plant ``(A, B, C)``.

    Parameters
    ----------
    a : array_like, shape (n, n)
    b : array_like, shape (n, m)
    c : array_like, shape (p, n)
        Controlled outputs (the design's output matrix); also the measured ones unless
        ``c_measured`` is given.
    kind : {"full_state", "per_output", "output_disturbance", "input_disturbance", "kalman"}
        Default ``"per_output"``.
    disturbance : {"per_output", "output", "input", "none"}, optional
        Disturbance model; only for ``kind="kalman"`` (default ``"output"`` there).  The
        other kinds imply theirs, and passing a different one is an error.
    disturbances : sequence of {"output", "rate"}, shape (p,), optional
        The per-output model's choice per output (default :func:`default_disturbances`).
    process_noise : array_like, shape (n,) or (n, n), optional
        Process-noise covariance of the plant states (a diagonal or a full matrix); default
        ``DEFAULT_STATE_NOISE`` per state in units of its natural size
        (:func:`service.solver.estimation.sizes.natural_sizes`).
    disturbance_noise : array_like, shape (nd,) or (nd, nd), optional
        Covariance of the disturbances' random-walk steps; default
        ``DEFAULT_DISTURBANCE_NOISE`` per disturbance in units of its output's (or, for input
        disturbances, its input's) natural size.
    measurement_noise : array_like, shape (p,) or (p, p), optional
        Measurement-noise covariance ``Rv`` (positive definite); default
        ``DEFAULT_MEASUREMENT_NOISE`` per measured output in units of its natural size.
        With these defaults, rescaling any input, output or state leaves the filter the same.
    output_labels, input_labels : sequence of str, optional
        Names for error messages (default ``y1..yp``, ``u1..um``).
    c_measured : array_like, shape (py, n), optional
        ``Cy``, the measured outputs the filter reads (default ``C``).  The disturbance models
        then belong to the measured outputs (``disturbances``, ``measurement_noise`` and the
        output disturbances have ``py`` entries) and ``Dz`` follows from
        :func:`controlled_disturbance`.
    d_measured : array_like, shape (py, m), optional
        ``Dy``, the measured feed-through (default zero); kept as
        ``Estimator.measured_feedthrough`` for whoever feeds the filter (module notes).
    measured_labels : sequence of str, optional
        Names of the measured outputs for error messages (default ``output_labels`` when
        ``c_measured`` is absent, else ``y1..ypy``).
    fixed_outputs, fixed_inputs : array_like of bool, shape (py,) and (m,), optional
        Measured outputs and inputs whose natural size is 1 as given (the signals with spans:
        the plant is then in span units).

    Returns
    -------
    Estimator

    Raises
    ------
    service.errors.NumericalError
        Pointer ``/estimator/kind`` when the disturbance model makes the augmented model
        undetectable (more disturbances than measured outputs, or a direction hidden at
        ``z = 1``; ``/estimator/disturbance`` for a kalman estimator, whose model that field
        chooses, and ``/estimator/disturbances`` for a per-output choice that fails); ``/model`` when the plant itself is undetectable; ``/estimator`` when the
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
    cz = np.asarray(c, dtype=float)
    n, m, pz = a_.shape[0], b_.shape[1], cz.shape[0]
    assert a_.shape == (n, n) and b_.shape == (n, m) and cz.shape == (pz, n), (a_.shape, b_.shape, cz.shape)
    c_ = cz if c_measured is None else np.asarray(c_measured, dtype=float)
    p = c_.shape[0]
    assert c_.shape == (p, n), c_.shape
    dy = None if d_measured is None else np.asarray(d_measured, dtype=float)
    assert dy is None or dy.shape == (p, m), None if dy is None else dy.shape
    if dy is not None and not np.any(dy):
        dy = None
    implied: dict[str, DisturbanceModel] = {
        "full_state": "none",
        "per_output": "per_output",
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
            c_controlled=cz.copy(),
            gain=np.eye(n),
            poles=np.zeros(0, dtype=complex),
            state_size=n,
            disturbance_size=0,
            disturbance_input=empty,
            disturbance_output=np.zeros((n, 0)),
            disturbance_controlled=np.zeros((pz, 0)),
            process_noise=None,
            measurement_noise=None,
            covariance=None,
            innovation_covariance=None,
        )

    if c_measured is None:
        outputs = list(output_labels) if output_labels else [f"y{i + 1}" for i in range(p)]
    else:
        outputs = list(measured_labels) if measured_labels else [f"y{i + 1}" for i in range(p)]
    inputs = list(input_labels) if input_labels else [f"u{j + 1}" for j in range(m)]
    kinds: tuple[OutputDisturbance, ...] = ()
    if model == "per_output":
        kinds = tuple(disturbances) if disturbances is not None else default_disturbances(a_, c_)
    a_aug, b_aug, c_aug, bd, cd = augmented_model(
        a_,
        b_,
        c_,
        model,
        disturbances=kinds or None,
        output_labels=outputs,
    )
    nd = bd.shape[1]
    _check_detectable(
        a_,
        c_,
        bd,
        cd,
        disturbance=model,
        output_labels=outputs,
        input_labels=inputs,
        disturbances=kinds,
        kalman=kind == "kalman",
    )
    # Defaults in the signals' natural sizes (service.solver.estimation.sizes): free of units.
    sizes = natural_sizes(a_, b_, c_, fixed_outputs=fixed_outputs, fixed_inputs=fixed_inputs)
    disturbance_sizes = sizes.inputs if model == "input" else sizes.outputs
    qw = scipy.linalg.block_diag(
        _covariance(process_noise, n, DEFAULT_STATE_NOISE, sizes=sizes.states),
        _covariance(disturbance_noise, nd, DEFAULT_DISTURBANCE_NOISE, sizes=disturbance_sizes[:nd]),
    )
    rv = _covariance(measurement_noise, p, DEFAULT_MEASUREMENT_NOISE, sizes=sizes.outputs)
    gain, cov, innovation = kalman_filter(a_aug, c_aug, qw, rv)
    error_matrix = (np.eye(n + nd) - gain @ c_aug) @ a_aug
    poles = eigenvalues_by_modulus(error_matrix)
    if poles.size and np.abs(poles).max() >= 1.0:
        raise NumericalError(
            f"The Kalman filter is not stable (largest estimator pole modulus "
            f"{np.abs(poles).max():.6f}). Give every mode on the unit circle some process "
            f"noise.",
            field=_NOISE_FIELD,
        )
    dz = controlled_disturbance(cz, c_, cd)
    return Estimator(
        kind=kind,
        disturbance=model,
        a=a_aug,
        b=b_aug,
        c_measured=c_aug,
        c_controlled=np.hstack([cz, dz]),
        gain=gain,
        poles=poles,
        state_size=n,
        disturbance_size=nd,
        disturbance_input=bd,
        disturbance_output=cd,
        disturbance_controlled=dz,
        process_noise=qw,
        measurement_noise=rv,
        covariance=cov,
        innovation_covariance=innovation,
        disturbances=kinds,
        measured_feedthrough=dy,
    )

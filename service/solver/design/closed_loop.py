"""Closed-loop analysis of the unconstrained law and the design's numerical warnings.

With ``du(k) = Kr r - Kx x(k) - Ku u(k-1)`` on ``x(k+1) = A x(k) + B u(k)``, the loop on
the augmented state ``[x(k); u(k-1)]`` (setpoint held at zero) is ::

    [x(k+1)]   [A - B Kx   B (I - Ku)] [x(k)  ]
    [u(k)  ] = [  -Kx        I - Ku  ] [u(k-1)]

since ``u(k) = u(k-1) + du(k)``.  Its eigenvalues are the closed-loop poles; the loop is
asymptotically stable when all lie strictly inside the unit circle (the discrete-time
Lyapunov criterion, common practice).

The verdict uses an explicit tolerance, :data:`service.solver.design.marginal.MARGINAL_TOLERANCE`:
``stable`` means every pole has modulus below ``1 - MARGINAL_TOLERANCE`` and no pole is held
on the circle by a structural cause; ``unstable_closed_loop`` means some pole has modulus above
``1 + MARGINAL_TOLERANCE``.  Poles in between are marginal: they are named with their cause
(:mod:`service.solver.design.marginal`), never called unstable, and rounding never flips
either verdict.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray

from service.solver.design.marginal import MARGINAL_TOLERANCE, MarginalMode, marginal_mode_warnings
from service.solver.numerics import feedback_poles

__all__ = [
    "ILL_CONDITIONED",
    "UNIT_CIRCLE_MARGIN",
    "ClosedLoop",
    "Diagnostic",
    "closed_loop",
    "closed_loop_matrix",
    "design_warnings",
]

#: Condition number above which the Hessian is called near-singular.  A solve then loses
#: about log10(cond) of the ~16 significant digits of double precision (common practice).
ILL_CONDITIONED = 1e8
#: A pole this close to the unit circle (in modulus) is reported as nearly marginal.
UNIT_CIRCLE_MARGIN = 1e-3


@dataclass(frozen=True)
class Diagnostic:
    """A warning about a design: a stable machine-readable code and a plain sentence."""

    code: str
    message: str


@dataclass(frozen=True)
class ClosedLoop:
    """Closed-loop matrix on ``[x; u(k-1)]``, its poles and the stability verdict.

    Attributes
    ----------
    matrix : ndarray, shape (n+m, n+m)
    poles : ndarray of complex, shape (n+m,)
        Sorted by descending modulus.
    spectral_radius : float
        Largest pole modulus.
    stable : bool
        ``spectral_radius < 1 - MARGINAL_TOLERANCE`` and no marginal mode.
    marginal : tuple of MarginalMode
        The poles on the unit circle with their causes (filled in by the design, which
        knows the weights; empty from :func:`closed_loop` alone).
    """

    matrix: NDArray[np.float64]
    poles: NDArray[np.complex128]
    spectral_radius: float
    stable: bool
    marginal: tuple[MarginalMode, ...] = field(default=())

    @property
    def unstable(self) -> bool:
        """Some pole lies outside the unit circle by more than ``MARGINAL_TOLERANCE``."""
        return self.spectral_radius > 1.0 + MARGINAL_TOLERANCE


def closed_loop_matrix(
    a: NDArray[np.float64],
    b: NDArray[np.float64],
    state_gain: NDArray[np.float64],
    input_gain: NDArray[np.float64],
) -> NDArray[np.float64]:
    """Return the closed-loop matrix on ``[x(k); u(k-1)]``.

    Parameters
    ----------
    a : ndarray, shape (n, n)
    b : ndarray, shape (n, m)
    state_gain : ndarray, shape (m, n)
        ``Kx``.
    input_gain : ndarray, shape (m, m)
        ``Ku``.

    Returns
    -------
    ndarray, shape (n+m, n+m)
    """
    m = b.shape[1]
    hold = np.eye(m) - input_gain
    return np.block([[a - b @ state_gain, b @ hold], [-state_gain, hold]])


def closed_loop(
    a: NDArray[np.float64],
    b: NDArray[np.float64],
    state_gain: NDArray[np.float64],
    input_gain: NDArray[np.float64],
) -> ClosedLoop:
    """Return the closed loop's matrix, poles and verdict.

    Parameters are as for :func:`closed_loop_matrix`.

    Notes
    -----
    The loop is ``Aa - Ba [Kx, Ku]`` with the open loop ``Aa = [[A, B], [0, I]]`` and
    ``Ba = [B; I]``; :func:`service.solver.numerics.feedback_poles` finds its eigenvalues
    with the states the gain never sees (a dead time's shift register) kept out of the
    eigenvalue problem, so long dead times do not smear their exact poles at zero into a
    ring (accuracy stated there).
    """
    matrix = closed_loop_matrix(a, b, state_gain, input_gain)
    n, m = b.shape
    open_loop = np.block([[a, b], [np.zeros((m, n)), np.eye(m)]])
    spectrum = feedback_poles(open_loop, np.vstack([b, np.eye(m)]), np.hstack([state_gain, input_gain]))
    radius = spectrum.spectral_radius
    return ClosedLoop(
        matrix=matrix, poles=spectrum.poles, spectral_radius=radius, stable=radius < 1.0 - MARGINAL_TOLERANCE
    )


def design_warnings(
    *,
    condition_number: float,
    loop: ClosedLoop,
    input_labels: Sequence[str] | None = None,
    output_labels: Sequence[str] | None = None,
    state_labels: Sequence[str] | None = None,
    fixed_poles: Sequence[complex] = (),
    hidden_poles: Sequence[complex] = (),
    unweighted_poles: Sequence[complex] = (),
    plant_unstable: int = 0,
    terminal_possible: bool = False,
) -> list[Diagnostic]:
    """Return the warnings of a design that solved but may not behave.

    Parameters
    ----------
    condition_number : float
        Exact 2-norm condition number of the Jacobi-scaled Hessian (unit diagonal), which
        does not depend on the units of the inputs.
    loop : ClosedLoop
    input_labels, output_labels, state_labels : sequence of str, optional
        Signal tags for the messages (default ``u1..``, ``z1..``, ``x1..``).
    fixed_poles : sequence of complex, optional
        Plant modes outside the unit circle that no input can move (PBH test,
        :func:`service.solver.models.modes.uncontrollable_modes`): they stay closed-loop
        poles whatever the tuning, so ``unstable_closed_loop`` then says that no tuning
        fixes them instead of advising a longer horizon or heavier move weights.
    hidden_poles, unweighted_poles : sequence of complex, optional
        Plant modes outside the unit circle that no controlled output shows, and that no
        weighted output sees (the hidden ones among them): the law never acts on them, so
        they too stay closed-loop poles whatever the horizons and move weights.
    plant_unstable : int, optional
        How many open-loop poles lie outside the unit circle.  When some of them are neither
        fixed, hidden nor unweighted, heavier move weights are not advised: without a
        terminal weight they bring a finite-horizon law nearer to doing nothing, that is to
        the unstable open loop.
    terminal_possible : bool, optional
        The design could take the Riccati terminal weight (none yet; input targets or no more
        inputs than outputs), so the advice for an unstable plant may suggest it.

    Returns
    -------
    list of Diagnostic
        ``ill_conditioned_hessian``, one warning per cause of the marginal modes
        (:func:`service.solver.design.marginal.marginal_mode_warnings`),
        ``pole_near_unit_circle`` (poles inside the circle within ``UNIT_CIRCLE_MARGIN`` of
        it, marginal modes left out) and ``unstable_closed_loop`` (a pole outside the
        circle), in that order, each at most once.
    """
    found: list[Diagnostic] = []
    if condition_number > ILL_CONDITIONED:
        found.append(
            Diagnostic(
                "ill_conditioned_hessian",
                f"The Hessian is near-singular (condition number {condition_number:.3g} with every "
                f"move scaled to unit diagonal, above "
                f"{ILL_CONDITIONED:.0e}): the gains keep only about "
                f"{max(0, 16 - int(np.log10(condition_number)))} significant digits. Raise the move "
                f"weights or shorten the control horizon.",
            )
        )
    most = 1 + max((max((*mode.inputs, *mode.outputs, *mode.states), default=0) for mode in loop.marginal), default=0)
    inputs = list(input_labels) if input_labels is not None else [f"u{j + 1}" for j in range(most)]
    outputs = list(output_labels) if output_labels is not None else [f"z{i + 1}" for i in range(most)]
    states = list(state_labels) if state_labels is not None else [f"x{i + 1}" for i in range(most)]
    found += [
        Diagnostic(code, message)
        for code, message in marginal_mode_warnings(loop.marginal, inputs=inputs, outputs=outputs, states=states)
    ]
    marginal = np.zeros(loop.poles.size, dtype=bool)
    for mode in loop.marginal:
        gaps = np.where(marginal, np.inf, np.abs(loop.poles - mode.pole))
        marginal[int(np.argmin(gaps))] = True
    moduli = np.abs(loop.poles)
    near = moduli[~marginal & (moduli <= 1.0 + MARGINAL_TOLERANCE) & (np.abs(moduli - 1.0) < UNIT_CIRCLE_MARGIN)]
    if near.size:
        found.append(
            Diagnostic(
                "pole_near_unit_circle",
                f"{near.size} closed-loop pole(s) lie within {UNIT_CIRCLE_MARGIN:g} of the unit "
                f"circle (largest modulus {near.max():.6f}): the loop is nearly marginal and "
                f"will respond very slowly or oscillate in that mode.",
            )
        )
    if loop.unstable:
        poles_outside = loop.poles[moduli > 1.0 + MARGINAL_TOLERANCE]
        fixed, left = _matched(poles_outside, np.asarray(fixed_poles, dtype=complex))
        hidden, left = _matched(left, np.asarray(hidden_poles, dtype=complex))
        unweighted, left = _matched(left, np.asarray(unweighted_poles, dtype=complex))
        advice = _unstable_advice(
            fixed=fixed,
            hidden=hidden,
            unweighted=unweighted,
            tuned=left.size,
            plant_moved=plant_unstable - fixed - hidden - unweighted,
            terminal_possible=terminal_possible,
        )
        found.append(
            Diagnostic(
                "unstable_closed_loop",
                f"The closed loop is unstable: {poles_outside.size} pole(s) lie outside the unit circle "
                f"(spectral radius {loop.spectral_radius:.6f}). {advice}",
            )
        )
    return found


def _matched(poles: NDArray[np.complex128], fixed: NDArray[np.complex128]) -> tuple[int, NDArray[np.complex128]]:
    """How many of ``poles`` equal one of ``fixed`` (each used once), to ``1e-6`` relative, and the others."""
    left = list(fixed)
    count = 0
    others = []
    for pole in poles:
        gaps = [abs(pole - f) for f in left]
        if gaps and min(gaps) <= 1e-6 * max(1.0, abs(pole)):
            left.pop(int(np.argmin(gaps)))
            count += 1
        else:
            others.append(pole)
    return count, np.asarray(others, dtype=complex)


def _unstable_advice(
    *, fixed: int, hidden: int, unweighted: int, tuned: int, plant_moved: int, terminal_possible: bool
) -> str:
    """What to do about the poles outside the circle, by kind (see :func:`design_warnings`)."""
    total = fixed + hidden + unweighted + tuned

    def which(count: int) -> str:
        if count == total:
            return "it is a plant mode" if count == 1 else f"all {count} are plant modes"
        return f"{count} of them {'is a plant mode' if count == 1 else 'are plant modes'}"

    def them(count: int) -> str:
        return "it" if count == 1 else "them"

    parts = []
    if fixed:
        parts.append(
            f"{which(fixed)} that no input can move (see uncontrollable_mode): change the model (its "
            f"realization, or what the inputs reach) or stabilize {them(fixed)} outside this controller"
        )
    if hidden:
        parts.append(
            f"{which(hidden)} that no controlled output shows, so the controller never acts on {them(hidden)}: "
            f"change the model, or control {them(hidden)} through an output that shows {them(hidden)}"
        )
    if unweighted:
        parts.append(
            f"{which(unweighted)} that only outputs with weight 0 see, so the controller never acts on "
            f"{them(unweighted)}: give a weight to an output that sees {them(unweighted)}"
        )
    if tuned:
        if plant_moved > 0:
            terminal = (
                ", or put the Riccati terminal weight on the last predicted step (weights.terminal "
                "'riccati'; with the control horizon equal to the prediction horizon it gives the "
                "infinite-horizon law)"
                if terminal_possible
                else ""
            )
            fix = (
                f"the plant itself is unstable, so lengthen the prediction and control horizons{terminal}; "
                f"raising the move weights is no remedy here, since it brings the loop nearer to the "
                f"unstable open loop"
            )
        else:
            fix = "lengthen the prediction horizon, raise the move weights, or check the model"
        parts.append(fix if not parts else f"for the other {tuned}, {fix}")
    text = "; ".join(parts)
    text = text[0].upper() + text[1:] + "."
    if tuned:
        return text
    if unweighted:
        return f"No horizon or move weight moves {'this pole' if total == 1 else 'these poles'}. {text}"
    return f"No horizon or move weight moves {'this pole' if total == 1 else 'these poles'}, so no tuning can stabilize the loop. {text}"

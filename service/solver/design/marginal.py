"""Closed-loop poles on the unit circle, each named by its cause.

The predictive law ``du = Kr r - Kx x - Ku u(k-1)`` leaves a pole on the unit circle, whatever
the tuning, when the cost cannot see a direction of the loop.  Each cause is a structural fact
of the plant and the weights, and each gives an exact eigenvector of the closed-loop matrix
``M`` on ``[x; u(k-1)]`` (module :mod:`service.solver.design.closed_loop`):

``free_input_direction``
    A steady state ``[xi; v]`` with ``(I - A) xi = B v``, ``v != 0``, that no weighted output
    sees: ``W C xi = 0`` (``W' W = Q``), and no input weight ``S`` on it (``S v = 0``).  Held
    there, the predicted outputs and so the error ``E`` are zero, hence ``du = Kh E = 0`` and
    ``M [xi; v] = [xi; v]``: a pole at exactly ``z = 1``.  Typical of plants with more inputs
    than outputs.  Fix: input targets (``weights.input``).
``input_reaches_no_output``
    An input whose columns of the weighted prediction ``Wbar G`` are all zero (no weighted
    output responds to it within the prediction horizon).  Its rows of ``Kh`` vanish, so it is
    never moved: a pole at ``z = 1``.  Fix: a weight on an output it moves, a longer prediction
    horizon, or take the input out of the model.
``unweighted_output`` and ``unobservable_mode``
    A plant mode ``A v = lambda v`` on the circle with ``W C v = 0``: then ``Kx v = 0`` and
    ``M [v; 0] = lambda [v; 0]``.  When some output does see it (``C v != 0``) the outputs
    with zero weight are named (fix: a weight on one of them, or a zone); when none does
    (``C v = 0``) the model carries a mode that no output shows (fix: the model).
``uncontrollable_mode``
    A left eigenvector ``w' A = lambda w'`` with ``w' B = 0`` gives the left eigenvector
    ``[w; 0]`` of ``M`` (PBH test, :mod:`service.solver.models.modes`).  Fix: the model.
``zone_output``
    Any of the first three whose outputs are zone outputs (``zone_outputs``: held in a range by
    the move QP, weight 0 in ``Q`` by design): an unweighted mode seen only by zone outputs, an
    input that reaches only zone outputs, or a free input direction that moves a zone output
    at steady state (the free directions that remain when the zone outputs are weighted stay
    ``free_input_direction``).  Inside its zone the unconstrained law leaves the output alone
    on purpose; the move QP holds it in its zone.  No fix is needed.
``tuning``
    A pole within :data:`MARGINAL_TOLERANCE` of the circle that none of the above explains.

The eigenvector facts follow from the closed-loop matrix and the form of the gains
(``Kh`` is the first block row of ``H^-1 G' Q``); each subspace is found by a singular value
decomposition with the rank threshold :data:`RANK_TOLERANCE` relative to the largest singular
value of a scaled matrix (common practice).  Each structural mode is then matched to the
nearest unused closed-loop pole within :data:`POLE_MATCH` (relative); a structural mode
without a partner is a duplicate of one already counted (a mode both uncontrollable and
unweighted, for example) and is left out.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import scipy.linalg
from numpy.typing import NDArray

from service.solver.numerics import balance_states, in_scaled_states

__all__ = [
    "MARGINAL_TOLERANCE",
    "PART_TOLERANCE",
    "POLE_MATCH",
    "RANK_TOLERANCE",
    "MarginalMode",
    "describe_signals",
    "in_input_units",
    "marginal_mode_warnings",
    "marginal_modes",
    "on_unit_circle",
]

#: A pole whose modulus is within this of 1 lies on the unit circle: it is neither stable nor
#: unstable, but marginal.  The computed eigenvalues of a closed-loop matrix with a structural
#: pole at 1 scatter around it by rounding: about ``eps ||M||`` for a simple pole and about
#: ``(eps ||M||)^(1/k)`` for a Jordan block of length ``k`` (Wilkinson's perturbation bound,
#: standard numerical linear algebra); ``1e-6`` covers blocks of length 2 with a wide margin
#: and blocks of length 3 on moderately scaled models.  The verdict ``stable`` asks for every
#: pole below ``1 - MARGINAL_TOLERANCE``, ``unstable_closed_loop`` for one above
#: ``1 + MARGINAL_TOLERANCE``, so that rounding never flips either.
MARGINAL_TOLERANCE = 1e-6
#: A structural eigenvalue and a computed closed-loop pole within this distance (relative to
#: ``max(1, |lambda|)``) are the same pole.
POLE_MATCH = 1e-4
#: Relative singular-value threshold of the subspace ranks (common practice).
RANK_TOLERANCE = 1e-9
#: A part (some rows) of an orthonormal basis counts as nonzero in a direction when its singular
#: value there exceeds this: the basis vectors have unit length, and rounding leaves parts of
#: about ``eps / gap`` (common practice).
PART_TOLERANCE = 1e-6
#: A signal is named when its entry in a direction is at least this share of the largest.
_NAMED_SHARE = 1e-3


@dataclass(frozen=True)
class MarginalMode:
    """One closed-loop pole on the unit circle and what holds it there.

    Attributes
    ----------
    pole : complex
        The computed closed-loop pole.
    cause : str
        ``"free_input_direction"``, ``"input_reaches_no_output"``, ``"unweighted_output"``,
        ``"zone_output"``, ``"unobservable_mode"``, ``"uncontrollable_mode"`` or ``"tuning"``.
    inputs, outputs, states : tuple of int
        Indices of the signals the mode concerns: the inputs along a free direction or the
        input no output sees; the outputs with zero weight that see the mode; the states
        that carry a plant mode.
    direction : ndarray, shape (m,), or None
        For ``free_input_direction`` (and a ``zone_output`` input direction): the input
        direction, largest entry 1, in the units of the inputs the design was given (see
        :func:`in_input_units` for a design on span-scaled inputs).
    """

    pole: complex
    cause: str
    inputs: tuple[int, ...] = ()
    outputs: tuple[int, ...] = ()
    states: tuple[int, ...] = ()
    direction: NDArray[np.float64] | None = None


def in_input_units(modes: Sequence[MarginalMode], input_span: NDArray[np.float64]) -> tuple[MarginalMode, ...]:
    """The modes with each input direction taken from span-scaled inputs to the inputs' own units.

    Parameters
    ----------
    modes : sequence of MarginalMode
        Found on a plant whose inputs are scaled, ``u_s = u / span`` (``B_s = B diag(span)``).
    input_span : ndarray, shape (m,)
        The inputs' spans (engineering units per scaled unit), positive.

    Returns
    -------
    tuple of MarginalMode
        A direction ``v_s`` of the scaled inputs is ``v = diag(span) v_s`` of the inputs
        themselves (``B v = B_s v_s``), divided again by its entry of largest modulus so that
        entry is 1.  The inputs a mode names stay those decided on ``v_s``, where the spans
        make the entries comparable whatever the units.  Modes without a direction are kept.
    """
    out = []
    for mode in modes:
        if mode.direction is None:
            out.append(mode)
            continue
        own = input_span * mode.direction
        out.append(dataclasses.replace(mode, direction=own / own[np.argmax(np.abs(own))]))
    return tuple(out)


def on_unit_circle(pole: complex, *, tolerance: float = MARGINAL_TOLERANCE) -> bool:
    """``| |pole| - 1 | <= tolerance``."""
    return abs(abs(pole) - 1.0) <= tolerance


def _null_space(matrix: NDArray[np.complex128] | NDArray[np.float64], reference: float) -> NDArray[np.complex128]:
    """Orthonormal basis (columns) of the null space of ``matrix``: singular values at most
    ``RANK_TOLERANCE * reference`` count as zero."""
    cols = matrix.shape[1]
    if matrix.shape[0] == 0 or cols == 0:
        return np.eye(cols, dtype=complex)
    s = np.linalg.svd(matrix, compute_uv=False)  # the cheap part first: most tests find full rank
    rank = int(np.count_nonzero(s > RANK_TOLERANCE * reference))
    if rank == cols:
        return np.zeros((cols, 0), dtype=complex)
    _, s, vh = np.linalg.svd(matrix, full_matrices=matrix.shape[0] < cols)  # vh complete either way
    return np.asarray(vh[rank:].conj().T, dtype=complex)


def _range(matrix: NDArray[np.complex128], threshold: float = 0.0) -> NDArray[np.complex128]:
    """Orthonormal basis (columns) of the range of ``matrix``: singular values above
    ``threshold`` (absolute; default :data:`PART_TOLERANCE`, for a part of an orthonormal basis)."""
    if matrix.size == 0:
        return np.zeros((matrix.shape[0], 0), dtype=complex)
    u, s, _ = np.linalg.svd(matrix, full_matrices=False)
    rank = int(np.count_nonzero(s > (threshold or PART_TOLERANCE)))
    return np.asarray(u[:, :rank], dtype=complex)


def _named(vector: NDArray[np.complex128] | NDArray[np.float64]) -> tuple[int, ...]:
    size = np.abs(vector)
    if not size.size or size.max() == 0.0:
        return ()
    return tuple(int(i) for i in np.flatnonzero(size >= _NAMED_SHARE * size.max()))


def _scale(matrix: NDArray[np.float64]) -> float:
    value = float(np.linalg.norm(matrix, 1)) if matrix.size else 0.0
    return value if value > 0.0 else 1.0


def _input_scales(a: NDArray[np.float64], b: NDArray[np.float64]) -> NDArray[np.float64]:
    """Per input, the factor that gives its column of ``B`` the size of ``A`` (1 for a zero column).

    The rank decisions and the naming of input directions are made on the inputs times these
    factors, so that the inputs' units decide neither.
    """
    m = b.shape[1]
    norms = np.linalg.norm(b, axis=0) if b.size else np.zeros(m)
    return np.divide(_scale(a), norms, out=np.ones(m), where=norms > 0.0)


def _blind_eigenspace(
    big_a: NDArray[np.float64],
    observed: NDArray[np.complex128] | NDArray[np.float64],
    z: complex,
    count: int,
    reference: float,
) -> NDArray[np.complex128]:
    """Basis of the generalized eigenvectors of ``big_a`` at ``z`` that ``observed`` never sees.

    The ``count`` eigenvalues of ``big_a`` nearest ``z`` are moved to the front of an ordered
    complex Schur form ``A Z = Z T`` (``scipy.linalg.schur`` with ``sort``), so the leading
    columns ``Z1`` span their invariant subspace with ``A Z1 = Z1 T11``.  Its unobservable
    part is ``Z1 null([O Z1; O Z1 T11; ...; O Z1 T11^(count-1)])`` (the Kalman observability
    test on the small restricted pair, standard linear systems theory).
    """
    if count <= 0:
        return np.zeros((big_a.shape[0], 0), dtype=complex)
    values = scipy.linalg.eigvals(big_a, check_finite=False)
    gaps = np.sort(np.abs(values - z))
    reach = float(gaps[min(count, gaps.size) - 1]) * (1.0 + 1e-9) + 1e-300
    t, zs, size = scipy.linalg.schur(big_a, output="complex", sort=lambda x: abs(x - z) <= reach)
    z1, t11 = zs[:, :size], t[:size, :size]
    blocks, current = [], z1
    for _ in range(size):
        blocks.append(observed @ current)
        current = current @ t11
    blind = _null_space(np.vstack(blocks), max(reference, 1.0))
    if not blind.shape[1]:
        return np.zeros((big_a.shape[0], 0), dtype=complex)
    basis, _ = np.linalg.qr(z1 @ blind)
    return np.asarray(basis, dtype=complex)


def _structural_modes(
    a: NDArray[np.float64],
    b: NDArray[np.float64],
    c: NDArray[np.float64],
    output_root: NDArray[np.float64],
    weighted: NDArray[np.float64],
    input_weight_root: NDArray[np.float64] | None,
    poles: NDArray[np.complex128],
) -> list[MarginalMode]:
    n, m = a.shape[0], b.shape[1]
    cw = output_root @ c
    modes: list[MarginalMode] = []
    scale = _scale(a)
    d = _input_scales(a, b)
    reference = max(scale, 1.0)
    # Uncontrollable plant modes on the circle: left eigenvectors blind to every input.  Their
    # component of the state stays out of the cost-blind subspace below (the inputs only
    # compensate it there, they do not have a free direction).
    blind_rows: list[NDArray[np.complex128]] = []
    circle = (
        [complex(x) for x in scipy.linalg.eigvals(a, check_finite=False) if on_unit_circle(complex(x))] if n else []
    )
    for z in _clusters(circle):
        if z.imag < -1e-12:
            continue
        if not np.any(np.abs(poles - z) <= POLE_MATCH * max(1.0, abs(z))):
            continue  # an uncontrollable mode stays a closed-loop pole: none here
        if abs(z.imag) <= 1e-12:  # real arithmetic for a real eigenvalue (a quarter of the work)
            hidden = _null_space(np.vstack([(a - z.real * np.eye(n)).T, (b * d).T]), reference)
        else:
            hidden = _null_space(np.vstack([(a - z * np.eye(n)).conj().T, (b * d).conj().T]), reference)
        blind_rows.append(hidden.conj().T)
        if abs(z.imag) > 1e-12:
            blind_rows.append(hidden.T)
        for w in hidden.T:
            modes += _pair(MarginalMode(pole=z, cause="uncontrollable_mode", states=_named(w)))
    # Inputs that no weighted output sees within the horizon: their columns of Wbar G vanish.
    column_norms = np.linalg.norm(weighted, axis=0).reshape(-1, m).max(axis=0) if weighted.size else np.zeros(m)
    top = float(column_norms.max()) if column_norms.size else 0.0
    dead = [j for j in range(m) if column_norms[j] <= RANK_TOLERANCE * top or top == 0.0]
    if input_weight_root is not None:
        seen = np.linalg.norm(input_weight_root, axis=0) > 0.0
        dead = [j for j in dead if not seen[j]]
    for j in dead:
        modes.append(MarginalMode(pole=1.0 + 0.0j, cause="input_reaches_no_output", inputs=(j,)))
    # The cost-blind part of the incremental model [x; u] with du = 0: the unobservable
    # subspace of ([[A, B], [0, I]], [[W C, 0], [0, S]]).  There E = 0, so du = 0 and the
    # loop moves as the model alone: its eigenvalues are closed-loop poles.  Each input is
    # scaled so that its column of B has the size of A (units are arbitrary).
    cs = cw * (scale / max(float(np.linalg.norm(cw, 2)) if cw.size else 0.0, 1e-300))
    big_a = np.block([[a, b * d], [np.zeros((m, n)), np.eye(m)]])
    rows: list[NDArray[np.complex128] | NDArray[np.float64]] = [np.hstack([cs, np.zeros((cw.shape[0], m))])]
    if input_weight_root is not None:
        rows.append(np.hstack([np.zeros((input_weight_root.shape[0], n)), scale * input_weight_root * d]))
    for w in blind_rows:
        rows.append(np.hstack([scale * w, np.zeros((w.shape[0], m))]))
    observed = np.asarray(np.vstack(rows), dtype=complex)
    plant_values = [complex(x) for x in scipy.linalg.eigvals(a, check_finite=False)] if n else []
    candidates = [z for z in plant_values if on_unit_circle(z, tolerance=POLE_MATCH)] + ([1.0 + 0j] if m else [])
    for z in _clusters(candidates):
        if z.imag < -1e-12:
            continue
        count = sum(1 for x in plant_values if abs(x - z) <= POLE_MATCH * max(1.0, abs(z)))
        count += m if abs(z - 1.0) <= POLE_MATCH else 0
        space = _blind_eigenspace(big_a, observed, z, count, reference)
        if not space.shape[1]:
            continue
        count = space.shape[1]
        moved = space[n:, :]
        if abs(z - 1.0) <= POLE_MATCH:
            balanced = moved.copy()
            balanced[dead, :] = 0.0  # the dead inputs are named on their own
            # How many free directions: decided on the inputs as balanced here (each input
            # scaled by d, so that its column of B has the size of A), whatever their units or
            # spans; the directions themselves are read in the plant's own inputs (times d).
            free = _range(balanced).shape[1]
            inputs_part = balanced * d[:, None]
            directions = np.linalg.svd(inputs_part, full_matrices=False)[0][:, :free] if free else inputs_part[:, :0]
            for v in directions.T:
                real = np.real(v * np.exp(-1j * np.angle(v[np.argmax(np.abs(v))])))
                real = real / real[np.argmax(np.abs(real))]
                modes.append(
                    MarginalMode(pole=1.0 + 0.0j, cause="free_input_direction", inputs=_named(real / d), direction=real)
                )
            plant_count = count - _range(moved).shape[1]
        else:
            plant_count = count
        if plant_count <= 0:
            continue
        plant = _range(space[:n, :])[:, :plant_count]
        outputs = c @ plant
        seen = _range(outputs, PART_TOLERANCE * _scale(c)).shape[1]
        states = _named(np.linalg.norm(plant, axis=1))
        for _ in range(plant_count - seen):
            modes += _pair(MarginalMode(pole=z, cause="unobservable_mode", states=states))
        for _ in range(min(seen, plant_count)):
            modes += _pair(
                MarginalMode(
                    pole=z, cause="unweighted_output", outputs=_named(np.linalg.norm(outputs, axis=1)), states=states
                )
            )
    return modes


def _clusters(values: Sequence[complex]) -> list[complex]:
    """One representative per group of values within :data:`POLE_MATCH` (real ones made real)."""
    found: list[complex] = []
    for z in values:
        if any(abs(z - y) <= POLE_MATCH * max(1.0, abs(y)) for y in found):
            continue
        found.append(complex(z.real, 0.0) if abs(z.imag) <= 1e-12 * max(1.0, abs(z)) else z)
    return found


def _pair(mode: MarginalMode) -> list[MarginalMode]:
    """The mode, and its complex conjugate when it is complex (a real model's modes pair up)."""
    if abs(mode.pole.imag) <= 1e-12:
        return [mode]
    return [mode, MarginalMode(mode.pole.conjugate(), mode.cause, mode.inputs, mode.outputs, mode.states)]


def _zone_modes(
    structural: list[MarginalMode],
    zones: tuple[int, ...],
    *,
    a: NDArray[np.float64],
    b: NDArray[np.float64],
    c: NDArray[np.float64],
    output_root: NDArray[np.float64],
    weighted: NDArray[np.float64],
    input_weight_root: NDArray[np.float64] | None,
    poles: NDArray[np.complex128],
) -> list[MarginalMode]:
    """Relabel the structural modes that the zone outputs cause as ``zone_output``."""
    zone_set = set(zones)
    n, m = a.shape[0], b.shape[1]
    # Which inputs move a zone output at all (Markov parameters C_zone A^k B, k < n + 1).
    reach = np.zeros((len(zones), m), dtype=bool)
    if zones and m:
        block, current = c[list(zones)], b
        floor = RANK_TOLERANCE * _scale(c) * _scale(b)
        for _ in range(n + 1):
            reach |= np.abs(block @ current) > floor
            current = a @ current
    out: list[MarginalMode] = []
    free = [mode for mode in structural if mode.cause == "free_input_direction"]
    for mode in structural:
        if mode.cause == "unweighted_output" and mode.outputs and set(mode.outputs) <= zone_set:
            out.append(dataclasses.replace(mode, cause="zone_output"))
        elif mode.cause == "input_reaches_no_output" and all(reach[:, j].any() for j in mode.inputs):
            seen = tuple(i for k, i in enumerate(zones) if reach[k, list(mode.inputs)].any())
            out.append(dataclasses.replace(mode, cause="zone_output", outputs=seen))
        elif mode.cause != "free_input_direction":
            out.append(mode)
    if not free:
        return out
    # The free directions that remain with the zone outputs weighted are truly free; the rest of
    # their span moves a zone output at steady state.
    extra = np.zeros((len(zones), output_root.shape[1]))
    extra[np.arange(len(zones)), list(zones)] = 1.0
    root = np.vstack([output_root, extra])
    kept = [
        mode
        for mode in _structural_modes(a, b, c, root, weighted, input_weight_root, poles)
        if mode.cause == "free_input_direction"
    ]
    every = np.array([mode.direction for mode in free if mode.direction is not None], dtype=float).T.reshape(m, -1)
    truly = np.array([mode.direction for mode in kept if mode.direction is not None], dtype=float).T.reshape(m, -1)
    basis = np.linalg.qr(truly)[0] if truly.size else np.zeros((m, 0))
    rest = every - basis @ (basis.T @ every)
    u = np.linalg.svd(rest, full_matrices=False)[0] if rest.size else np.zeros((m, 0))
    zone_dirs = u[:, : max(len(free) - basis.shape[1], 0)]
    out += kept[: len(free)]
    d = _input_scales(a, b)
    for v in zone_dirs.T:
        real = v / v[np.argmax(np.abs(v))]
        moved = np.linalg.lstsq(np.eye(n) - a, b @ real, rcond=None)[0] if n else np.zeros(0)
        touched = tuple(
            i
            for i in zones
            if abs(float(c[i] @ moved)) > PART_TOLERANCE * max(1.0, float(np.abs(c @ moved).max(initial=0.0)))
        )
        out.append(
            MarginalMode(
                pole=1.0 + 0.0j,
                cause="zone_output",
                inputs=_named(real / d),  # named on the balanced inputs
                outputs=touched or zones,
                direction=real,
            )
        )
    return out


def marginal_modes(
    a: NDArray[np.float64],
    b: NDArray[np.float64],
    c: NDArray[np.float64],
    *,
    output_root: NDArray[np.float64],
    weighted: NDArray[np.float64],
    poles: NDArray[np.complex128],
    input_weight_root: NDArray[np.float64] | None = None,
    zone_outputs: Sequence[int] = (),
) -> list[MarginalMode]:
    """Return every closed-loop pole on the unit circle with its cause.

    Parameters
    ----------
    a : ndarray, shape (n, n)
    b : ndarray, shape (n, m)
    c : ndarray, shape (p, n)
        The plant the design used (controlled outputs).
    output_root : ndarray, shape (p, p)
        ``W`` with ``W' W = Q``.
    weighted : ndarray, shape (Np*p, k*m)
        ``Wbar G``, the design's weighted prediction of the free moves (inputs fastest).
    poles : ndarray of complex, shape (n+m,)
        The computed closed-loop poles.
    input_weight_root : ndarray, shape (m, m), optional
        ``S^(1/2)`` of a weight on ``u - u_target``; ``None`` when there is none.
    zone_outputs : sequence of int, optional
        Outputs held in a zone by the move QP (weight 0 in ``Q``): the modes they cause are
        named ``zone_output``.

    Returns
    -------
    list of MarginalMode
        One per closed-loop pole within :data:`MARGINAL_TOLERANCE` of the unit circle, and per
        structural mode matched to a computed pole, structural causes first.

    Notes
    -----
    See the module notes for each cause and the eigenvector it gives.
    """
    a_ = np.asarray(a, dtype=float)
    b_ = np.asarray(b, dtype=float)
    c_ = np.asarray(c, dtype=float)
    computed = np.asarray(poles, dtype=complex)
    if not np.any(np.abs(np.abs(computed) - 1.0) <= POLE_MATCH):
        return []  # every structural cause is a closed-loop pole on the circle: none is
    used = np.zeros(computed.size, dtype=bool)
    found: list[MarginalMode] = []
    # The rank decisions below are made on the states balanced by a diagonal similarity
    # (powers of two, so exact; the system balancing of balance_states), so that the states'
    # units do not decide them: a state fed only by an entry of 1e-4 beside one of 1e9 would
    # otherwise look blind to the inputs.  The poles, the inputs and the outputs do not change.
    # Each output's row of C is scaled to unit size first (outputs' units are arbitrary too),
    # with the weights' root scaled back so that W C, the weighted outputs, is unchanged.
    rows = np.linalg.norm(c_, axis=1) if c_.size else np.ones(c_.shape[0])
    rows = np.where(rows > 0.0, rows, 1.0)
    c_, output_root = c_ / rows[:, None], np.asarray(output_root, dtype=float) * rows[None, :]
    d = balance_states(a_, b_, c_) if a_.size else np.ones(0)
    a_, b_, c_ = in_scaled_states(d, a_, b_, c_)
    structural = _structural_modes(a_, b_, c_, output_root, weighted, input_weight_root, computed)
    if zone_outputs:
        structural = _zone_modes(
            structural,
            tuple(sorted(int(i) for i in zone_outputs)),
            a=a_,
            b=b_,
            c=c_,
            output_root=output_root,
            weighted=weighted,
            input_weight_root=input_weight_root,
            poles=computed,
        )
    for mode in structural:
        gap = np.where(used, np.inf, np.abs(computed - mode.pole))
        if not gap.size:
            break
        best = int(np.argmin(gap))
        if gap[best] > POLE_MATCH * max(1.0, abs(mode.pole)):
            continue  # a duplicate of a mode already counted
        used[best] = True
        found.append(
            MarginalMode(
                pole=complex(computed[best]),
                cause=mode.cause,
                inputs=mode.inputs,
                outputs=mode.outputs,
                states=mode.states,
                direction=mode.direction,
            )
        )
    for i, z in enumerate(computed):
        if not used[i] and on_unit_circle(complex(z)):
            found.append(MarginalMode(pole=complex(z), cause="tuning"))
    return found


def describe_signals(
    mode: MarginalMode,
    *,
    inputs: Sequence[str],
    outputs: Sequence[str],
    states: Sequence[str],
) -> list[str]:
    """The tags of the signals a mode concerns: inputs, then outputs, then states."""
    return [inputs[j] for j in mode.inputs] + [outputs[i] for i in mode.outputs] + [states[s] for s in mode.states]


def _tags(indices: Sequence[int], names: Sequence[str]) -> str:
    return ", ".join(repr(names[i]) for i in indices)


def _pole_text(modes: Sequence[MarginalMode]) -> str:
    values = sorted({(round(z.real, 6), round(abs(z.imag), 6)) for z in (m.pole for m in modes)})
    text = ", ".join(f"{re:.6g}" if im == 0.0 else f"{re:.6g} +/- {im:.6g}j" for re, im in values)
    return f"z = {text}"


def marginal_mode_warnings(
    modes: Sequence[MarginalMode],
    *,
    inputs: Sequence[str],
    outputs: Sequence[str],
    states: Sequence[str],
) -> list[tuple[str, str]]:
    """Return one ``(code, message)`` per cause among ``modes``, with the fix that removes it.

    ``uncontrollable_mode`` gets no message here: the plant's PBH warning
    (:func:`service.solver.models.modes.uncontrollable_mode_warnings`) already names it.
    """
    by_cause: dict[str, list[MarginalMode]] = {}
    for mode in modes:
        by_cause.setdefault(mode.cause, []).append(mode)
    found: list[tuple[str, str]] = []
    free = by_cause.get("free_input_direction", [])
    if free:
        parts = []
        for mode in free:
            assert mode.direction is not None
            terms = [f"{mode.direction[j]:+.3g} {inputs[j]}" for j in mode.inputs]
            parts.append(" ".join(terms))
        count = len(free)
        found.append(
            (
                "free_input_direction",
                f"{count} closed-loop pole(s) at z = 1 come from {'a direction' if count == 1 else 'directions'} "
                f"of the inputs that changes no weighted output at steady state ({'; '.join(parts)}): "
                f"the controller has no reason to move the inputs along it, so they may drift there. "
                f"This is not instability and no move weight or horizon removes it. Give those inputs "
                f"targets: a positive weights.input for them (the target values are "
                f"scenario.input_targets of /simulate, by default the operating point), or a weight "
                f"on an output that this direction moves.",
            )
        )
    dead = by_cause.get("input_reaches_no_output", [])
    if dead:
        names = _tags(sorted({j for m in dead for j in m.inputs}), inputs)
        found.append(
            (
                "input_reaches_no_output",
                f"No weighted output responds to {names} within the prediction horizon, so the "
                f"controller never moves it: a closed-loop pole at z = 1 per such input. Weight an "
                f"output it moves, lengthen the prediction horizon past its dead time, give it an "
                f"input target (weights.input), or take it out of the model.",
            )
        )
    unweighted = by_cause.get("unweighted_output", [])
    if unweighted:
        names = _tags(sorted({i for m in unweighted for i in m.outputs}), outputs)
        found.append(
            (
                "unweighted_output",
                f"The plant mode(s) at {_pole_text(unweighted)} on the unit circle show only in "
                f"{names}, which carry no output weight: the controller leaves them where they are "
                f"(an integrating level with weight 0 drifts). Give one of these outputs a weight "
                f"(or hold it in a range: zones).",
            )
        )
    unseen = by_cause.get("unobservable_mode", [])
    if unseen:
        names = _tags(sorted({s for m in unseen for s in m.states}), states)
        found.append(
            (
                "unobservable_mode",
                f"The model has mode(s) at {_pole_text(unseen)} on the unit circle that no output "
                f"shows (carried by {names}): they stay among the closed-loop poles whatever the "
                f"tuning. Check the model: remove the states that no output sees (a minimal "
                f"realization).",
            )
        )
    zoned = by_cause.get("zone_output", [])
    if zoned:
        names = _tags(sorted({i for m in zoned for i in m.outputs}), outputs)
        found.append(
            (
                "zone_output",
                f"{len(zoned)} closed-loop pole(s) at {_pole_text(zoned)} belong to the zone output(s) "
                f"{names}: inside its zone an output has no weight, so the unconstrained gains leave it "
                f"(and the input directions that move only it) where it is, by design. This is not "
                f"instability and needs no change of weights or horizons: the move QP (/simulate) holds "
                f"the output inside its zone. The fixed gains alone do not: deployed without the QP, "
                f"an integrating zone output drifts.",
            )
        )
    other = by_cause.get("tuning", [])
    if other:
        found.append(
            (
                "marginal_pole",
                f"{len(other)} closed-loop pole(s) lie on the unit circle within {MARGINAL_TOLERANCE:g} "
                f"({_pole_text(other)}) without a structural cause: the loop is marginal. Check the "
                f"model's poles on the unit circle, then lengthen the prediction horizon or lower the "
                f"move weights.",
            )
        )
    return found

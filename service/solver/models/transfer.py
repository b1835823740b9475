"""Transfer-matrix plant models (step-test elements with dead time) as exact discrete models.

Each element of the p x m matrix (output i, input j) is ::

    g_ij(s) = K (L s + 1) / ((tau1 s + 1) (tau2 s + 1)) * (1/s if integrating) * e^(-theta s)

with zero, one or two time constants, an optional lead ``L`` (negative for an inverse
response) and dead time ``theta >= 0``; ``None`` where the input does not affect the output.
A second grid of the same shape rules gives the measured disturbances.

Exact sampling with a fractional dead time
------------------------------------------
Write ``theta = (d + f) Ts`` with whole samples ``d`` and fraction ``0 <= f < 1``.  With
the input held over each sample, the delayed input seen by the element's continuous
dynamics ``(Ac, Bc, Cc, Dc)`` is ``u(k-d-1)`` for the first ``f Ts`` of sample ``k`` and
``u(k-d)`` for the rest, so integrating the state equation over one sample gives ::

    x(k+1) = Phi x(k) + Gamma0 u(k-d) + Gamma1 u(k-d-1),     Phi = e^(Ac Ts)
    Gamma0 = integral_0^((1-f)Ts) e^(Ac s) ds Bc
    Gamma1 = e^(Ac (1-f) Ts) integral_0^(f Ts) e^(Ac s) ds Bc
    y(k)   = Cc x(k) + Dc u(k-d-1)

(the modified z-transform of a delayed element, standard result).  With ``v(k) = u(k-d-1)``
and the state ``xi = x - Gamma0 v`` this is an element of the same order driven by the input
delayed ``h = d + 1`` whole samples::

    xi(k+1) = Phi xi(k) + (Phi Gamma0 + Gamma1) v(k),   y(k) = Cc xi(k) + (Cc Gamma0 + Dc) v(k)

so a fractional delay costs exactly one extra state (one more delay sample); for ``f = 0``
the element is ``(Phi, Gamma, Cc, Dc)`` with ``h = d``.  Dead times within ``1e-9`` of a whole
number of samples are taken as whole (a ratio such as 2.1 / 0.7 is not exact in binary).

Sharing the delays
------------------
Whole-sample delays become shift-register states.  Every input ``j`` has one register,
shared by all elements of its column, and every output ``i`` may carry one at its end,
shared by all elements of its row (a measurement or analyser delay).  Element ``(i, j)``
reads its input ``h_ij - e_i`` samples back from the input register, where ``e_i`` is the
delay moved to the output.  The delay states then number ::

    sum_i e_i + sum_j max_i (h_ij - e_i),       0 <= e_i <= min_j h_ij

and the ``e_i`` are chosen to minimise it (a tiny integer program, solved exactly by
``scipy.optimize.milp``; ties go to the input side).  With all ``e_i = 0`` this is one
register per input as long as its column's longest delay, which never needs more states
than delaying each input by its column's shortest delay and the elements by the rest.

Sharing the integrators
-----------------------
All integrating elements of a row, manipulated and disturbance columns alike, share one
integrator at the output, because ::

    sum_j K_j h_j(s) e^(-theta_j s) u_j / s  =  (1/s) sum_j K_j h_j(s) e^(-theta_j s) u_j

with ``h_j = (L_j s + 1) / prod (tau s + 1)`` the element's non-integrating part.  (A level
driven by a valve and by a measured inflow is one level: with an integrator per element the
inflow's integrator is a mode at ``z = 1`` that no manipulated input reaches, and every
closed loop would keep a pole at 1.)  The sampled form is exact as well, whatever the
fractional dead times: in the chain realization the integrator ``q_j`` comes last and
nothing depends on it, so ``Ac``, and with it ``e^(Ac t)`` and every term of the sampled
element above, is block lower triangular with a 1 on the integrator's diagonal ::

    xi_lag(k+1) = Phi_lag xi_lag(k) + Gamma_lag v(k)
    q_j(k+1)    = q_j(k) + phi_j xi_lag(k) + gamma_j v(k)
    y_j(k)      = K_j q_j(k) + c_j xi_lag(k) + D_j v(k)

(``phi_j xi_lag + gamma_j v`` is the exact integral over one sample of the element's lagged,
delayed, held input, the switch at ``f Ts`` included; ``c_j = K_j L_j`` on the last lag).
The row's output sees the integrators only through ``Q_i = sum_j K_j q_j``, and ::

    Q_i(k+1) = Q_i(k) + sum_j K_j (phi_j xi_lag,j(k) + gamma_j v_j(k))

so ``Q_i``, in the output's units, replaces them all with the same output sequence for every
input sequence (a linear change of variables that drops states the output never sees
separately).  The element dynamics then add one state per time constant, plus one integrator
per output row that has an integrating element.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import scipy.optimize
from numpy.typing import NDArray

from service.errors import FieldKey, NumericalError
from service.solver.models.sampling import hold_integrals

__all__ = [
    "FRACTION_SNAP",
    "STIFFNESS_LIMIT",
    "SampledTransferModel",
    "StateRole",
    "TransferElement",
    "delay_samples",
    "sampled_element",
    "stiffness_ratio",
    "transfer_matrix_model",
    "transfer_state_count",
]

#: A dead time within this many samples (relative, at least absolute) of a whole number of
#: samples is taken as whole.
FRACTION_SNAP = 1e-9
#: Largest ratio of the sample time (or the lead) to an element's shortest time constant
#: that is sampled.  The sampled element loses about log10(ratio) of the ~16 digits of
#: double precision (step responses within a few 1e-9 relative at 1e8), and the matrix
#: exponential fails outright near 1e18.
STIFFNESS_LIMIT = 1e8

Grid = Sequence[Sequence["TransferElement | None"]]


@dataclass(frozen=True)
class TransferElement:
    """One input/output pair of a transfer matrix, in the time unit of the sample time.

    Attributes
    ----------
    gain : float
        ``K``: the steady-state gain (output units per input unit), or for an integrating
        element the ramp rate (output units per input unit per time unit).
    time_constants : tuple of float
        Zero, one or two positive lag time constants ``tau``.
    dead_time : float
        ``theta >= 0``.
    lead : float or None
        Lead time constant ``L`` of the numerator ``L s + 1`` (negative: inverse response);
        ``None`` or 0 for none.  Needs at least one time constant or integration.
    integrating : bool
        Adds a pole at ``s = 0``: the step response is a ramp (common for levels).
    """

    gain: float
    time_constants: tuple[float, ...] = ()
    dead_time: float = 0.0
    lead: float | None = None
    integrating: bool = False

    def __post_init__(self) -> None:
        taus = tuple(float(t) for t in self.time_constants)
        object.__setattr__(self, "time_constants", taus)
        assert math.isfinite(self.gain), self.gain
        assert len(taus) <= 2 and all(math.isfinite(t) and t > 0.0 for t in taus), taus
        assert math.isfinite(self.dead_time) and self.dead_time >= 0.0, self.dead_time
        assert self.lead is None or math.isfinite(self.lead), self.lead
        assert not self.lead or self.order >= 1, "a lead needs a time constant or integration"

    @property
    def order(self) -> int:
        """Number of states of the element's dynamics alone (without its dead time).

        In a transfer matrix the integrating elements of a row share one integrator, so
        there an element holds only its ``len(time_constants)`` lag states.
        """
        return len(self.time_constants) + int(self.integrating)


@dataclass(frozen=True)
class StateRole:
    """What one state of a converted transfer matrix holds (indices are 0-based).

    Attributes
    ----------
    kind : str
        ``"element"`` (a lag state of element ``(output, column)``),
        ``"output_integrator"`` (the integrator shared by all integrating elements of row
        ``output``, in the output's units),
        ``"input_delay"`` (input ``column`` as it was ``lag`` samples ago) or
        ``"output_delay"`` (the summed response of output ``output`` before the dead time
        moved to its end, as it was ``lag`` samples ago).
    output : int or None
        Output (row) index, for ``"element"``, ``"output_integrator"`` and
        ``"output_delay"``.
    column : int or None
        Column index in its grid, for ``"element"`` and ``"input_delay"``.
    disturbance : bool
        ``column`` indexes the disturbance grid rather than the manipulated inputs.
    lag : int
        Delay states: samples back (from 1).  Element states: the state's place in the
        element's chain of lags (from 0).  0 for an output integrator.
    """

    kind: str
    output: int | None
    column: int | None
    disturbance: bool
    lag: int

    def describe(self) -> str:
        """A short English description with 1-based names ``u1``, ``d1``, ``y1``."""
        col = f"{'d' if self.disturbance else 'u'}{(self.column or 0) + 1}"
        out = f"y{(self.output or 0) + 1}"
        if self.kind == "element":
            return f"state {self.lag + 1} of element ({out}, {col})"
        if self.kind == "output_integrator":
            return f"integrator of {out}"
        if self.kind == "input_delay":
            return f"{col} {self.lag} sample{'s' if self.lag != 1 else ''} ago"
        return f"response of {out} {self.lag} sample{'s' if self.lag != 1 else ''} ago"


@dataclass(frozen=True)
class SampledTransferModel:
    """The exact discrete state-space model of a transfer matrix under zero-order hold.

    ``x(k+1) = A x(k) + B u(k) + Bd d(k)``, ``y(k) = C x(k) + D u(k) + Dd d(k)``.

    Attributes
    ----------
    a : ndarray, shape (n, n)
    b : ndarray, shape (n, m)
    b_disturbance : ndarray, shape (n, md), or None
        ``None`` when no disturbance grid was given.
    c : ndarray, shape (p, n)
    d : ndarray, shape (p, m)
        Feed-through; nonzero only for an element without dead time that has a lead and a
        single pole, or no dynamics at all.
    d_disturbance : ndarray, shape (p, md), or None
    states : tuple of StateRole
        One per state, in order.
    input_delays : tuple of int
        Register length per column (manipulated inputs, then disturbances).
    output_delays : tuple of int
        Delay samples moved to the end of each output.
    sample_time : float
    """

    a: NDArray[np.float64]
    b: NDArray[np.float64]
    b_disturbance: NDArray[np.float64] | None
    c: NDArray[np.float64]
    d: NDArray[np.float64]
    d_disturbance: NDArray[np.float64] | None
    states: tuple[StateRole, ...]
    input_delays: tuple[int, ...]
    output_delays: tuple[int, ...]
    sample_time: float

    @property
    def state_count(self) -> int:
        """``n``."""
        return int(self.a.shape[0])

    @property
    def strictly_proper(self) -> bool:
        """No input or disturbance reaches an output within the same sample."""
        dd = self.d_disturbance
        return not np.any(self.d) and (dd is None or not np.any(dd))


def delay_samples(dead_time: float, sample_time: float) -> tuple[int, float]:
    """Split ``dead_time = (whole + fraction) * sample_time`` with ``0 <= fraction < 1``.

    Parameters
    ----------
    dead_time : float
        ``theta >= 0``.
    sample_time : float
        ``Ts > 0``, same unit.

    Returns
    -------
    whole : int
    fraction : float
        Exactly 0.0 when ``theta / Ts`` is within :data:`FRACTION_SNAP` of a whole number.
    """
    assert dead_time >= 0.0 and sample_time > 0.0, (dead_time, sample_time)
    ratio = dead_time / sample_time
    nearest = round(ratio)
    if abs(ratio - nearest) <= FRACTION_SNAP * max(1.0, ratio):
        return int(nearest), 0.0
    whole = math.floor(ratio)
    return int(whole), ratio - whole


def stiffness_ratio(element: TransferElement, sample_time: float) -> float:
    """Return ``max(Ts, |L|) / min(tau)``, or 1.0 for an element without time constants.

    The schema edge should keep it at most :data:`STIFFNESS_LIMIT`; a lag that much shorter
    than the sample time has settled within a sample and can be left out.
    """
    if not element.time_constants:
        return 1.0
    return max(sample_time, abs(element.lead or 0.0)) / min(element.time_constants)


def _delay_count(element: TransferElement, sample_time: float) -> int:
    """``h``: whole delay samples ahead of the element's sampled dynamics."""
    whole, fraction = delay_samples(element.dead_time, sample_time)
    return whole + (1 if fraction > 0.0 else 0)


def _continuous(element: TransferElement) -> tuple[NDArray[np.float64], ...]:
    """A chain realization ``(Ac, Bc, Cc, Dc)`` of the element without its dead time.

    States: the lags in order, then the integrator; ``y = K (x_last + L dx_last/dt)``.
    Equal time constants are a chain like any other (no partial fractions).
    """
    k = element.order
    ac = np.zeros((k, k))
    bc = np.zeros((k, 1))
    blocks = [*element.time_constants, *([None] if element.integrating else [])]
    for i, tau in enumerate(blocks):
        source_scale = 1.0 if tau is None else 1.0 / tau
        if i == 0:
            bc[0, 0] = source_scale
        else:
            ac[i, i - 1] = source_scale
        if tau is not None:
            ac[i, i] = -1.0 / tau
    lead = element.lead or 0.0
    if k == 0:
        return ac, bc, np.zeros((1, 0)), np.array([[element.gain]])
    cc = np.zeros((1, k))
    cc[0, -1] = 1.0
    cc = element.gain * (cc + lead * ac[-1:, :])
    dc = element.gain * lead * bc[-1:, :]
    return ac, bc, cc, dc


def _sampled(
    element: TransferElement, sample_time: float, field: FieldKey
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64], float, int]:
    """Sampled dynamics ``(Phi, Gamma, C, D)`` of an element and its whole delay ``h``."""
    ratio = stiffness_ratio(element, sample_time)
    if ratio > STIFFNESS_LIMIT:
        raise NumericalError(
            f"A time constant of {min(element.time_constants):.3g} is too short to sample "
            f"accurately: the sample time or lead is {ratio:.3g} times longer (at most "
            f"{STIFFNESS_LIMIT:.0e}). A lag this fast settles within one sample; leave it out.",
            field=field,
        )
    ac, bc, cc, dc = _continuous(element)
    whole, fraction = delay_samples(element.dead_time, sample_time)
    if fraction == 0.0:
        phi, gamma = hold_integrals(ac, bc, sample_time, field=field)
        return phi, gamma, cc, float(dc[0, 0]), whole
    phi_late, gamma0 = hold_integrals(ac, bc, (1.0 - fraction) * sample_time, field=field)
    phi_early, gamma_early = hold_integrals(ac, bc, fraction * sample_time, field=field)
    phi = phi_late @ phi_early
    gamma1 = phi_late @ gamma_early
    return phi, phi @ gamma0 + gamma1, cc, float((cc @ gamma0 + dc)[0, 0]), whole + 1


def sampled_element(
    element: TransferElement, sample_time: float, *, field: FieldKey = ("model", "elements")
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64], float, int]:
    """One element sampled exactly: ``(Phi, Gamma, C, D)`` driven by the input ``h`` samples back.

    ``xi(k+1) = Phi xi(k) + Gamma u(k-h)``, ``y(k) = C xi(k) + D u(k-h)`` (the module
    docstring: a fractional dead time adds one whole sample to ``h`` and changes ``Gamma``
    and ``D``).  Shapes ``(k, k)``, ``(k, 1)``, ``(1, k)`` with ``k`` the element's order.

    Raises
    ------
    service.errors.NumericalError
        A time constant too short to sample (see :data:`STIFFNESS_LIMIT`).
    """
    return _sampled(element, sample_time, field)


Rows = list[list[TransferElement | None]]


def _columns(elements: Grid, disturbance_elements: Grid | None) -> tuple[Rows, int]:
    """Rows over all columns (inputs then disturbances) and the number of inputs ``m``."""
    p = len(elements)
    assert p >= 1, "a transfer matrix needs at least one output"
    m = len(elements[0])
    assert m >= 1 and all(len(row) == m for row in elements), "rows of unequal length"
    rows = [list(row) for row in elements]
    if disturbance_elements is not None:
        assert len(disturbance_elements) == p, "disturbance grid needs one row per output"
        md = len(disturbance_elements[0])
        assert all(len(row) == md for row in disturbance_elements), "rows of unequal length"
        rows = [row + list(extra) for row, extra in zip(rows, disturbance_elements, strict=False)]
    return rows, m


def _split_delays(delays: dict[tuple[int, int], int], p: int, columns: int) -> tuple[list[int], list[int]]:
    """Output delays ``e`` and input register lengths minimising the delay states."""
    input_reg = [0] * columns
    for (_, j), h in delays.items():
        input_reg[j] = max(input_reg[j], h)
    row_min = [min((h for (i, _), h in delays.items() if i == row), default=0) for row in range(p)]
    if not any(row_min):
        return [0] * p, input_reg
    pairs = sorted(delays)
    matrix = np.zeros((len(pairs), p + columns))
    for r, (i, j) in enumerate(pairs):
        matrix[r, i] = 1.0
        matrix[r, p + j] = 1.0
    # Each output-delay sample costs a little more than one state, so among the placements
    # with fewest states the one with least output delay wins (fewer than 1 in total).
    tie = 1.0 / (2.0 + sum(row_min))
    cost = np.concatenate([np.full(p, 1.0 + tie), np.ones(columns)])
    result = scipy.optimize.milp(
        cost,
        integrality=np.ones(p + columns),
        bounds=scipy.optimize.Bounds(0.0, np.array(row_min + input_reg, dtype=float)),
        constraints=scipy.optimize.LinearConstraint(matrix, lb=[delays[k] for k in pairs], ub=np.inf),
        options={"mip_rel_gap": 0.0},
    )
    assert result.success, result.message
    out = [int(v) for v in np.rint(result.x[:p])]
    regs = [0] * columns
    for (i, j), h in delays.items():
        regs[j] = max(regs[j], h - out[i])
    return out, regs


def _integrates(row: list[TransferElement | None]) -> bool:
    """The row has an integrating element (and so one shared output integrator)."""
    return any(el is not None and el.integrating for el in row)


def _plan(rows: Rows, sample_time: float) -> tuple[list[int], list[int]]:
    """Output delays and input register lengths for the elements' whole delays."""
    delays = {
        (i, j): _delay_count(el, sample_time)
        for i, row in enumerate(rows)
        for j, el in enumerate(row)
        if el is not None
    }
    return _split_delays(delays, len(rows), len(rows[0]))


def transfer_state_count(
    elements: Grid,
    *,
    sample_time: float,
    disturbance_elements: Grid | None = None,
) -> int:
    """Return the state count :func:`transfer_matrix_model` would build, without building it.

    Cheap (no exponentials): the schema edge calls it to cap the model size, e.g. against a
    dead time of thousands of samples.  Arguments as for :func:`transfer_matrix_model`.
    """
    assert sample_time > 0.0, sample_time
    rows, _ = _columns(elements, disturbance_elements)
    out, regs = _plan(rows, sample_time)
    lags = sum(len(el.time_constants) for row in rows for el in row if el is not None)
    return lags + sum(map(_integrates, rows)) + sum(out) + sum(regs)


def transfer_matrix_model(
    elements: Grid,
    *,
    sample_time: float,
    disturbance_elements: Grid | None = None,
    field: FieldKey = ("model", "elements"),
    disturbance_field: FieldKey = ("model", "disturbance_elements"),
) -> SampledTransferModel:
    """Convert a transfer matrix to its exact discrete state-space model under zero-order hold.

    Parameters
    ----------
    elements : sequence of p rows of m ``TransferElement | None``
        Row ``i``, column ``j``: how manipulated input ``j`` moves output ``i``.
    sample_time : float, keyword-only
        ``Ts > 0``, in the time unit of the time constants and dead times.
    disturbance_elements : sequence of p rows of md ``TransferElement | None``, optional
        How each measured disturbance moves each output (held between samples too).
    field, disturbance_field : tuple of str and int, keyword-only
        Keys of the two grids in the request; an element's error carries ``(*field, i, j)``.

    Returns
    -------
    SampledTransferModel
        With ``transfer_state_count(...)`` states: the elements' lags, one integrator per
        row with integrating elements, and the shared delays.

    Raises
    ------
    service.errors.NumericalError
        When an element's :func:`stiffness_ratio` exceeds :data:`STIFFNESS_LIMIT`, with the
        element's field key.

    Notes
    -----
    The module docstring derives the sampled element, the delay sharing and the shared
    integrators.  The element states come first (row by row: the lags of each element,
    inputs then disturbances, then the row's integrator if it has one), then each column's
    input register, then each output's register; ``states`` says which is which.
    """
    assert sample_time > 0.0, sample_time
    ts = float(sample_time)
    rows, m = _columns(elements, disturbance_elements)
    p, columns = len(rows), len(rows[0])
    out, regs = _plan(rows, ts)

    sampled: dict[tuple[int, int], tuple[Any, ...]] = {}
    roles: list[StateRole] = []
    integrator: dict[int, int] = {}  # row -> index of its shared integrator state
    for i, row in enumerate(rows):
        for j, el in enumerate(row):
            if el is None:
                continue
            where = (*field, i, j) if j < m else (*disturbance_field, i, j - m)
            sampled[i, j] = (len(roles), *_sampled(el, ts, where))
            col = j - m if j >= m else j
            lags = len(el.time_constants)
            roles += [StateRole("element", i, col, j >= m, s) for s in range(lags)]
        if _integrates(row):
            integrator[i] = len(roles)
            roles.append(StateRole("output_integrator", i, None, False, 0))
    reg_start = []
    for j in range(columns):
        reg_start.append(len(roles))
        col = j - m if j >= m else j
        roles += [StateRole("input_delay", None, col, j >= m, lag) for lag in range(1, regs[j] + 1)]
    out_start = []
    for i in range(p):
        out_start.append(len(roles))
        roles += [StateRole("output_delay", i, None, False, lag) for lag in range(1, out[i] + 1)]

    n = len(roles)
    a = np.zeros((n, n))
    b_all = np.zeros((n, columns))
    c = np.zeros((p, n))
    d_all = np.zeros((p, columns))

    for j in range(columns):
        if regs[j]:
            b_all[reg_start[j], j] = 1.0
        for lag in range(2, regs[j] + 1):
            a[reg_start[j] + lag - 1, reg_start[j] + lag - 2] = 1.0
    for i in range(p):
        for lag in range(2, out[i] + 1):
            a[out_start[i] + lag - 1, out_start[i] + lag - 2] = 1.0
        if out[i]:
            c[i, out_start[i] + out[i] - 1] = 1.0

    for i, q in integrator.items():
        a[q, q] = 1.0
        if out[i]:
            a[out_start[i], q] = 1.0
        else:
            c[i, q] = 1.0
    for (i, j), (start, phi, gamma, cp, dp, h) in sampled.items():
        el = rows[i][j]
        assert el is not None
        k = len(el.time_constants)  # the element's own (lag) states
        lag = h - out[i]  # samples back in input j's register
        # the element's input v = u_j(k - lag): the input itself, or a register state
        if lag == 0:
            into_state, into_output, col = b_all, d_all, j
        else:
            into_state, into_output, col = a, c, reg_start[j] + lag - 1
        block = slice(start, start + k)
        a[block, block] = phi[:k, :k]
        into_state[block, col] += gamma[:k, 0]
        if el.integrating:
            # its integrator (the last chain state, weighted K in the output) joins the
            # row's: Q(k+1) = Q(k) + K (phi_row xi_lag(k) + gamma_q v(k)); module docstring
            assert abs(phi[k, k] - 1.0) <= 1e-12 and not phi[:k, k].any() and cp[0, k] == el.gain
            q = integrator[i]
            a[q, block] += el.gain * phi[k, :k]
            into_state[q, col] += el.gain * gamma[k, 0]
        if out[i]:
            # the element's response enters the first cell of output i's register
            a[out_start[i], block] += cp[0, :k]
            into_state[out_start[i], col] += dp
        else:
            c[i, block] += cp[0, :k]
            into_output[i, col] += dp

    has_disturbance = disturbance_elements is not None
    return SampledTransferModel(
        a=a,
        b=b_all[:, :m],
        b_disturbance=b_all[:, m:] if has_disturbance else None,
        c=c,
        d=d_all[:, :m],
        d_disturbance=d_all[:, m:] if has_disturbance else None,
        states=tuple(roles),
        input_delays=tuple(regs),
        output_delays=tuple(out),
        sample_time=ts,
    )

"""The condensed move QP of the constrained predictive controller, solved at every step.

With limits the controller is no longer a fixed gain: at every sample it solves, in the moves
``dU = [du(k); ...; du(k+Hu-1)]`` over the control horizon and one slack per output bound
that is present, ::

    minimize   1/2 dU' H dU - (G' Q E)' dU  +  sum_b rho_b s_b + 1/2 c sum_b s_b^2
    subject to |du(k+j)| <= move_max                               (hard, j = 0..Hu-1)
               input_min <= u(k-1) + du(k) + ... + du(k+j) <= input_max   (hard)
               Zfree_i + (G dU)_i <= output_max + s_b    for every penalized step i (soft)
               Zfree_i + (G dU)_i >= output_min - s_b
               s_b >= 0
               low_j - t_ji <= Zfree_i + (G dU)_i <= high_j + t_ji    for every zone output j
               t_ji >= 0                                               and penalized step i

with the zone cost ``1/2 sum_ji w_j t_ji^2`` added to the objective (zones, below).

``H = G'QG + R`` and ``E`` are those of the unconstrained design (:mod:`service.solver.design.gain`);
with an input weight ``H`` also holds the input-target term and the linear term gains
``-P (u_s - u(k-1))`` (:mod:`service.solver.design.input_target`), ``u_s`` the step's target input;
``Zfree = Fx x(k) + Fu u(k-1)`` is the free prediction over the penalized steps ``Hw..Hp``.
With the Riccati terminal weight ``H`` holds ``Gamma' P Gamma`` (the design's) and the linear
term gains ``-Gamma' P e_t`` with ``e_t = xi_s - Phi xi(k)`` the step's terminal error
(:class:`service.solver.estimation.loop.TerminalTerm`): the cost is then the design's whole
cost ``V + |Gamma dU - e_t|^2_P`` less a constant, so the unconstrained solution is still
the design's law.
Without the slacks the cost is ``V`` of the design notes less a constant, so when no limit is
active the solution is ``H^-1 G'QE`` and its first move is ``Kh E``.

Output limits apply at the penalized steps that some move reaches: a step inside the dead
time of every input to an output keeps its prediction whatever the moves (``G``'s row is zero),
so its limit is left out (common practice: the limits' window starts past the dead time); held
there, a hard limit already broken would make every step infeasible and freeze the inputs.

Slacks: one per output bound present (``output_max`` of output j, ``output_min`` of output j),
shared by all penalized steps, so ``s_b`` is the largest violation of bound ``b`` over the
prediction horizon and the QP grows by at most ``2 p`` variables, not ``2 p Np``.  The linear
weight ``rho_b`` is the output's ``output_softness``.  It is an *exact* penalty: by the exact
penalty property of the l1 penalty (a standard result of constrained optimization; common
practice) the soft problem has the same solution as the hard one
whenever the hard one is feasible and ``rho_b`` exceeds the sum, over the penalized steps, of
the hard problem's multipliers on bound ``b`` (a shared slack's stationarity condition reads
``rho_b - sum_i lambda_bi - mu_b = 0`` with ``mu_b >= 0`` the multiplier of ``s_b >= 0``).
The small quadratic term ``c = lambda_min(H)`` keeps the QP's Hessian positive definite (the
solver needs it) without raising its condition number; it does not change an exact solution
(its gradient vanishes at ``s = 0``).

Zones (:mod:`service.solver.limits.zones`): an output with a zone has no weight in ``Q``
(the design gives it none) and one slack ``t_ji`` per penalized step, weighted quadratically
by the zone's ``w_j``.  At the optimum ``t_ji = max(0, z - high_j, low_j - z)``, so inside
the zone the output floats freely and outside it costs what an output of weight ``w_j``
tracking the nearest edge would.  The slacks are per step, not shared, because the cost is a
sum over the horizon; the QP grows by ``Np`` variables and ``2 Np`` rows per zone output.
When every predicted zone output is inside its zone the unconstrained optimum (with
``t = 0``) is the QP's solution, as without zones.

Solver: DAQP (the ``daqp`` package), a dual active-set method written for the small dense
QPs of predictive control, with recursive LDL' updates of the working set.  Its answer is exact
at its active set (an equality-constrained solve, not an iterate stopped at a tolerance).  The
workspace is set up once per controller with ``H`` (which it factors once) and the constraint
matrix; each step only updates the linear term and the bounds.  By default a step starts from
the previous step's working set, whose factorization DAQP keeps; a start from the previous
active set shifted one sample ahead is available (``warm_start="shifted"``) but must refactor
the working set from scratch and measured slower on the benchmark cases.  Before calling the
solver, each step tries the unconstrained optimum with the design's own Cholesky factor: when
that already satisfies every limit it is the QP's solution (and its first move is ``Kh E``).
"""

from __future__ import annotations

from dataclasses import dataclass

import daqp
import numpy as np
import scipy.linalg
from numpy.typing import NDArray

from service.solver.design.controller import ControllerDesign
from service.solver.design.gain import FactoredHessian
from service.solver.design.prediction import Prediction
from service.solver.limits.bounds import Limits
from service.solver.limits.zones import Zones

__all__ = [
    "PRIMAL_TOLERANCE",
    "UNREACHED_ROW",
    "WARM_STARTS",
    "ActiveLimit",
    "MoveProblem",
    "MoveQP",
    "MoveSolution",
]

#: Absolute tolerance on every limit, in the units of the limited signal.  DAQP's answer is
#: exact at its active set; the tolerance only decides when a constraint counts as violated.
PRIMAL_TOLERANCE = 1e-9

#: A row of ``G`` whose every entry is at most this times the largest entry of the same
#: output's rows is reached by no move (rounding level; common practice for a structural-zero
#: decision).
UNREACHED_ROW = 64 * float(np.finfo(float).eps)

#: The ways a step can start (see :class:`MoveQP`).
WARM_STARTS = ("previous", "shifted", "none")

# DAQP's constraint-state bits (its documentation, "sense"): active, and active at the lower bound.
_ACTIVE, _LOWER = 1, 2

_STATUS = {
    1: "optimal",
    2: "optimal",
    -1: "infeasible",
    -2: "cycling",
    -3: "unbounded",
    -4: "iteration_limit",
    -5: "not_convex",
    -6: "bad_start",
}


@dataclass(frozen=True)
class ActiveLimit:
    """One limit the QP's solution holds at its bound.

    Attributes
    ----------
    kind : str
        ``"input"``, ``"move"`` or ``"output"``.
    side : str
        ``"min"`` or ``"max"``.
    index : int
        Which input (0..m-1) or controlled output (0..p-1).
    step : int
        For inputs and moves, the offset ``j`` in the control horizon (0 is the move applied
        now, ``u(k)``); for outputs, the prediction step ``i`` in ``Hw..Hp``.
    """

    kind: str
    side: str
    index: int
    step: int


@dataclass(frozen=True)
class MoveSolution:
    """The answer of one QP step.

    Attributes
    ----------
    moves : ndarray, shape (Hu*m,)
        ``dU``; zeros when ``solved`` is false.
    output_max_slack, output_min_slack : ndarray, shape (p,)
        Slack used on each output's upper and lower bound (largest violation over the
        horizon the QP accepts); 0 where the bound is absent or holds.
    solved : bool
        Whether ``moves`` is an optimal solution.
    status : str
        ``"optimal"``, ``"infeasible"``, ``"iteration_limit"``, ``"cycling"``, ``"failed"``, ...
    iterations : int
        Active-set iterations (0 when the unconstrained optimum was already feasible).
    method : str
        ``"unconstrained"`` (the design's Cholesky solve sufficed) or ``"active_set"``.
    active : tuple of ActiveLimit
        The limits in the solution's active set.
    variables : ndarray, shape (Hu*m + ns + nz,)
        ``[dU; s; t]``, the QP's full solution (``t``: the zone slacks).
    multipliers : ndarray, shape (Hu*m + ns + nz + rows,)
        Lagrange multipliers in DAQP's convention: for the bounds on the variables first, then
        the rows of :attr:`MoveProblem.rows`; positive at an upper bound, negative at a lower.
    """

    moves: NDArray[np.float64]
    output_max_slack: NDArray[np.float64]
    output_min_slack: NDArray[np.float64]
    solved: bool
    status: str
    iterations: int
    method: str
    active: tuple[ActiveLimit, ...]
    variables: NDArray[np.float64]
    multipliers: NDArray[np.float64]

    def first_move(self, inputs: int) -> NDArray[np.float64]:
        """Return ``du(k)``, the first ``inputs`` entries of :attr:`moves`."""
        return self.moves[:inputs]


@dataclass(frozen=True)
class MoveProblem:
    """One step's QP in full: ``min 1/2 x'Hx + f'x  s.t.  lower <= [x; rows x] <= upper``.

    Attributes
    ----------
    hessian : ndarray, shape (nv, nv)
        ``blockdiag(H, c I, diag(w))`` with ``nv = Hu*m + ns + nz`` (``nz`` zone slacks, step
        by step over the zone outputs).
    linear : ndarray, shape (nv,)
        ``f = [-G'QE; rho; 0]``.
    rows : ndarray, shape (nr, nv)
        The general constraints (input sums, output upper rows, output lower rows, zone upper
        rows, zone lower rows).
    lower, upper : ndarray, shape (nv + nr,)
        Bounds on the variables first, then on the rows; ``+-inf`` where absent.
    """

    hessian: NDArray[np.float64]
    linear: NDArray[np.float64]
    rows: NDArray[np.float64]
    lower: NDArray[np.float64]
    upper: NDArray[np.float64]


class MoveQP:
    """The move QP of one controller, set up once and solved step after step.

    Parameters
    ----------
    prediction : Prediction
        ``G`` of shape (Np*p, Hu*m) and the horizons.
    hessian : FactoredHessian
        ``H = G'QG + R`` with its Cholesky factor, from the design.
    weighted : ndarray, shape (Np*p, Hu*m)
        ``Wbar G`` (:func:`service.solver.design.gain.weighted_moves`).
    output_root : ndarray, shape (p, p)
        ``W`` with ``W'W = Q``.
    limits : Limits
    input_pull : ndarray, shape (Hu*m, m), optional
        ``P`` of the design's input-target term (``design.input_penalty.pull``); each step then
        takes its ``target_input``.
    terminal_rows : tuple of ndarray, optional
        ``(W_P Gamma, W_P)`` of the design's Riccati terminal weight
        (``design.terminal.weighted_moves`` and ``design.terminal.root``), shapes (n+m, Hu*m)
        and (n+m, n+m); each step then takes its ``terminal_error``.
    hard_outputs : bool, optional
        Treat the output limits as hard (no slacks; the step fails when they cannot hold).
        Default false: soft, exact-penalty outputs.
    zones : Zones, optional
        Outputs held in a range (see the module notes); their weight in ``Q`` must be zero.
    tolerance : float, optional
        Absolute primal tolerance on every limit (default :data:`PRIMAL_TOLERANCE`).
    iteration_limit : int, optional
        Most active-set iterations per start (default 10000, DAQP's own).
    warm_start : {"previous", "shifted", "none"}, optional
        How each step starts: ``"previous"`` (default) from the previous step's working set,
        kept in DAQP's workspace with its factorization; ``"shifted"`` from the previous
        solution's active set shifted one sample ahead (refactored from scratch); ``"none"``
        from the empty set.  The answer is the same; only the work differs (see
        ``tests/bench/bench_qp.py``).

    Notes
    -----
    An instance keeps the solver's workspace and the last active set: use one per closed-loop
    run, never from two threads at once.
    """

    def __init__(
        self,
        *,
        prediction: Prediction,
        hessian: FactoredHessian,
        weighted: NDArray[np.float64],
        output_root: NDArray[np.float64],
        limits: Limits,
        input_pull: NDArray[np.float64] | None = None,
        terminal_rows: tuple[NDArray[np.float64], NDArray[np.float64]] | None = None,
        hard_outputs: bool = False,
        zones: Zones | None = None,
        tolerance: float = PRIMAL_TOLERANCE,
        iteration_limit: int = 10000,
        warm_start: str = "previous",
    ) -> None:
        g = prediction.moves
        hu, m = prediction.control, limits.inputs
        p, steps = limits.outputs, prediction.penalized_steps
        assert g.shape == (steps * p, hu * m), (g.shape, steps, p, hu, m)
        self._hessian = hessian
        self._weighted = weighted
        self._root = output_root
        self._limits = limits
        self._pull = input_pull
        self._terminal = terminal_rows
        self._m, self._p, self._hu = m, p, hu
        self._tolerance = tolerance
        assert warm_start in WARM_STARTS, warm_start
        self._warm = warm_start
        self._kept = False  # whether DAQP's workspace holds a working set worth starting from
        nu = hu * m

        # Input rows: u(k+j) - u(k-1) = sum_{l<=j} du(k+l), for inputs with a limit.
        limited_in = np.flatnonzero(np.isfinite(limits.input_min) | np.isfinite(limits.input_max))
        cumulative = np.kron(np.tril(np.ones((hu, hu))), np.eye(m))
        in_rows = (np.arange(hu)[:, None] * m + limited_in[None, :]).reshape(-1)
        self._in_index = limited_in
        self._in_rows = cumulative[in_rows]

        # Output rows: one block per bound present; slack columns (soft) follow the moves.
        upper_out = np.flatnonzero(np.isfinite(limits.output_max))
        lower_out = np.flatnonzero(np.isfinite(limits.output_min))
        self._upper_out, self._lower_out = upper_out, lower_out
        out_up = (np.arange(steps)[:, None] * p + upper_out[None, :]).reshape(-1)
        out_lo = (np.arange(steps)[:, None] * p + lower_out[None, :]).reshape(-1)
        self._out_up, self._out_lo = out_up, out_lo
        ns = 0 if hard_outputs else upper_out.size + lower_out.size
        self._ns = ns
        # Zone outputs: one slack per zone output and penalized step, after the limits' slacks.
        zoned = np.zeros(0, dtype=np.intp) if zones is None else zones.zoned
        assert zones is None or zones.outputs == p, (zones.outputs, p)
        self._zoned = zoned
        out_zone = (np.arange(steps)[:, None] * p + zoned[None, :]).reshape(-1)
        self._out_zone = out_zone
        nz = out_zone.size
        self._nz = nz
        nv = nu + ns + nz
        blocks = [np.hstack([self._in_rows, np.zeros((self._in_rows.shape[0], ns + nz))])]
        up_block = np.hstack([g[out_up], np.zeros((out_up.size, ns + nz))])
        lo_block = np.hstack([g[out_lo], np.zeros((out_lo.size, ns + nz))])
        if ns:
            # Row (step t, bound b) carries -s_b (upper) or +s_b (lower).
            up_block[np.arange(out_up.size), nu + np.tile(np.arange(upper_out.size), steps)] = -1.0
            lo_block[np.arange(out_lo.size), nu + upper_out.size + np.tile(np.arange(lower_out.size), steps)] = 1.0
        # Zone rows (step t, zone output j): z - t_jt <= high_j and z + t_jt >= low_j.
        zone_slack = np.hstack([np.zeros((nz, nu + ns)), np.eye(nz)])
        zone_up = np.hstack([g[out_zone], np.zeros((nz, ns + nz))]) - zone_slack
        zone_lo = np.hstack([g[out_zone], np.zeros((nz, ns + nz))]) + zone_slack
        self._rows = np.ascontiguousarray(np.vstack([*blocks, up_block, lo_block, zone_up, zone_lo]))
        nr = self._rows.shape[0]
        first_out = nv + self._in_rows.shape[0]
        self._ranges = {
            "input": (nv, first_out),
            "upper": (first_out, first_out + out_up.size),
            "lower": (first_out + out_up.size, first_out + out_up.size + out_lo.size),
            "zone_upper": (nv + nr - 2 * nz, nv + nr - nz),
            "zone_lower": (nv + nr - nz, nv + nr),
        }

        curvature = max(hessian.smallest_eigenvalue, np.finfo(float).tiny)
        zone_weight = np.tile(zones.weight[zoned], steps) if zones is not None else np.zeros(0)
        self._full_hessian = scipy.linalg.block_diag(hessian.matrix, curvature * np.eye(ns), np.diag(zone_weight))
        softness = np.concatenate([limits.output_softness[upper_out], limits.output_softness[lower_out]])
        self._slack_weight = np.concatenate([softness if ns else np.zeros(0), np.zeros(nz)])
        # Constant bounds: moves, slacks.
        self._var_lower = np.concatenate([-np.tile(limits.move_max, hu), np.zeros(ns + nz)])
        self._var_upper = np.concatenate([np.tile(limits.move_max, hu), np.full(ns + nz, np.inf)])
        self._shift = self._shift_map(nv, nr, steps)
        lim = limits
        self._lower_template = np.concatenate(
            [
                self._var_lower,
                np.tile(lim.input_min[limited_in], hu),
                np.full(out_up.size, -np.inf),
                np.tile(lim.output_min[lower_out], steps),
                np.full(nz, -np.inf),
                np.tile(zones.low[zoned], steps) if zones is not None else np.zeros(0),
            ]
        )
        self._upper_template = np.concatenate(
            [
                self._var_upper,
                np.tile(lim.input_max[limited_in], hu),
                np.tile(lim.output_max[upper_out], steps),
                np.full(out_lo.size, np.inf),
                np.tile(zones.high[zoned], steps) if zones is not None else np.zeros(0),
                np.full(nz, np.inf),
            ]
        )
        # An output limit at a step that no move reaches (inside the dead time of every input
        # to that output) is left unbounded: the moves cannot change it, so as a hard row it
        # could only make the QP infeasible and freeze the inputs, and as a soft one force a
        # shared slack that would then excuse the same violation at the steps the moves do
        # reach.  A row counts as unreached when every entry is at rounding level of the
        # largest entry of the same output's rows (exact zeros for a dead time's shift
        # register); measured per output, so that no output's units decide for another's.
        row_size = np.abs(g).max(axis=1, initial=0.0).reshape(steps, p)
        output_size = row_size.max(axis=0, initial=0.0)
        reach = (row_size > UNREACHED_ROW * output_size[None, :]).reshape(-1)
        start, stop = self._ranges["upper"]
        self._upper_template[start:stop][~reach[out_up]] = np.inf
        start, stop = self._ranges["lower"]
        self._lower_template[start:stop][~reach[out_lo]] = -np.inf
        # What each constraint is, for the report: kind (0 move, 1 input, 2 output; -1 slack
        # bound or zone row: a zone is no limit), signal index and step.
        kinds = np.full(nv + nr, -1)
        index = np.zeros(nv + nr, dtype=int)
        step = np.zeros(nv + nr, dtype=int)
        kinds[:nu], index[:nu], step[:nu] = 0, np.tile(np.arange(m), hu), np.repeat(np.arange(hu), m)
        for key, code, signals, count, first in (
            ("input", 1, limited_in, hu, 0),
            ("upper", 2, upper_out, steps, prediction.first_penalized),
            ("lower", 2, lower_out, steps, prediction.first_penalized),
        ):
            start, stop = self._ranges[key]
            kinds[start:stop] = code
            index[start:stop] = np.tile(signals, count)
            step[start:stop] = first + np.repeat(np.arange(count), signals.size)
        self._kind_of, self._index_of, self._step_of = kinds, index, step

        # DAQP solves in the variables z = dU / d (Jacobi scaling, d_i = H_ii^(-1/2)): in
        # engineering units without spans a move of one input can weigh 1e16 times another's,
        # and DAQP then answered 'optimal' with a move far from the optimum.
        self._scale = 1.0 / np.sqrt(np.diag(self._full_hessian))
        scaled_hessian = self._full_hessian * np.outer(self._scale, self._scale)
        # ... and each row divided by its size: an output in units 1e20 below another's has
        # rows of 1e-10 that DAQP otherwise took for degenerate (its limit read infeasible).
        scaled_rows = self._rows * self._scale
        sizes = np.linalg.norm(scaled_rows, axis=1) if scaled_rows.size else np.zeros(nr)
        self._row_scale = np.divide(1.0, sizes, out=np.ones(nr), where=sizes > 0.0)
        lower, upper = self._daqp_bounds(*self._bounds(np.zeros(m), np.zeros(steps * p)))
        self._model = daqp.Model()
        self._model.setup(
            scaled_hessian, np.zeros(nv), np.ascontiguousarray(scaled_rows * self._row_scale[:, None]), upper, lower
        )
        self._model.settings = {
            "primal_tol": tolerance,
            "eps_prox": 0.0,  # H is positive definite: no proximal regularization
            "iter_limit": int(iteration_limit),
            # DAQP gives up as 'cycling' after this many iterations without progress (10 by
            # default).  The output rows inside a dead time and the zone rows tie at degenerate
            # vertices, and a soft QP (always feasible) then ended 'cycling' and held the input;
            # one pass over every constraint is allowed before giving up.
            "cycle_tol": min(int(iteration_limit), nv + nr),
        }
        self._last_sense = np.zeros(nv + nr, dtype=np.int32)

    @classmethod
    def from_design(
        cls,
        design: ControllerDesign,
        limits: Limits,
        *,
        hard_outputs: bool = False,
        zones: Zones | None = None,
        tolerance: float = PRIMAL_TOLERANCE,
        iteration_limit: int = 10000,
        warm_start: str = "previous",
    ) -> MoveQP:
        """Build from a :class:`service.solver.design.controller.ControllerDesign` and limits."""
        return cls(
            prediction=design.prediction,
            hessian=design.hessian,
            weighted=design.weighted,
            output_root=design.output_root,
            limits=limits,
            input_pull=None if design.input_penalty is None else design.input_penalty.pull,
            terminal_rows=None if design.terminal is None else (design.terminal.weighted_moves, design.terminal.root),
            hard_outputs=hard_outputs,
            zones=zones,
            tolerance=tolerance,
            iteration_limit=iteration_limit,
            warm_start=warm_start,
        )

    @property
    def blocks(self) -> dict[str, slice]:
        """Where each kind of constraint sits in :attr:`MoveSolution.multipliers`.

        Keys ``"moves"`` (the move bounds, ordered step by step), ``"slacks"`` (``s >= 0``),
        ``"zone_slacks"`` (``t >= 0``), ``"input"`` (input rows, step by step over the limited
        inputs), ``"output_max"`` and ``"output_min"`` (output rows, prediction step by step over
        the bounded outputs), ``"zone_max"`` and ``"zone_min"`` (zone rows, step by step over the
        zone outputs).
        """
        nu = self._hu * self._m
        return {
            "moves": slice(0, nu),
            "slacks": slice(nu, nu + self._ns),
            "zone_slacks": slice(nu + self._ns, self.variables),
            "input": slice(*self._ranges["input"]),
            "output_max": slice(*self._ranges["upper"]),
            "output_min": slice(*self._ranges["lower"]),
            "zone_max": slice(*self._ranges["zone_upper"]),
            "zone_min": slice(*self._ranges["zone_lower"]),
        }

    @property
    def variables(self) -> int:
        """``Hu*m + ns + nz``: moves plus slacks (limits' and zones')."""
        return int(self._full_hessian.shape[0])

    def _shift_map(self, nv: int, nr: int, steps: int) -> NDArray[np.intp]:
        """For each constraint, the one of the previous step it inherits its state from (-1: none).

        The previous plan shifted one sample ahead, ``[du(k+1); ...; du(k+Hu-1); 0]``: move
        bounds move one block earlier and the last move starts free.
        """
        m, hu = self._m, self._hu
        source = np.full(nv + nr, -1, dtype=np.intp)
        moves = np.arange(hu * m)
        source[moves[: (hu - 1) * m]] = moves[m:]  # du(k+j) <- du(k+j+1)
        ns, nz = self._ns, self._nz
        source[hu * m : hu * m + ns] = np.arange(hu * m, hu * m + ns)  # shared slacks keep their state
        width = self._zoned.size  # zone slacks move one step earlier, the last keeps its state
        zones = np.arange(hu * m + ns, nv)
        if nz:
            source[zones[: nz - width]] = zones[width:]
            source[zones[nz - width :]] = zones[nz - width :]
        # Input and output rows move one block earlier; the last block keeps the last block's
        # state, since the shifted plan ends with a zero move (inputs and outputs level off).
        blocks = (
            ("input", self._in_index.size, hu),
            ("upper", self._upper_out.size, steps),
            ("lower", self._lower_out.size, steps),
            ("zone_upper", self._zoned.size, steps),
            ("zone_lower", self._zoned.size, steps),
        )
        for key, width, count in blocks:
            start, _ = self._ranges[key]
            inner = (count - 1) * width
            source[start : start + inner] = start + width + np.arange(inner)
            source[start + inner : start + inner + width] = start + inner + np.arange(width)
        return source

    def _bounds(
        self, previous_input: NDArray[np.float64], free_prediction: NDArray[np.float64]
    ) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """Bounds of one step: the constant templates less ``u(k-1)`` and ``Zfree`` where they enter."""
        lower, upper = self._lower_template.copy(), self._upper_template.copy()
        start, stop = self._ranges["input"]
        held = np.tile(previous_input[self._in_index], self._hu)
        lower[start:stop] -= held
        upper[start:stop] -= held
        start, stop = self._ranges["upper"]
        upper[start:stop] -= free_prediction[self._out_up]
        start, stop = self._ranges["lower"]
        lower[start:stop] -= free_prediction[self._out_lo]
        start, stop = self._ranges["zone_upper"]
        upper[start:stop] -= free_prediction[self._out_zone]
        start, stop = self._ranges["zone_lower"]
        lower[start:stop] -= free_prediction[self._out_zone]
        return lower, upper

    def problem(
        self,
        *,
        error: NDArray[np.float64],
        free_prediction: NDArray[np.float64],
        previous_input: NDArray[np.float64],
        target_input: NDArray[np.float64] | None = None,
        terminal_error: NDArray[np.float64] | None = None,
    ) -> MoveProblem:
        """Return one step's QP as plain arrays (for checking with another solver).

        Parameters
        ----------
        error : ndarray, shape (Np*p,)
            ``E = T - Fx x(k) - Fu u(k-1)``.
        free_prediction : ndarray, shape (Np*p,)
            ``Zfree = Fx x(k) + Fu u(k-1)``.
        previous_input : ndarray, shape (m,)
            ``u(k-1)``.
        target_input : ndarray, shape (m,), optional
            ``u_s``, the step's target input; required with ``input_pull``.
        terminal_error : ndarray, shape (n+m,), optional
            ``e_t = xi_s - Phi xi(k)``; required with ``terminal_rows``.
        """
        scaled = (error.reshape(-1, self._p) @ self._root.T).reshape(-1)  # Wbar E
        gradient = self._weighted.T @ scaled
        if self._pull is not None:
            assert target_input is not None, "a QP with input targets needs target_input"
            gradient = gradient + self._pull @ (target_input - previous_input)
        if self._terminal is not None:
            assert terminal_error is not None, "a QP with a terminal weight needs terminal_error"
            rows, root = self._terminal
            gradient = gradient + rows.T @ (root @ terminal_error)  # Gamma' P e_t
        linear = np.concatenate([-gradient, self._slack_weight])
        lower, upper = self._bounds(previous_input, free_prediction)
        return MoveProblem(self._full_hessian, linear, self._rows, lower, upper)

    def solve(
        self,
        *,
        error: NDArray[np.float64],
        free_prediction: NDArray[np.float64],
        previous_input: NDArray[np.float64],
        target_input: NDArray[np.float64] | None = None,
        terminal_error: NDArray[np.float64] | None = None,
    ) -> MoveSolution:
        """Solve one step's QP; never raises on a failed or infeasible solve.

        Parameters are as for :meth:`problem`.

        Returns
        -------
        MoveSolution
            ``solved`` false (and zero moves) when the solver found the problem infeasible,
            stopped early, or returned a point that breaks a hard limit.
        """
        error = np.asarray(error, dtype=float)
        free_prediction = np.asarray(free_prediction, dtype=float)
        previous_input = np.asarray(previous_input, dtype=float)
        if not (np.isfinite(error).all() and np.isfinite(free_prediction).all() and np.isfinite(previous_input).all()):
            return self._failure("failed", 0)
        if target_input is not None:
            target_input = np.asarray(target_input, dtype=float)
            if not np.isfinite(target_input).all():
                return self._failure("failed", 0)
        if terminal_error is not None:
            terminal_error = np.asarray(terminal_error, dtype=float)
            if not np.isfinite(terminal_error).all():
                return self._failure("failed", 0)
        qp = self.problem(
            error=error,
            free_prediction=free_prediction,
            previous_input=previous_input,
            target_input=target_input,
            terminal_error=terminal_error,
        )
        nu = self._hu * self._m
        # The unconstrained optimum, by the design's factor: the answer whenever it is feasible.
        moves = self._hessian.solve(-qp.linear[:nu])
        trial = np.concatenate([moves, np.zeros(self._ns + self._nz)])
        if self._violation(trial, qp) <= self._tolerance:
            multipliers = np.zeros(qp.lower.size)
            multipliers[nu : self.variables] = -self._slack_weight  # s >= 0 holds its bound
            self._last_sense = np.zeros_like(self._last_sense)
            self._last_sense[nu : self.variables] = _ACTIVE | _LOWER
            return self._result(trial, multipliers, "optimal", 0, "unconstrained")

        iterations = 0
        starts: list[NDArray[np.int32] | None] = []
        if self._warm == "shifted":
            starts.append(self._shifted_sense())
        elif self._warm == "previous" and self._kept:
            starts.append(None)  # DAQP keeps its last working set and its factorization
        starts.append(np.zeros_like(self._last_sense))
        for sense in starts:
            try:
                lower, upper = self._daqp_bounds(qp.lower, qp.upper)
                linear = qp.linear * self._scale
                if sense is None:
                    self._model.update(f=linear, bupper=upper, blower=lower)
                else:
                    self._model.update(f=linear, bupper=upper, blower=lower, sense=sense)
                x, _, flag, info = self._model.solve()
            except Exception:  # the solver must never end the run
                flag, info, x = -99, {"iterations": 0}, None
            iterations += int(info.get("iterations", 0))
            if flag > 0 and x is not None:
                x = np.asarray(x, dtype=float) * self._scale
                if np.isfinite(x).all() and self._violation(x, qp) <= 10.0 * self._tolerance:
                    multipliers = np.asarray(info["lam"], dtype=float).copy()
                    multipliers[: self.variables] /= self._scale  # bounds on z to bounds on dU
                    multipliers[self.variables :] *= self._row_scale  # scaled rows to the rows
                    self._last_sense = _sense_of(multipliers)
                    self._kept = True
                    return self._result(x, multipliers, "optimal", iterations, "active_set")
                flag = -99
            if flag == -1:
                break  # infeasible is a property of the problem, not of the start
        self._last_sense = np.zeros_like(self._last_sense)
        self._kept = False
        return self._failure(_STATUS.get(flag, "failed"), iterations)

    def _shifted_sense(self) -> NDArray[np.int32]:
        sense = np.zeros_like(self._last_sense)
        has = self._shift >= 0
        sense[has] = self._last_sense[self._shift[has]]
        return sense

    def _scaled_bounds(
        self, lower: NDArray[np.float64], upper: NDArray[np.float64]
    ) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """The bounds on ``[z; rows x]`` for DAQP: the variables' own divided by their scale."""
        nv = self.variables
        return (
            np.concatenate([lower[:nv] / self._scale, lower[nv:]]),
            np.concatenate([upper[:nv] / self._scale, upper[nv:]]),
        )

    def _daqp_bounds(
        self, lower: NDArray[np.float64], upper: NDArray[np.float64]
    ) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """The bounds as DAQP sees them: the variables' in ``z``, the rows' divided by the rows' sizes."""
        nv = self.variables
        lower, upper = self._scaled_bounds(lower, upper)
        lower[nv:] *= self._row_scale
        upper[nv:] *= self._row_scale
        return lower, upper

    def _violation(self, x: NDArray[np.float64], qp: MoveProblem) -> float:
        """Largest excess over a bound: the variables' in their scaled units ``z``, the rows' in theirs."""
        lower, upper = self._scaled_bounds(qp.lower, qp.upper)
        values = np.concatenate([x / self._scale, self._rows @ x])
        excess = np.maximum(values - upper, lower - values)
        return float(excess.max(initial=0.0))

    def _result(
        self, x: NDArray[np.float64], multipliers: NDArray[np.float64], status: str, iterations: int, method: str
    ) -> MoveSolution:
        nu = self._hu * self._m
        slack = x[nu : nu + self._ns]
        upper = np.zeros(self._p)
        lower = np.zeros(self._p)
        if self._ns:
            used = np.where(slack > self._tolerance, slack, 0.0)  # below tolerance: rounding
            upper[self._upper_out] = used[: self._upper_out.size]
            lower[self._lower_out] = used[self._upper_out.size :]
        return MoveSolution(
            moves=x[:nu].copy(),
            output_max_slack=upper,
            output_min_slack=lower,
            solved=True,
            status=status,
            iterations=iterations,
            method=method,
            active=self._active(multipliers),
            variables=x.copy(),
            multipliers=multipliers,
        )

    def _failure(self, status: str, iterations: int) -> MoveSolution:
        nv = self.variables
        return MoveSolution(
            moves=np.zeros(self._hu * self._m),
            output_max_slack=np.zeros(self._p),
            output_min_slack=np.zeros(self._p),
            solved=False,
            status=status,
            iterations=iterations,
            method="active_set",
            active=(),
            variables=np.zeros(nv),
            multipliers=np.zeros(nv + self._rows.shape[0]),
        )

    def _active(self, multipliers: NDArray[np.float64]) -> tuple[ActiveLimit, ...]:
        found = np.flatnonzero((multipliers != 0.0) & (self._kind_of >= 0))
        names = ("move", "input", "output")
        return tuple(
            ActiveLimit(names[kind], "max" if value > 0 else "min", index, step)
            for kind, value, index, step in zip(
                self._kind_of[found].tolist(),
                multipliers[found].tolist(),
                self._index_of[found].tolist(),
                self._step_of[found].tolist(),
                strict=False,
            )
        )


def _sense_of(multipliers: NDArray[np.float64]) -> NDArray[np.int32]:
    """DAQP's constraint states from its multipliers: active, and at which bound."""
    sense = np.zeros(multipliers.size, dtype=np.int32)
    sense[multipliers > 0] = _ACTIVE
    sense[multipliers < 0] = _ACTIVE | _LOWER
    return sense

"""Benchmark of the move QP under limits: DAQP steps per second against scipy minimizers.

Run from the repository root::

    python tests/bench/bench_qp.py [--cases small,medium] [--steps 200] [--scipy-steps 3]
        [--scipy-budget 60] [--compare 20]

For each case of the design benchmark (small: 10 states, 3 inputs, 3 outputs, Hp 40, Hu 8;
medium: 50 states, 10 x 10, Hp 100, Hu 20) on a random stable plant with a fixed seed:

1. a closed loop (state known, no mismatch) with setpoint steps well beyond the limits is run
   once with the constrained policy, and every step's QP data ``(E, Zfree, u(k-1))`` recorded;
   input, move and soft output limits are all present, and most steps have active limits;
2. the recorded steps are solved again, timed, by ``MoveQP.solve`` (DAQP) with each warm start
   (``"previous"``, the default; ``"shifted"``; ``"none"``), and, on the first ``--scipy-steps``
   steps with active limits, by ``scipy.optimize.minimize`` with ``method="SLSQP"`` and with
   ``method="trust-constr"`` on the very same QP (``MoveQP.problem``);
3. the first move of each answer is compared with DAQP's cold-started one, whose answer the
   tests check by the KKT conditions.

``--compare STEPS`` adds the other QP solvers considered (proxsuite, piqp, OSQP, Clarabel),
when installed, on the first STEPS steps, each set up once and updated per step where its
interface allows, at tight tolerances; they are not dependencies of movecast.  The scipy
minimizers solve at most ``--scipy-steps`` steps within ``--scipy-budget`` seconds each (at
least one).

Times are ``time.perf_counter`` over the whole sequence (best of three for DAQP).  Target:
DAQP at least 50x faster than the scipy minimizers.  This is a script, not a test: it prints
figures and asserts nothing.
"""

from __future__ import annotations

import argparse
import os
import platform
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import scipy
import scipy.optimize
import scipy.sparse

ROOT = Path(__file__).resolve().parents[2]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

from service.solver.design.controller import ControllerDesign, design_controller  # noqa: E402
from service.solver.estimation.estimator import design_estimator  # noqa: E402
from service.solver.evaluation.simulation import Event, Scenario, simulate_loop  # noqa: E402
from service.solver.limits.bounds import Limits, make_limits  # noqa: E402
from service.solver.limits.policy import ConstrainedPolicy  # noqa: E402
from service.solver.limits.qp import MoveProblem, MoveQP  # noqa: E402


@dataclass(frozen=True)
class Case:
    name: str
    n: int
    m: int
    p: int
    prediction: int
    control: int


CASES = {
    "small": Case("small", 10, 3, 3, 40, 8),
    "medium": Case("medium", 50, 10, 10, 100, 20),
}


@dataclass
class Step:
    error: np.ndarray
    free: np.ndarray
    previous: np.ndarray


@dataclass
class Setup:
    model: tuple[np.ndarray, np.ndarray, np.ndarray]
    design: ControllerDesign
    limits: Limits
    setpoint: np.ndarray


def build(case: Case, seed: int = 7) -> Setup:
    """Plant, design, limits (inputs within +-1, moves within 0.2, soft output bands on about
    half the outputs at 80 % of what the inputs can reach) and a setpoint beyond reach."""
    rng = np.random.default_rng(seed)
    a = rng.normal(size=(case.n, case.n))
    a *= 0.95 / max(abs(np.linalg.eigvals(a)))
    b, c = rng.normal(size=(case.n, case.m)), rng.normal(size=(case.p, case.n))
    design = design_controller(
        a,
        b,
        c,
        output_weight=np.ones(case.p),
        move_weight=np.full(case.m, 0.1),
        prediction=case.prediction,
        control=case.control,
    )
    gain = c @ np.linalg.solve(np.eye(case.n) - a, b)
    reach = np.abs(gain).sum(axis=1)  # largest |z| at steady state with |u| <= 1
    bound = np.full(case.p, np.nan)
    bound[: case.p // 2 + 1] = 0.8 * reach[: case.p // 2 + 1]
    limits = make_limits(
        case.m, case.p, input_min=-1.0, input_max=1.0, move_max=0.2, output_max=bound, output_min=-bound
    )
    return Setup((a, b, c), design, limits, 1.5 * reach * np.sign(rng.normal(size=case.p)))


def record(setup: Setup, steps: int) -> list[Step]:
    """Run the loop once with the constrained policy; keep each step's QP data."""
    design, limits, setpoint = setup.design, setup.limits, setup.setpoint
    steps_seen: list[Step] = []
    policy = ConstrainedPolicy.from_design(design, limits)

    def recording(*, error, free_prediction, previous_input, step):
        steps_seen.append(Step(error.copy(), free_prediction.copy(), previous_input.copy()))
        return policy(error=error, free_prediction=free_prediction, previous_input=previous_input, step=step)

    estimator = design_estimator(*setup.model, kind="full_state")
    scenario = Scenario(steps=steps, setpoint_changes=[Event(0, setpoint), Event(steps // 2, -0.7 * setpoint)])
    simulate_loop(design, estimator, scenario, policy=recording)
    return steps_seen


def timed(function: Callable[[], object], repeat: int = 1) -> float:
    best = np.inf
    for _ in range(repeat):
        start = time.perf_counter()
        function()
        best = min(best, time.perf_counter() - start)
    return best


def scipy_solve(problem: MoveProblem, method: str) -> np.ndarray:
    """The QP by scipy.optimize.minimize; only the finite sides of each constraint are passed."""
    nv = problem.hessian.shape[0]
    h, f = problem.hessian, problem.linear
    rows = problem.rows
    lower, upper = problem.lower[nv:], problem.upper[nv:]
    bounds = scipy.optimize.Bounds(problem.lower[:nv], problem.upper[:nv])
    if method == "SLSQP":
        hi, lo = np.isfinite(upper), np.isfinite(lower)
        a_ineq = np.vstack([-rows[hi], rows[lo]])
        b_ineq = np.concatenate([upper[hi], -lower[lo]])
        constraints = [{"type": "ineq", "fun": lambda z: b_ineq - a_ineq @ z, "jac": lambda z: -a_ineq}]
        options = {"ftol": 1e-12, "maxiter": 2000}
        result = scipy.optimize.minimize(
            lambda z: 0.5 * z @ h @ z + f @ z,
            np.zeros(nv),
            jac=lambda z: h @ z + f,
            method="SLSQP",
            bounds=bounds,
            constraints=constraints,
            options=options,
        )
    else:
        result = scipy.optimize.minimize(
            lambda z: 0.5 * z @ h @ z + f @ z,
            np.zeros(nv),
            jac=lambda z: h @ z + f,
            hess=lambda z: h,
            method="trust-constr",
            bounds=bounds,
            constraints=[scipy.optimize.LinearConstraint(rows, lower, upper)],
            options={"gtol": 1e-10, "xtol": 1e-12, "maxiter": 5000},
        )
    return result.x


def other_solvers() -> dict[str, Callable[[list[MoveProblem]], list[np.ndarray]]]:
    """Candidate solvers that are installed, each solving a list of problems of one shape."""
    found: dict[str, Callable[[list[MoveProblem]], list[np.ndarray]]] = {}
    try:
        import proxsuite

        def run_proxsuite(problems: list[MoveProblem]) -> list[np.ndarray]:
            first = problems[0]
            nv, nr = first.hessian.shape[0], first.rows.shape[0]
            qp = proxsuite.proxqp.dense.QP(nv, 0, nr, True)
            qp.settings.eps_abs = 1e-9
            qp.settings.eps_rel = 0.0
            qp.settings.max_iter = 20000
            # (the warm start from the previous result crashed here: proxsuite 0.8.0, segfault)
            big = 1e20  # proxsuite takes large finite numbers for absent bounds

            def clip(v: np.ndarray) -> np.ndarray:
                return np.clip(v, -big, big)

            qp.init(
                first.hessian,
                first.linear,
                np.zeros((0, nv)),
                np.zeros(0),
                first.rows,
                clip(first.lower[nv:]),
                clip(first.upper[nv:]),
                clip(first.lower[:nv]),
                clip(first.upper[:nv]),
            )
            out = []
            for problem in problems:
                qp.update(
                    g=problem.linear,
                    l=clip(problem.lower[nv:]),
                    u=clip(problem.upper[nv:]),
                    l_box=clip(problem.lower[:nv]),
                    u_box=clip(problem.upper[:nv]),
                )
                qp.solve()
                out.append(np.array(qp.results.x))
            return out

        found["proxsuite (dense, eps 1e-9)"] = run_proxsuite
    except ImportError:
        pass
    try:
        import piqp

        def run_piqp(problems: list[MoveProblem]) -> list[np.ndarray]:
            first = problems[0]
            nv = first.hessian.shape[0]
            solver = piqp.DenseSolver()
            solver.settings.eps_abs = 1e-9
            solver.settings.eps_rel = 0.0
            big = 1e30

            def clip(v: np.ndarray) -> np.ndarray:
                return np.clip(v, -big, big)

            solver.setup(
                np.asfortranarray(first.hessian),
                first.linear,
                None,
                None,
                np.asfortranarray(first.rows),
                clip(first.lower[nv:]),
                clip(first.upper[nv:]),
                clip(first.lower[:nv]),
                clip(first.upper[:nv]),
            )
            out = []
            for problem in problems:
                solver.update(c=problem.linear, h_l=clip(problem.lower[nv:]), h_u=clip(problem.upper[nv:]))
                solver.solve()
                out.append(np.array(solver.result.x))
            return out

        found["piqp (dense, eps 1e-9)"] = run_piqp
    except ImportError:
        pass
    try:
        import osqp

        def run_osqp(problems: list[MoveProblem]) -> list[np.ndarray]:
            first = problems[0]
            nv = first.hessian.shape[0]
            a = scipy.sparse.csc_matrix(np.vstack([np.eye(nv), first.rows]))
            solver = osqp.OSQP()
            solver.setup(
                scipy.sparse.csc_matrix(np.triu(first.hessian)),
                first.linear,
                a,
                first.lower,
                first.upper,
                eps_abs=1e-9,
                eps_rel=0.0,
                polishing=True,
                verbose=False,
                max_iter=100000,
            )
            out = []
            for problem in problems:
                solver.update(q=problem.linear, l=problem.lower, u=problem.upper)
                out.append(np.array(solver.solve().x))
            return out

        found["OSQP (eps 1e-9, polished)"] = run_osqp
    except ImportError:
        pass
    try:
        import clarabel

        def run_clarabel(problems: list[MoveProblem]) -> list[np.ndarray]:
            out = []
            for problem in problems:
                nv = problem.hessian.shape[0]
                a = np.vstack([np.eye(nv), problem.rows])
                hi, lo = np.isfinite(problem.upper), np.isfinite(problem.lower)
                rows = np.vstack([a[hi], -a[lo]])
                rhs = np.concatenate([problem.upper[hi], -problem.lower[lo]])
                settings = clarabel.DefaultSettings()
                settings.verbose = False
                settings.tol_gap_abs = settings.tol_gap_rel = settings.tol_feas = 1e-10
                solver = clarabel.DefaultSolver(
                    scipy.sparse.csc_matrix(np.triu(problem.hessian)),
                    problem.linear,
                    scipy.sparse.csc_matrix(rows),
                    rhs,
                    [clarabel.NonnegativeConeT(rows.shape[0])],
                    settings,
                )
                out.append(np.array(solver.solve().x))
            return out

        found["Clarabel (tol 1e-10, set up per step)"] = run_clarabel
    except ImportError:
        pass
    return found


def bench_case(case: Case, *, steps: int, scipy_steps: int, budget: float, compare: int) -> None:
    setup = build(case)
    design, limits = setup.design, setup.limits
    recorded = record(setup, steps)
    m = case.m

    def replay(warm: str) -> tuple[list, MoveQP]:
        qp = MoveQP.from_design(design, limits, warm_start=warm)
        return [qp.solve(error=s.error, free_prediction=s.free, previous_input=s.previous) for s in recorded], qp

    solutions, qp = replay("none")
    active = [k for k, s in enumerate(solutions) if s.active]
    print(f"\n== {case.name}: n={case.n}, m={case.m}, p={case.p}, Hp={case.prediction}, Hu={case.control} ==")
    first = qp.problem(error=recorded[0].error, free_prediction=recorded[0].free, previous_input=recorded[0].previous)
    print(
        f"QP size: {qp.variables} variables ({case.control * m} moves + {qp.variables - case.control * m} slacks), "
        f"{first.rows.shape[0]} rows besides the variable bounds"
    )
    print(
        f"{len(recorded)} steps, {len(active)} with active limits, "
        f"{sum(s.method == 'unconstrained' for s in solutions)} solved by the unconstrained shortcut"
    )
    per_step = {}
    for warm in ("previous", "shifted", "none"):
        spent = timed(lambda: replay(warm), repeat=3)
        answers, _ = replay(warm)
        iterations = np.array([s.iterations for s in answers])
        agree = max(float(np.abs(s.moves[:m] - t.moves[:m]).max()) for s, t in zip(answers, solutions, strict=False))
        per_step[warm] = spent / len(recorded)
        print(
            f"DAQP, start {warm:9s}: {len(recorded) / spent:9.0f} steps/s ({1e6 * per_step[warm]:9.1f} us/step), "
            f"iterations mean {iterations.mean():6.1f}, max {iterations.max():5d}; "
            f"|du0 - du0 cold| <= {agree:.1e}"
        )
    per_step_daqp = per_step["previous"]

    chosen = active[:scipy_steps]
    problems = [
        qp.problem(error=recorded[k].error, free_prediction=recorded[k].free, previous_input=recorded[k].previous)
        for k in chosen
    ]
    for method in ("SLSQP", "trust-constr"):
        answers, start = [], time.perf_counter()
        for problem in problems:  # at least one step, then as many as the budget allows
            answers.append(scipy_solve(problem, method))
            if time.perf_counter() - start > budget:
                break
        spent = (time.perf_counter() - start) / len(answers)
        error = max(float(np.abs(x[:m] - solutions[k].moves[:m]).max()) for x, k in zip(answers, chosen, strict=False))
        print(
            f"scipy {method:12s}    : {1 / spent:9.2f} steps/s ({1e6 * spent:9.0f} us/step) on {len(answers)} active "
            f"step(s); DAQP is {spent / per_step_daqp:7.0f}x faster; max |du0 - du0_DAQP| = {error:.1e}"
        )
    if compare:
        some = [
            qp.problem(error=s.error, free_prediction=s.free, previous_input=s.previous) for s in recorded[:compare]
        ]
        for name, run in other_solvers().items():
            try:
                start = time.perf_counter()
                answers = run(some)
                spent = (time.perf_counter() - start) / len(some)
            except Exception as exc:  # a candidate that fails is reported, not fatal
                print(f"{name:40s}: failed ({type(exc).__name__}: {exc})")
                continue
            error = max(float(np.abs(x[:m] - s.moves[:m]).max()) for x, s in zip(answers, solutions, strict=False))
            print(
                f"{name:40s}: {1 / spent:9.0f} steps/s ({1e6 * spent:9.1f} us/step) on {len(some)} steps; "
                f"max |du0 - du0_DAQP| = {error:.1e}"
            )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--cases", default="small,medium")
    parser.add_argument("--steps", type=int, default=200, help="closed-loop steps per case")
    parser.add_argument("--scipy-steps", type=int, default=3, help="most active steps solved by each scipy minimizer")
    parser.add_argument("--scipy-budget", type=float, default=60.0, help="seconds per scipy minimizer and case")
    parser.add_argument(
        "--compare",
        type=int,
        default=0,
        metavar="STEPS",
        help="also run the other candidate QP solvers on the first STEPS steps",
    )
    args = parser.parse_args()
    from importlib.metadata import version

    print(
        f"python {platform.python_version()}, numpy {np.__version__}, scipy {scipy.__version__}, "
        f"daqp {version('daqp')}, {platform.machine()}, {os.cpu_count()} CPUs, "
        f"load average {os.getloadavg()[0]:.2f}"
    )
    for name in args.cases.split(","):
        bench_case(
            CASES[name], steps=args.steps, scipy_steps=args.scipy_steps, budget=args.scipy_budget, compare=args.compare
        )
    print(f"load average at the end {os.getloadavg()[0]:.2f} (other work inflates every figure)")


if __name__ == "__main__":
    main()

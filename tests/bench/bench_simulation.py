"""Benchmark of the closed-loop simulation: steps per second for small and medium plants.

Run from the repository root::

    python tests/bench/bench_simulation.py [--steps 100000] [--profile]

For each case (random stable plant with a fixed seed; output-disturbance estimator; events and
seeded noise as in a typical preview) it prints the wall time of ``simulate_loop`` for the
given number of steps and the cost per step, and the same for a bare loop written here that
does only the matrix-vector products of one step (the floor of a step-by-step Python loop;
the fixed law runs as a single linear recursion, one product per step, and so beats it).
With ``--profile`` it prints the top of a ``cProfile`` run of the small case.

This is a script, not a test: it prints figures and asserts nothing.
"""

from __future__ import annotations

import argparse
import cProfile
import io
import pstats
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from service.solver.design.controller import design_controller
from service.solver.estimation.estimator import design_estimator
from service.solver.estimation.loop import control_loop
from service.solver.evaluation.simulation import Event, Scenario, simulate_loop

CASES = {"small (n=2, m=2, Hp=20)": (2, 2, 2, 20, 3), "medium (n=10, m=3, Hp=60)": (10, 3, 3, 60, 5)}


def _plant(rng: np.random.Generator, n: int, m: int, p: int):
    a = rng.normal(size=(n, n))
    a *= 0.95 / max(abs(np.linalg.eigvals(a)))
    return a, rng.normal(size=(n, m)), rng.normal(size=(p, n))


def _case(n: int, m: int, p: int, hp: int, hu: int, steps: int):
    rng = np.random.default_rng(1)
    a, b, c = _plant(rng, n, m, p)
    design = design_controller(a, b, c, output_weight=np.ones(p), move_weight=np.ones(m), prediction=hp, control=hu)
    estimator = design_estimator(a, b, c)
    scenario = Scenario(
        steps=steps,
        setpoint_changes=[Event(5, np.ones(p))],
        output_disturbances=[Event(steps // 2, 0.1 * np.ones(p))],
        input_disturbances=[Event(steps // 3, 0.1 * np.ones(m))],
        noise_std=0.01 * np.ones(p),
        seed=1,
    )
    return design, estimator, scenario


def _bare_loop(design, estimator, steps: int) -> None:
    loop = control_loop(design, estimator)
    fx, fu, kh, np_ = loop.free_state, loop.free_input, loop.horizon_gain, loop.penalized_steps
    aa, ba, gain, cy = estimator.a, estimator.b, estimator.gain, estimator.c_measured
    a, b, c = estimator.model_a, estimator.model_b, estimator.model_c
    n, m = estimator.state_size, b.shape[1]
    x, u, xp, r = np.zeros(n), np.zeros(m), np.zeros(estimator.augmented_size), np.ones(c.shape[0])
    for _ in range(steps):
        y = c @ x
        xf = xp + gain @ (y - cy @ xp)
        u = u + kh @ (r - (fx @ xf + fu @ u).reshape(np_, -1)).reshape(-1)
        x = a @ x + b @ u
        xp = aa @ xf + ba @ u


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--steps", type=int, default=100_000)
    parser.add_argument("--profile", action="store_true")
    args = parser.parse_args()
    print(f"numpy {np.__version__}, {args.steps} steps per run")
    for name, (n, m, p, hp, hu) in CASES.items():
        design, estimator, scenario = _case(n, m, p, hp, hu, args.steps)
        start = time.perf_counter()
        simulate_loop(design, estimator, scenario)
        full = time.perf_counter() - start
        start = time.perf_counter()
        _bare_loop(design, estimator, args.steps)
        bare = time.perf_counter() - start
        print(
            f"{name:28s} simulate_loop {full:6.2f} s ({1e6 * full / args.steps:5.1f} us/step)   "
            f"bare loop {bare:6.2f} s ({1e6 * bare / args.steps:5.1f} us/step)"
        )
    if args.profile:
        design, estimator, scenario = _case(*next(iter(CASES.values())), args.steps)
        profiler = cProfile.Profile()
        profiler.runcall(simulate_loop, design, estimator, scenario)
        out = io.StringIO()
        pstats.Stats(profiler, stream=out).sort_stats("tottime").print_stats(12)
        print(out.getvalue())


if __name__ == "__main__":
    main()

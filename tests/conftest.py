"""Shared fixtures: random plants with a fixed seed, the example request, a test client."""

from __future__ import annotations

import copy
from collections.abc import Iterator
from typing import Any

import numpy as np
import pytest
from fastapi.testclient import TestClient

from service.api import Settings, create_app
from service.pipeline.examples import load_example


def random_plant(
    rng: np.random.Generator, n: int, m: int, p: int, radius: float = 0.95
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """A random stable discrete plant (A scaled to spectral radius ``radius``), B, C."""
    a = rng.normal(size=(n, n))
    a *= radius / max(abs(np.linalg.eigvals(a)))
    return a, rng.normal(size=(n, m)), rng.normal(size=(p, n))


def stacked_elements(
    blocks: list[tuple[int, int, Any]], outputs: int, inputs: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``(A, B, C)`` of single-input single-output realizations stacked block-diagonally.

    ``blocks`` holds ``(output i, input j, system)``, each system with ``A``, ``B`` (one column)
    and ``C`` (one row), such as python-control's ``ss``: a non-minimal realization of the
    transfer matrix whose element ``(i, j)`` is the sum of the systems placed there.
    """
    n = sum(s.nstates for _, _, s in blocks)
    a, b, c = np.zeros((n, n)), np.zeros((n, inputs)), np.zeros((outputs, n))
    k = 0
    for i, j, s in blocks:
        a[k : k + s.nstates, k : k + s.nstates] = s.A
        b[k : k + s.nstates, j] = s.B[:, 0]
        c[i, k : k + s.nstates] = s.C[0]
        k += s.nstates
    return a, b, c


def random_steps(
    rng: np.random.Generator, n: int, *, first: int, hold: tuple[int, int], size: tuple[float, float]
) -> np.ndarray:
    """An invented plant test's input moves: zero until ``first``, then a level of random sign and
    size (``size`` range) held for a random ``hold`` range of samples, again and again."""
    out = np.zeros(n)
    k = first
    while k < n:
        held = int(rng.integers(*hold))
        out[k : k + held] = rng.choice([-1.0, 1.0]) * rng.uniform(*size)
        k += held
    return out


def random_design_request(
    rng: np.random.Generator, *, states: int, signals: int, prediction: int, control: int
) -> dict[str, Any]:
    """A valid /design request for a random stable square plant (``signals`` inputs and outputs)."""
    a, b, c = random_plant(rng, states, signals, signals, radius=0.9)
    return {
        "model": {"kind": "state_space", "a": a.tolist(), "b": b.tolist(), "c": c.tolist(), "sample_time": 1.0},
        "horizons": {"prediction": prediction, "control": control},
        "weights": {"output": [1.0] * signals, "move": [0.1] * signals},
    }


@pytest.fixture
def rng() -> np.random.Generator:
    return np.random.default_rng(20261201)


@pytest.fixture
def example() -> dict[str, Any]:
    """A fresh copy of the bundled example /design request."""
    return copy.deepcopy(load_example("design_request.json"))


@pytest.fixture
def client() -> Iterator[TestClient]:
    with TestClient(create_app(Settings())) as c:
        yield c

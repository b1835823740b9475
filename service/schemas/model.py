"""Plant models as requests carry them, and their conversion to discrete arrays."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import NDArray
from pydantic import Field

from service.errors import FieldProblem
from service.schemas.common import Caps, FiniteFloat, Matrix, RequestModel, check_matrix, pointer

__all__ = ["DiscretePlant", "PlantModel", "StateSpaceModel", "plant_arrays"]


class StateSpaceModel(RequestModel):
    """A linear state-space model ``x+ = A x + B u``, controlled outputs ``z = C x``."""

    kind: Literal["state_space"] = Field(description="Model form: matrices A, B, C.")
    a: Matrix = Field(description="State matrix A, n x n, as a list of rows.")
    b: Matrix = Field(description="Input matrix B, n x m (one column per manipulated variable).")
    c: Matrix = Field(description="Controlled-output matrix C, p x n (strictly proper).")
    time_domain: Literal["discrete"] = Field(
        default="discrete", description="'discrete': the matrices are already sampled."
    )
    sample_time: FiniteFloat = Field(
        gt=0, description="Sample time in the time unit the user works in (e.g. seconds)."
    )


PlantModel = StateSpaceModel


@dataclass(frozen=True)
class DiscretePlant:
    """A validated discrete-time plant as arrays.

    Attributes
    ----------
    a : ndarray, shape (n, n)
    b : ndarray, shape (n, m)
    c : ndarray, shape (p, n)
    sample_time : float
    """

    a: NDArray[np.float64]
    b: NDArray[np.float64]
    c: NDArray[np.float64]
    sample_time: float

    @property
    def states(self) -> int:
        return self.a.shape[0]

    @property
    def inputs(self) -> int:
        return self.b.shape[1]

    @property
    def outputs(self) -> int:
        return self.c.shape[0]


def plant_arrays(
    model: PlantModel, caps: Caps, where: tuple[str | int, ...] = ("model",)
) -> tuple[DiscretePlant | None, list[FieldProblem]]:
    """Check a model's sizes against each other and the caps; return it as discrete arrays.

    Parameters
    ----------
    model : PlantModel
    caps : Caps
    where : tuple
        Pointer parts of the model in the request.

    Returns
    -------
    DiscretePlant or None, list of FieldProblem
    """
    a, problems = check_matrix(model.a, (*where, "a"), square=True, what="A")
    if a is None:
        return None, problems
    n = a.shape[0]
    if a.shape[1] != n:
        return None, [FieldProblem(pointer(*where, "a"), f"A must be square; it is {n} x {a.shape[1]}")]
    if n > caps.max_states:
        return None, [
            FieldProblem(pointer(*where, "a"), f"A has {n} states; this service accepts at most {caps.max_states}")
        ]
    b, found = check_matrix(model.b, (*where, "b"), rows=n, what="B")
    problems += found
    c, found = check_matrix(model.c, (*where, "c"), cols=n, what="C")
    problems += found
    if b is not None and b.shape[1] > caps.max_signals:
        problems.append(
            FieldProblem(pointer(*where, "b"), f"B has {b.shape[1]} inputs; at most {caps.max_signals} are accepted")
        )
    if c is not None and c.shape[0] > caps.max_signals:
        problems.append(
            FieldProblem(pointer(*where, "c"), f"C has {c.shape[0]} outputs; at most {caps.max_signals} are accepted")
        )
    if problems or b is None or c is None:
        return None, problems
    return DiscretePlant(a=a, b=b, c=c, sample_time=float(model.sample_time)), []

"""A tuning sweep: the same design redone for each value of one tuning parameter.

Each entry is exactly the design (and, when asked, the frequency analysis) that a separate
call with that value would give: the sweep only substitutes the value and calls
:func:`service.solver.design.design_controller` again.  The parameters:

- ``"move_weight"`` / ``"output_weight"`` with ``index = j``: the weight of signal ``j`` (the
  diagonal entry ``j``; the rest of the matrix is kept); with ``index = None``: every
  signal's weight set to the value (a diagonal weight);
- ``"prediction"``, ``"control"``, ``"first_penalized"``: the horizon.  With move blocking,
  blocking steps at or beyond a swept control horizon are dropped.

A value whose design fails numerically (a singular Hessian, no Riccati terminal weight, ...)
gives an entry holding the error instead of a design, so the other values still come back.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
from numpy.typing import ArrayLike

from service.errors import NumericalError
from service.solver.design import ControllerDesign, design_controller
from service.solver.estimation import Estimator
from service.solver.frequency import DEFAULT_POINTS, FrequencyAnalysis, design_frequency_analysis
from service.solver.weights import weight_matrix

__all__ = ["SweepEntry", "SweepParameter", "sweep_tuning"]

SweepParameter = Literal["move_weight", "output_weight", "prediction", "control", "first_penalized"]


@dataclass(frozen=True)
class SweepEntry:
    """One value of the swept parameter and what the design gives there.

    Attributes
    ----------
    value : float
    design : ControllerDesign or None
        ``None`` when the design failed (see ``error``).
    analysis : FrequencyAnalysis or None
        With an estimator and a sample time only.
    error : NumericalError or None
    """

    value: float
    design: ControllerDesign | None
    analysis: FrequencyAnalysis | None
    error: NumericalError | None

    @property
    def spectral_radius(self) -> float | None:
        return None if self.design is None else self.design.loop.spectral_radius

    @property
    def condition_number(self) -> float | None:
        return None if self.design is None else self.design.hessian.condition_number

    @property
    def peak_sensitivity(self) -> float | None:
        """The larger of the peaks at the plant input and output."""
        if self.analysis is None:
            return None
        return max(self.analysis.plant_input.peak_sensitivity, self.analysis.plant_output.peak_sensitivity)


def _with_weight(weight: ArrayLike, size: int, index: int | None, value: float) -> np.ndarray:
    full = weight_matrix(weight, size).copy()
    if index is None:
        return np.full(size, float(value))
    assert 0 <= index < size, (index, size)
    full[index, index] = float(value)
    return full


def sweep_tuning(
    a: ArrayLike,
    b: ArrayLike,
    c: ArrayLike,
    *,
    parameter: SweepParameter,
    values: Sequence[float],
    options: Mapping[str, Any],
    index: int | None = None,
    estimator: Estimator | None = None,
    sample_time: float | None = None,
    points: int = DEFAULT_POINTS,
) -> list[SweepEntry]:
    """Redo the design for each value of one tuning parameter.

    Parameters
    ----------
    a, b, c : array_like
        The model, as for :func:`service.solver.design.design_controller`.
    parameter : {"move_weight", "output_weight", "prediction", "control", "first_penalized"}
    values : sequence of float
        Integers for the horizons.
    options : mapping
        The keyword arguments of ``design_controller`` for the base tuning (``output_weight``,
        ``move_weight``, ``prediction``, ``control`` and any options).
    index : int, optional
        The signal whose weight is swept (module notes).
    estimator : Estimator, optional
        With ``sample_time``: each entry also gets the frequency analysis of the loop.
    sample_time : float, optional
    points : int, optional
        Frequency grid size.

    Returns
    -------
    list of SweepEntry
        In the order of ``values``.
    """
    b_ = np.asarray(b, dtype=float)
    c_ = np.asarray(c, dtype=float)
    entries: list[SweepEntry] = []
    for value in values:
        kwargs = dict(options)
        if parameter == "move_weight":
            kwargs["move_weight"] = _with_weight(options["move_weight"], b_.shape[1], index, value)
        elif parameter == "output_weight":
            kwargs["output_weight"] = _with_weight(options["output_weight"], c_.shape[0], index, value)
        else:
            assert parameter in ("prediction", "control", "first_penalized"), parameter
            assert float(value) == int(value), f"a horizon must be whole, got {value}"
            kwargs[parameter] = int(value)
            if parameter == "control" and kwargs.get("blocking") is not None:
                kwargs["blocking"] = [j for j in kwargs["blocking"] if j < int(value)]
        try:
            design = design_controller(a, b, c, **kwargs)
            analysis = None
            if estimator is not None and sample_time is not None:
                analysis = design_frequency_analysis(design, estimator, sample_time=sample_time, points=points)
        except NumericalError as exc:
            entries.append(SweepEntry(value=float(value), design=None, analysis=None, error=exc))
            continue
        entries.append(SweepEntry(value=float(value), design=design, analysis=analysis, error=None))
    return entries

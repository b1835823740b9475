"""The ``zones`` block: outputs held in a range instead of at a setpoint.

:func:`check_zones` (called by ``check_design_request``) checks the lengths, the edges (one at
least, low not above high, finite once divided by the output's span) and that a zone output
carries no setpoint weight: inside its zone it has none by definition, so its entry of
``weights.output`` (its row and column of a full matrix) must be 0 and its weight outside the
zone is the zone's own ``weight``.  A zone output therefore has no effect on the unconstrained
gains; the move QP of /simulate (``service.solver.limits.qp``) holds it in its zone, with or
without limits.  :func:`zone_reports`, :func:`zone_warnings` and :func:`zone_run_reports` say
so in the answers, in engineering units.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from service.errors import FieldProblem
from service.pipeline.plant import DiscretePlant
from service.pipeline.problems import pointer
from service.schemas.limits import OutputZone, ZoneReport, ZoneRunReport
from service.solver.design.closed_loop import Diagnostic
from service.solver.limits.zones import Zones, make_zones, zone_record

__all__ = ["ZoneInputs", "check_zones", "zone_reports", "zone_run_reports", "zone_warnings"]


@dataclass(frozen=True)
class ZoneInputs:
    """Checked zones in engineering units (deviations from the operating point, as the solver's).

    Attributes
    ----------
    low, high : ndarray, shape (p,)
        ``-inf``/``+inf`` where an output has no zone or its zone is open on that side.
    weight : ndarray, shape (p,)
        Weight outside the zone; 0 for setpoint outputs.
    outputs : tuple of int
        The zone outputs.
    """

    low: NDArray[np.float64]
    high: NDArray[np.float64]
    weight: NDArray[np.float64]
    outputs: tuple[int, ...]

    def zones(self, output_span: NDArray[np.float64] | None = None) -> Zones:
        """The solver's :class:`~service.solver.limits.zones.Zones`, divided by the spans when given."""
        span = np.ones(self.low.size) if output_span is None else output_span
        return make_zones(self.low.size, low=self.low / span, high=self.high / span, weight=self.weight)


def _weight_problems(output_weight: NDArray[np.float64] | None, j: int, name: str, full: bool) -> list[FieldProblem]:
    if output_weight is None:
        return []
    if output_weight.ndim == 1:
        weighted = output_weight[j] != 0.0
    else:
        weighted = bool(np.any(output_weight[j] != 0.0) or np.any(output_weight[:, j] != 0.0))
    if not weighted:
        return []
    what = "its row and column of weights.output" if full else "its weights.output entry"
    return [
        FieldProblem(
            pointer("weights", "output", j),
            f"'{name}' has a zone (zones/{j}): inside it the output has no setpoint weight and outside it "
            f"zones/{j}/weight weights it, so {what} must be 0",
        )
    ]


def check_zones(
    zones: Sequence[OutputZone | None] | None, plant: DiscretePlant, output_weight: NDArray[np.float64] | None
) -> tuple[ZoneInputs | None, list[FieldProblem]]:
    """Check a request's ``zones`` against the plant's outputs and the output weight.

    Returns
    -------
    ZoneInputs or None, list of FieldProblem
        ``None`` when the request has no zone (or only nulls) or a problem was found.
    """
    if zones is None:
        return None, []
    signals = plant.outputs
    p = len(signals)
    if len(zones) != p:
        return None, [
            FieldProblem(
                pointer("zones"),
                f"zones has {len(zones)} entries, expected {p} (one per controlled output; null for an output "
                f"controlled to its setpoint)",
            )
        ]
    low, high, weight = np.full(p, -np.inf), np.full(p, np.inf), np.zeros(p)
    problems: list[FieldProblem] = []
    spans = plant.output_spans
    full = output_weight is not None and output_weight.ndim == 2
    for j, zone in enumerate(zones):
        if zone is None:
            continue
        name = signals[j].name
        if zone.low is None and zone.high is None:
            problems.append(
                FieldProblem(pointer("zones", j), f"the zone of '{name}' has neither low nor high; give one or both")
            )
            continue
        if zone.low is not None and zone.high is not None and zone.low > zone.high:
            problems.append(
                FieldProblem(
                    pointer("zones", j, "high"),
                    # the edges here are deviations from the operating point when it is given: their
                    # difference is the same in the absolute values the client typed, the edges are not
                    f"high of the zone of '{name}' lies {zone.low - zone.high:g} below its low; give a high "
                    "at or above the low",
                )
            )
        for side, value in (("low", zone.low), ("high", zone.high)):
            if value is not None:
                with np.errstate(over="ignore"):
                    scaled = value / spans[j]
                if not np.isfinite(scaled):
                    problems.append(
                        FieldProblem(
                            pointer("zones", j, side),
                            f"{side} of the zone of '{name}' ({value:g}) is too large for its span "
                            f"({spans[j]:g}): divided by the span it is no longer a finite number",
                        )
                    )
        problems += _weight_problems(output_weight, j, name, full)
        low[j] = -np.inf if zone.low is None else float(zone.low)
        high[j] = np.inf if zone.high is None else float(zone.high)
        weight[j] = float(zone.weight)
    outputs = tuple(int(j) for j in np.flatnonzero(weight > 0.0))
    if problems or not outputs:
        return None, problems
    return ZoneInputs(low=low, high=high, weight=weight, outputs=outputs), []


def _edge(value: float) -> float | None:
    return float(value) if np.isfinite(value) else None


def zone_reports(zones: ZoneInputs, plant: DiscretePlant) -> list[ZoneReport]:
    """The ``zones`` block of /design: each zone output and its (zero) weight in the gains."""
    return [
        ZoneReport(
            output=plant.outputs[j].name,
            low=_edge(zones.low[j]),
            high=_edge(zones.high[j]),
            weight=float(zones.weight[j]),
            weight_in_gains=0.0,
        )
        for j in zones.outputs
    ]


def zone_warnings(zones: ZoneInputs, plant: DiscretePlant) -> list[Diagnostic]:
    """One warning that says what a zone means for the unconstrained gains."""
    names = ", ".join(f"'{plant.outputs[j].name}'" for j in zones.outputs)
    return [
        Diagnostic(
            "zone_outputs_not_in_gains",
            f"Zone output(s) {names} (see zones) have no setpoint weight: the unconstrained gains (gain.*) do not act "
            f"on them and leave them floating. Only the move QP holds them in their zones, weighting them "
            f"outside (zones[].weight): /simulate runs it at every step. A controller that applies the "
            f"fixed gains alone does not keep a zone output in its zone.",
        )
    ]


def zone_run_reports(zones: ZoneInputs, plant: DiscretePlant, outputs: NDArray[np.float64]) -> list[ZoneRunReport]:
    """The ``zones`` block of /simulate: each zone output against its zone over the run.

    Parameters
    ----------
    zones : ZoneInputs
    plant : DiscretePlant
    outputs : ndarray, shape (N, p)
        The controlled outputs of the run (rows kept), engineering units (deviations).
    """
    record = zone_record(zones.zones(), outputs)
    return [
        ZoneRunReport(
            output=plant.outputs[j].name,
            low=_edge(zones.low[j]),
            high=_edge(zones.high[j]),
            weight=float(zones.weight[j]),
            weight_in_gains=0.0,
            ended_inside=record.ended_inside[i],
            fraction_inside=record.fraction_inside[i],
            largest_excursion=record.largest_excursion[i],
            first_outside=record.first_outside[i],
        )
        for i, j in enumerate(record.outputs)
    ]

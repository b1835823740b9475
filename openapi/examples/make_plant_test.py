"""Write the invented plant-test example of the example vessel: a CSV and the /identify request.

The "true" plant is the bundled transfer-matrix example (openapi/examples/
design_request_transfer_matrix.json, invented numbers); the test moves the steam valve and
the outlet valve in random binary steps around 40 % and 55 %, with the inlet flow stepped
three times upstream, measurement noise, two missing temperature samples and one spike.  Run from the
repository root:

    .venv/bin/python openapi/examples/make_plant_test.py
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np

from service.solver.identification.process_models import pair_response

HERE = Path(__file__).parent
SAMPLES = 720  # 12 hours of one-minute samples
STEP = 1.0


def binary_moves(rng: np.random.Generator, count: int, low: float, high: float, shortest: int) -> np.ndarray:
    """A random binary test signal: holds of ``shortest`` to 4x ``shortest`` samples."""
    out = np.empty(count)
    level, k = high, 0
    while k < count:
        hold = int(rng.integers(shortest, 4 * shortest))
        out[k : k + hold] = level
        level = low if level == high else high
        k += hold
    return out


def main() -> None:
    rng = np.random.default_rng(2026)
    steam = binary_moves(rng, SAMPLES, 36.0, 44.0, 15)
    outlet = binary_moves(rng, SAMPLES, 53.0, 57.0, 10)
    steam[:20], outlet[:20] = 40.0, 55.0
    inlet = np.full(SAMPLES, 30.0)
    inlet[200:], inlet[450:], inlet[600:] = 32.0, 29.0, 31.0  # upstream changes of the feed
    du = {"steam": steam - 40.0, "outlet": outlet - 55.0, "inlet": inlet - inlet[0]}
    temperature = (
        82.0
        + pair_response("first_order_dead_time", np.array([0.8, 12.0, 1.5]), du["steam"], sample_time=STEP)
        + pair_response("first_order_dead_time", np.array([-0.15, 8.0, 0.5]), du["outlet"], sample_time=STEP)
        + pair_response("second_order_dead_time", np.array([-0.4, 10.0, 3.0, 2.0]), du["inlet"], sample_time=STEP)
        + rng.normal(scale=0.05, size=SAMPLES)
    )
    level = (
        50.0
        + pair_response("integrating_dead_time", np.array([-0.05, 0.3]), du["outlet"], sample_time=STEP)
        + pair_response("integrating_dead_time", np.array([0.02, 0.0]), du["inlet"], sample_time=STEP)
        + rng.normal(scale=0.05, size=SAMPLES)
    )
    temperature[300] += 4.0  # a spike from the transmitter
    rows = []
    for k in range(SAMPLES):
        t = None if k in (410, 411) else round(float(temperature[k]), 3)
        rows.append([k * STEP, steam[k], outlet[k], round(float(inlet[k]), 3), t, round(float(level[k]), 3)])
    header = ["minutes", "steam_valve", "outlet_valve", "inlet_flow", "vessel_temperature", "vessel_level"]
    with open(HERE / "plant_test.csv", "w", newline="") as f:
        writer = csv.writer(f, lineterminator="\n")
        writer.writerow(header)
        for row in rows:
            writer.writerow(["" if v is None else v for v in row])
    request = {
        "sample_time": STEP,
        "inputs": ["steam_valve", "outlet_valve"],
        "outputs": ["vessel_temperature", "vessel_level"],
        "disturbances": ["inlet_flow"],
        "integrating": ["vessel_level"],
        "structure": "first_order_dead_time",
        "pairs": [
            {"output": "vessel_level", "input": "steam_valve", "structure": "none"},
            {"output": "vessel_temperature", "input": "inlet_flow", "structure": "second_order_dead_time"},
        ],
        "max_dead_time": 20.0,
        "settling_time": 60.0,
        "validation": {"fraction": 0.25},
        "data": {name: [row[i] for row in rows] for i, name in enumerate(header) if i > 0},
    }
    (HERE / "identify_request.json").write_text(json.dumps(request, separators=(",", ":")) + "\n")


if __name__ == "__main__":
    main()

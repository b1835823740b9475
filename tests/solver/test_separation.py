"""The separation check: robust to the rounding scatter of dead-time poles, sharp on a real mismatch.

Sources: the separation principle (the whole loop's poles are the controller's and the
estimator's together; common practice); the rounding of a Jordan block of size k spreads its
eigenvalues on a circle of radius (eps ||M||)^(1/k) (Wilkinson's perturbation bound, standard
numerical linear algebra), reproduced here with ``scipy.linalg.eigvals`` on a shift register.
"""

from __future__ import annotations

import numpy as np
import scipy.linalg

from service.pipeline.caps import Caps
from service.pipeline.simulate import check_simulate_request, compute_simulation
from service.schemas.simulate import SimulateRequest
from service.solver.estimation.loop import separation_check

# Two compositions with long, unequal dead times (invented numbers, samples of 1 min).
DEAD_TIME_PLANT = {
    "model": {
        "kind": "transfer_matrix",
        "sample_time": 1.0,
        "elements": [
            [
                {"gain": 0.8, "time_constants": [12.0], "dead_time": 9.0},
                {"gain": -0.3, "time_constants": [6.0], "dead_time": 14.0},
            ],
            [
                {"gain": 0.2, "time_constants": [9.0], "dead_time": 11.0},
                {"gain": 0.5, "time_constants": [15.0], "dead_time": 6.0},
            ],
        ],
    },
    "horizons": {"prediction": 60, "control": 6},
    "weights": {"output": [1.0, 1.0], "move": [0.5, 0.5]},
    "scenario": {"steps": 30},
}


def test_a_nominal_dead_time_run_passes_the_check_although_single_poles_scatter():
    outcome = compute_simulation(check_simulate_request(SimulateRequest.model_validate(DEAD_TIME_PLANT), Caps()))
    whole = outcome.whole
    # The pole-by-pole distance is large: the poles at 0 of the delays scatter under rounding ...
    assert whole.separation_error > 1e-3
    # ... yet nothing is wrong: no mismatch, no noise, and the check says so.
    assert whole.separation_holds is True


def test_a_shifted_pole_fails_the_check_and_a_scattered_block_does_not():
    # A shift register of 20 delays (a nilpotent Jordan block) rounded by one part in 1e16:
    # scipy's eigenvalues lie on a circle of radius about (1e-16)^(1/20) = 0.16, not at 0.
    block = np.diag(np.ones(19), -1)
    block[0, -1] = 1e-16
    scattered = scipy.linalg.eigvals(block)
    assert np.abs(scattered).min() > 0.1
    union = np.concatenate([np.zeros(20, dtype=complex), [0.9, 0.5 + 0.2j, 0.5 - 0.2j]])
    whole = np.concatenate([scattered, [0.9, 0.5 + 0.2j, 0.5 - 0.2j]])
    assert separation_check(whole, union, matrix_norm=1.0, radius=0.9)
    moved = whole.copy()
    moved[20] = 0.9 + 1e-3  # a real mismatch of one pole
    assert not separation_check(moved, union, matrix_norm=1.0, radius=0.9)

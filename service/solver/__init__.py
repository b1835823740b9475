"""Pure numerics of movecast: numpy arrays in, numpy arrays out.

Nothing here imports FastAPI, pydantic or JSON.  A notebook or a batch job can call these
functions directly; the schema layer has already checked every precondition a user could
break, so the solver only asserts them.
"""

from service.solver.design.closed_loop import ClosedLoop, Diagnostic, closed_loop, closed_loop_matrix, design_warnings
from service.solver.design.controller import ControllerDesign, design_controller
from service.solver.design.gain import (
    FactoredHessian,
    PredictiveGain,
    factor_hessian,
    first_move_gain,
    hessian_matrix,
    optimal_moves,
    weighted_moves,
)
from service.solver.design.prediction import Prediction, prediction_matrices, step_response_coefficients
from service.solver.design.weights import weight_matrix, weight_root

__all__ = [
    "ClosedLoop",
    "ControllerDesign",
    "Diagnostic",
    "FactoredHessian",
    "Prediction",
    "PredictiveGain",
    "closed_loop",
    "closed_loop_matrix",
    "design_controller",
    "design_warnings",
    "factor_hessian",
    "first_move_gain",
    "hessian_matrix",
    "optimal_moves",
    "prediction_matrices",
    "step_response_coefficients",
    "weight_matrix",
    "weight_root",
    "weighted_moves",
]

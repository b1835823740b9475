"""Pure numerics of movecast: numpy arrays in, numpy arrays out.

Nothing here imports FastAPI, pydantic or JSON.  A notebook or a batch job can call these
functions directly; the pipeline has already checked every precondition a user could
break, so the solver only asserts them (and raises ``NumericalError`` with a field key).

Rooms: ``models`` (plant forms, sampling, scaling), ``design`` (the unconstrained law and
its Hessian), ``estimation`` (estimator, offset-free target, the law on an estimate),
``limits`` (process limits and the move QP), ``evaluation`` (runs, figures, frequency,
advice); ``numerics`` holds the helpers several rooms share.

Four different things are called a loop; each has its own name:

- the *design loop* (:class:`~service.solver.design.closed_loop.ClosedLoop`): the law on the
  exact state ``[x; u(k-1)]``, the design's closed-loop poles;
- the *control loop* (:class:`~service.solver.estimation.loop.ControlLoop`): the law running
  on an estimate, what a simulation steps;
- the *whole loop* (:class:`~service.solver.estimation.loop.WholeLoop`): plant, law and
  estimator together, its poles and the separation check;
- the *broken loop* ``L`` of the frequency analysis (``service.solver.evaluation.frequency``):
  the loop opened at the plant input or output.
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

"""Estimation and the offset-free target.

- :mod:`.estimator`: disturbance models, the steady-state Kalman filter, detectability;
- :mod:`.target`: the offset-free steady-state target;
- :mod:`.loop`: the controller running on an estimate, and the whole-loop poles;
- :mod:`.realization`: the controller with its estimator as one LTI system from y to u.
"""

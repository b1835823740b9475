"""The unconstrained predictive controller and its Hessian.

- :mod:`.prediction`: Fx, Fu and G by recursion;
- :mod:`.weights`: diagonal or full weights and their square roots;
- :mod:`.gain`: the Hessian (dense or block-Toeplitz), its Cholesky factor, first-move gains;
- :mod:`.spectrum`: extreme eigenvalues of the Hessian for the exact condition number;
- :mod:`.terminal`: the Riccati terminal weight; :mod:`.blocking`: move blocking;
- :mod:`.feedforward`: the feed-forward gain of measured disturbances;
- :mod:`.closed_loop`: the loop on [x; u(k-1)], its poles and warnings;
- :mod:`.controller`: :func:`~.controller.design_controller`, the whole design in one call.
"""

"""Identification: plant-test data to low-order models.

- :mod:`.process_models`: dead-time models of one pair, simulated exactly at the samples;
- :mod:`.least_squares`: the nonlinear least squares fit of one output's pairs;
- :mod:`.diagnostics`: outliers, fit measures, residual correlations;
- :mod:`.data`: resampling onto the sample time, missing input samples held;
- :mod:`.subspace`: a MIMO state-space model by PO-MOESP, the order from the singular values.
"""

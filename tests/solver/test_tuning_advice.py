"""Tuning advice fires on cases built to trigger it and stays quiet otherwise."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.optimize
import scipy.signal

from service.solver.design.closed_loop import Diagnostic, design_warnings
from service.solver.design.controller import design_controller
from service.solver.estimation.estimator import design_estimator
from service.solver.estimation.realization import StateSpace, plant_system
from service.solver.evaluation.advice import (
    hessian_advice,
    inverse_response_time,
    merge_warnings,
    non_minimum_phase_advice,
    sensitivity_advice,
    slow_pole_advice,
    transmission_zeros,
    tuning_advice,
)
from service.solver.evaluation.frequency import design_frequency_analysis, frequency_analysis
from service.solver.models.sampling import sample_zero_order_hold
from tests.references import receding_horizon_radius

# Two inputs acting almost alike on two outputs: G'QG is nearly singular, so with tiny move
# weights the Hessian is ill-conditioned (invented example).
TWIN = (np.diag([0.9, 0.8]), np.array([[1.0, 1.001], [1.0, 0.999]]), np.eye(2))


def twin_design(move: float, control: int):
    a, b, c = TWIN
    return design_controller(
        a, b, c, output_weight=[1.0, 1.0], move_weight=[move, move], prediction=20, control=control
    )


def inverse_response_plant(ts: float = 0.1):
    """(1 - s)/(1 + s)^2 in controllable canonical form, sampled under zero-order hold."""
    sampled = sample_zero_order_hold([[0.0, 1.0], [-1.0, -2.0]], [[0.0], [1.0]], sample_time=ts)
    return sampled.a, sampled.b, np.array([[1.0, -1.0]])


# --- ill-conditioned Hessian ---------------------------------------------------------------


def test_ill_conditioned_hessian_states_both_fixes_with_their_numbers():
    d = twin_design(1e-6, 8)
    assert d.hessian.condition_number > 1e8
    advice = hessian_advice(*TWIN, d)
    assert advice is not None and advice.code == "ill_conditioned_hessian"
    # The figures quoted are those of the same design redone with R x 10 and with Hu / 2.
    # (condition numbers of the Hessian scaled to unit diagonal, which do not depend on units)
    heavier = twin_design(1e-5, 8).hessian.scaled_condition_number
    shorter = twin_design(1e-6, 4).hessian.scaled_condition_number
    assert f"{heavier:.3g}" in advice.message and f"{shorter:.3g}" in advice.message
    assert "from 8 to 4" in advice.message
    assert heavier < d.hessian.scaled_condition_number


def test_well_conditioned_hessian_gets_no_advice():
    assert hessian_advice(*TWIN, twin_design(1.0, 8)) is None


def test_advice_replaces_the_plain_warning_of_the_same_code():
    d = twin_design(1e-6, 8)
    plain = design_warnings(condition_number=d.hessian.condition_number, loop=d.loop)
    extra = Diagnostic("slow_pole", "x")
    merged = merge_warnings(plain, [hessian_advice(*TWIN, d), extra])
    codes = [w.code for w in merged]
    assert codes.count("ill_conditioned_hessian") == 1 and codes[-1] == "slow_pole"
    assert "tenfold" in merged[codes.index("ill_conditioned_hessian")].message


# --- slow pole -----------------------------------------------------------------------------


def test_slow_uncontrollable_plant_mode_is_named_as_the_plants():
    # The mode at 0.99 is not reachable from the input (B has no entry there), so it stays a
    # closed-loop pole; its time constant -1/ln(0.99) = 99.5 samples exceeds Hp = 10.
    a, b, c = np.diag([0.5, 0.99]), np.array([[1.0], [0.0]]), np.array([[1.0, 1.0]])
    d = design_controller(a, b, c, output_weight=[1.0], move_weight=[1.0], prediction=10, control=3)
    advice = slow_pole_advice(a, d, sample_time=2.0)
    assert advice is not None and advice.code == "slow_pole"
    assert "open-loop pole of the plant" in advice.message
    assert "99.5 samples" in advice.message and "199" in advice.message  # 99.5 x 2.0


def test_heavy_move_suppression_is_named_as_the_tunings():
    # A scalar plant, heavy move weight, short horizon: the dominant pole is the controller's.
    d = design_controller([[0.5]], [[1.0]], [[1.0]], output_weight=[1.0], move_weight=[1e3], prediction=5, control=1)
    advice = slow_pole_advice([[0.5]], d)
    assert advice is not None and "tuning put it there" in advice.message
    tau = -1.0 / np.log(np.abs(d.loop.poles).max())  # time constant of a discrete pole
    assert f"{tau:.3g} samples" in advice.message


def test_slow_estimator_pole_is_named_as_the_estimators():
    # With tiny disturbance noise the filter tracks the disturbance slowly (Kalman filter);
    # the controller itself is fast.
    a, b, c = np.array([[0.5]]), np.array([[1.0]]), np.array([[1.0]])
    d = design_controller(a, b, c, output_weight=[1.0], move_weight=[0.1], prediction=10, control=3)
    est = design_estimator(a, b, c, kind="output_disturbance", disturbance_noise=[1e-4])
    assert np.abs(est.poles).max() > np.exp(-1.0 / 10)  # slower than Hp = 10 samples
    advice = slow_pole_advice(a, d, estimator_poles=est.poles)
    assert advice is not None and "estimator pole" in advice.message


def test_fast_loop_has_no_slow_pole():
    d = design_controller([[0.5]], [[1.0]], [[1.0]], output_weight=[1.0], move_weight=[0.1], prediction=10, control=3)
    assert slow_pole_advice([[0.5]], d) is None


# --- peak sensitivity ----------------------------------------------------------------------


def proportional(k: float) -> StateSpace:
    return StateSpace(a=np.zeros((0, 0)), b=np.zeros((0, 1)), c=np.zeros((1, 0)), d=np.array([[-k]]))


def test_peak_sensitivity_above_two_fires_and_quotes_the_bounds():
    # Hand computation: P = 1/(z - 0.5), u = -y: S = (z - 0.5)/(z + 0.5) peaks at z = -1 with
    # |S| = 3 > 2 (the 6 dB rule of thumb); then GM >= 3/2 and PM >= 2 asin(1/6) = 19.2 deg.
    fa = frequency_analysis(plant_system([[0.5]], [[1.0]], [[1.0]]), proportional(1.0), sample_time=1.0)
    advice = sensitivity_advice(fa)
    assert advice is not None and advice.code == "high_peak_sensitivity"
    assert "3 (9.54 dB)" in advice.message and "1.5" in advice.message and "19.2" in advice.message


def test_peak_sensitivity_below_two_is_quiet():
    # Hand computation: u = -0.5 y puts the closed-loop pole at 0, S = (z - 0.5)/z, max |S| = 1.5.
    fa = frequency_analysis(plant_system([[0.5]], [[1.0]], [[1.0]]), proportional(0.5), sample_time=1.0)
    assert fa.plant_input.peak_sensitivity == pytest.approx(1.5, rel=1e-9)
    assert sensitivity_advice(fa) is None


def test_aggressive_loop_with_an_input_disturbance_estimator_fires():
    # An invented plant and tuning whose peak sensitivity is above 2 with one estimator and
    # below it with another (checked, then the advice must follow the number).
    a, b, c = np.array([[0.9, 0.2], [0.0, 0.7]]), np.array([[0.0], [1.0]]), np.array([[1.0, 0.0]])
    d = design_controller(a, b, c, output_weight=[1.0], move_weight=[0.1], prediction=10, control=3)
    for kind in ("input_disturbance", "output_disturbance"):
        fa = design_frequency_analysis(d, design_estimator(a, b, c, kind=kind), sample_time=0.5)
        high = max(fa.plant_input.peak_sensitivity, fa.plant_output.peak_sensitivity) > 2.0
        assert (sensitivity_advice(fa) is not None) == high
    fa = design_frequency_analysis(d, design_estimator(a, b, c, kind="input_disturbance"), sample_time=0.5)
    assert sensitivity_advice(fa) is not None


def _floating_level_loop(k: float):
    # Hand computation: y1 = u/(z - 0.5), a level y2 = 0.1 u/(z - 1), and u = -k y1: no gain
    # sees the level (as a zone output in the unconstrained gains).  At the plant output
    # S = (I + L)^-1 = [[1/(1 + k P1), 0], [-k P2/(1 + k P1), 1]]: S21 grows without bound
    # as w -> 0 (the level floats), while S11 is the single loop's (z - 0.5)/(z - 0.5 + k).
    plant = plant_system(np.diag([0.5, 1.0]), np.array([[1.0], [0.1]]), np.eye(2))
    controller = StateSpace(a=np.zeros((0, 0)), b=np.zeros((0, 2)), c=np.zeros((1, 0)), d=np.array([[-k, 0.0]]))
    return frequency_analysis(plant, controller, sample_time=1.0)


def test_a_floating_zone_output_is_left_out_of_the_peak_at_the_plant_output():
    fa = _floating_level_loop(0.5)
    assert not fa.unstable and fa.plant_output.peak_sensitivity > 10.0  # S21 at the grid's low end
    assert sensitivity_advice(fa) is not None  # the whole matrix: "fragile"
    # Without the level, S11 = (z - 0.5)/z peaks at 1.5 (z = -1): below 2, no advice.
    assert sensitivity_advice(fa, floating_outputs=[1], output_labels=["temperature", "level"]) is None
    # With u = -y1, S11 = (z - 0.5)/(z + 0.5) peaks at 3 (z = -1): the tracked loop is fragile.
    advice = sensitivity_advice(_floating_level_loop(1.0), floating_outputs=[1], output_labels=["temperature", "level"])
    assert advice is not None
    assert (
        "at the plant output without the zone output(s) 'level', which float in the unconstrained gains 3 (9.54 dB)"
        in (advice.message)
    )


def test_unstable_loop_gets_no_sensitivity_advice():
    # u = -3 y on 1/(z - 0.5) puts the pole at -2.5: unstable, so peaks are not robustness.
    fa = frequency_analysis(plant_system([[0.5]], [[1.0]], [[1.0]]), proportional(3.0), sample_time=1.0)
    assert not fa.stable and sensitivity_advice(fa) is None


# --- non-minimum-phase plant with a short horizon -----------------------------------------


def test_transmission_zero_of_the_inverse_response_plant_matches_scipy():
    # Reference library: the roots (numpy.roots) of the numerator from scipy.signal.ss2tf on
    # the same discrete model; the leading coefficient of a strictly proper model is zero.
    a, b, c = inverse_response_plant()
    ours = transmission_zeros(a, b, c)
    num, _ = scipy.signal.ss2tf(a, b, c, np.zeros((1, 1)))
    reference = np.roots(num[0][np.argmax(np.abs(num[0]) > 1e-12 * np.abs(num[0]).max()) :])
    np.testing.assert_allclose(np.sort_complex(ours), np.sort_complex(reference), rtol=1e-10)
    assert abs(ours[0]) > 1.0


def test_transmission_zeros_of_a_square_plant_match_the_rank_drop(rng):
    # Definition of a transmission zero: the system matrix [[A - z I, B], [C, 0]] loses rank.
    a, b, c = rng.normal(size=(4, 4)), rng.normal(size=(4, 2)), rng.normal(size=(2, 4))
    for z in transmission_zeros(a, b, c):
        matrix = np.block([[a - z * np.eye(4), b], [c, np.zeros((2, 2))]])
        s = np.linalg.svd(matrix, compute_uv=False)
        assert s[-1] < 1e-8 * s[0]


def test_inverse_response_time_against_the_analytic_step_response():
    # Laplace inversion: the step response of (1 - s)/(1 + s)^2 is y(t) = 1 - (1 + 2t) e^(-t),
    # which starts negative and crosses zero for good at the root of e^t = 1 + 2t.  Under a
    # zero-order hold the samples are exact, so the inverse response ends at the first sample
    # after that root.
    ts = 0.1
    crossing = scipy.optimize.brentq(lambda t: 1.0 - (1.0 + 2.0 * t) * np.exp(-t), 0.5, 3.0)
    a, b, c = inverse_response_plant(ts)
    zero = transmission_zeros(a, b, c)[0]
    assert inverse_response_time(a, b, c, zero) == int(np.ceil(crossing / ts))


def test_short_horizon_on_an_inverse_response_fires_and_a_long_one_is_quiet():
    ts = 0.1
    a, b, c = inverse_response_plant(ts)
    needed = inverse_response_time(a, b, c, transmission_zeros(a, b, c)[0])
    short = non_minimum_phase_advice(a, b, c, prediction=needed - 1, sample_time=ts)
    assert short is not None and short.code == "non_minimum_phase_short_horizon"
    assert f"{needed} samples" in short.message
    assert non_minimum_phase_advice(a, b, c, prediction=needed, sample_time=ts) is None


def test_minimum_phase_plant_is_quiet():
    # 1/(1 + s)^2 sampled has one sampling zero, inside the unit circle for this sample time.
    sampled = sample_zero_order_hold([[0.0, 1.0], [-1.0, -2.0]], [[0.0], [1.0]], sample_time=0.1)
    c = np.array([[1.0, 0.0]])
    assert np.all(np.abs(transmission_zeros(sampled.a, sampled.b, c)) < 1.0)
    assert non_minimum_phase_advice(sampled.a, sampled.b, c, prediction=2) is None


# --- all together --------------------------------------------------------------------------


def test_a_sound_design_gets_no_advice():
    a, b, c = np.array([[0.9, 0.2], [0.0, 0.7]]), np.array([[0.0], [1.0]]), np.array([[1.0, 0.0]])
    d = design_controller(a, b, c, output_weight=[1.0], move_weight=[1.0], prediction=30, control=3)
    est = design_estimator(a, b, c, kind="output_disturbance")
    fa = design_frequency_analysis(d, est, sample_time=1.0)
    assert tuning_advice(a, b, c, d, sample_time=1.0, analysis=fa, estimator_poles=est.poles) == []


def test_every_check_reports_in_the_fixed_order():
    ts = 0.1
    a, b, c = inverse_response_plant(ts)
    d = design_controller(a, b, c, output_weight=[1.0], move_weight=[1e4], prediction=5, control=2)
    codes = [w.code for w in tuning_advice(a, b, c, d, sample_time=ts)]
    # This loop is unstable (a pole just outside the circle): since issue 10 it gets
    # unstable_closed_loop and no slow_pole advice, which would ask to lower the move weights
    # while unstable_closed_loop asks to raise them.
    assert d.loop.unstable and "unstable_closed_loop" in [w.code for w in d.warnings]
    assert codes == ["non_minimum_phase_short_horizon"]


def test_shortcut_condition_numbers_equal_full_redesigns(rng):
    # The advice's shortcut (H + (s-1) blockdiag(R), leading block for a shorter Hu) must give
    # what a separate design gives; the reference is design_controller itself.
    from service.solver.design.controller import design_controller
    from service.solver.evaluation.advice import _condition_number

    n, m, p = 4, 2, 2
    a = rng.normal(size=(n, n))
    a *= 0.9 / max(abs(np.linalg.eigvals(a)))
    b, c = rng.normal(size=(n, m)), rng.normal(size=(p, n))
    base = {"output_weight": [1.0, 2.0], "move_weight": [0.1, 0.3], "prediction": 20}
    d = design_controller(a, b, c, control=6, **base)
    heavier = design_controller(a, b, c, control=6, **{**base, "move_weight": [1.0, 3.0]})
    shorter = design_controller(a, b, c, control=3, **base)
    assert _condition_number(a, b, c, d, move_scale=10.0, control=6) == pytest.approx(
        heavier.hessian.scaled_condition_number, rel=1e-9
    )
    assert _condition_number(a, b, c, d, move_scale=1.0, control=3) == pytest.approx(
        shorter.hessian.scaled_condition_number, rel=1e-9
    )


def test_an_unstable_mode_no_input_moves_is_not_blamed_on_the_tuning():
    # a = diag(0.5, 1.2), b = [1; 0]: the PBH test (standard linear systems theory) gives
    # rank [A - 1.2 I, B] = 1 < 2 (numpy.linalg.matrix_rank), so 1.2 stays a closed-loop pole
    # whatever the horizon or weights; the advice must say so instead of "raise the move weights".
    a, b, c = np.diag([0.5, 1.2]), np.array([[1.0], [0.0]]), np.array([[1.0, 1.0]])
    assert np.linalg.matrix_rank(np.hstack([a - 1.2 * np.eye(2), b])) == 1
    for move in (0.01, 1.0, 100.0):
        d = design_controller(a, b, c, output_weight=[1.0], move_weight=[move], prediction=40, control=5)
        assert d.loop.unstable
        message = next(w.message for w in d.warnings if w.code == "unstable_closed_loop")
        assert "no tuning can stabilize" in message and "raise the move weights" not in message


def test_an_unstable_loop_of_a_controllable_plant_keeps_the_tuning_advice():
    # The controllable inverse-response loop with a very short horizon and heavy moves is
    # unstable through its tuning: the advice names the horizon and the move weights.
    ts = 0.1
    a, b, c = inverse_response_plant(ts)
    d = design_controller(a, b, c, output_weight=[1.0], move_weight=[1e4], prediction=5, control=2)
    assert d.loop.unstable
    message = next(w.message for w in d.warnings if w.code == "unstable_closed_loop")
    assert "Lengthen the prediction horizon" in message and "no tuning" not in message


def _unstable_message(a, b, c, q, r, *, prediction, control, **more):
    d = design_controller(a, b, c, output_weight=q, move_weight=r, prediction=prediction, control=control, **more)
    assert d.loop.unstable
    return next(w.message for w in d.warnings if w.code == "unstable_closed_loop")


def test_an_unstable_plant_is_not_advised_heavier_move_weights():
    # An invented exothermic reactor: temperature pole 1.04 per sample (open-loop unstable) and
    # a stable jacket, one coolant input.  With short horizons the loop is unstable; heavier move
    # weights bring a finite-horizon law nearer to doing nothing, so they must not be advised.
    # Each claim of the advice is checked on the loop built from scratch
    # (tests/references.py: receding_horizon_radius, least squares and numpy's eigenvalues).
    a = np.array([[1.04, 0.1], [0.0, 0.8]])
    b, c = np.array([[0.0], [0.5]]), np.array([[1.0, 0.0]])
    q, r = np.eye(1), np.array([[50.0]])
    assert receding_horizon_radius(a, b, c, q, r, prediction=3, control=1) > 1.0
    message = _unstable_message(a, b, c, [1.0], [50.0], prediction=3, control=1)
    assert "raise the move weights" not in message and "no tuning" not in message
    assert "lengthen the prediction and control horizons" in message and "riccati" in message
    radii = [receding_horizon_radius(a, b, c, q, r * k, prediction=3, control=1) for k in (1.0, 10.0, 100.0)]
    assert radii[0] < radii[1] < radii[2] and radii[2] > 1.0  # heavier moves: nearer the open loop
    assert receding_horizon_radius(a, b, c, q, r, prediction=40, control=5) < 1.0  # longer horizons help
    riccati = design_controller(
        a, b, c, output_weight=[1.0], move_weight=[50.0], prediction=3, control=3, terminal="riccati"
    )
    assert riccati.loop.stable
    # an open-loop stable plant unstable through its tuning keeps the advice of heavier moves
    # (test_an_unstable_loop_of_a_controllable_plant_keeps_the_tuning_advice)


def test_an_unstable_mode_no_weighted_output_sees_is_not_blamed_on_horizons_or_move_weights():
    # A mode at 1.03 that no controlled output shows (C has no column on it): the free response
    # of the weighted outputs from it is zero, so the law never acts on it and it stays a
    # closed-loop pole for every horizon and move weight (the loop built from scratch agrees).
    a = np.diag([0.9, 0.7, 1.03])
    b = np.array([[1.0, 0.2], [0.1, 1.0], [0.5, 0.5]])
    c = np.array([[1.0, 0.0, 0.0], [0.0, 1.0, 0.0]])
    for prediction, control, move in ((4, 2, 0.1), (100, 10, 0.1), (40, 5, 1000.0)):
        radius = receding_horizon_radius(a, b, c, np.eye(2), move * np.eye(2), prediction=prediction, control=control)
        assert radius == pytest.approx(1.03, rel=1e-12)
        message = _unstable_message(a, b, c, [1.0, 1.0], [move, move], prediction=prediction, control=control)
        assert "no controlled output shows" in message and "no tuning can stabilize" in message
        assert "raise the move weights" not in message and "Lengthen" not in message
    # Shown only by an output of weight 0: giving that output a weight is the fix, and it works.
    c2 = np.array([[1.0, 0.0, 0.0], [0.0, 1.0, 1.0]])
    message = _unstable_message(a, b, c2, [1.0, 0.0], [0.1, 0.1], prediction=40, control=5)
    assert "only outputs with weight 0 see" in message and "no tuning" not in message
    assert receding_horizon_radius(a, b, c2, np.diag([1.0, 0.0]), 0.1 * np.eye(2), prediction=40, control=5) == (
        pytest.approx(1.03, rel=1e-12)
    )
    assert receding_horizon_radius(a, b, c2, np.eye(2), 0.1 * np.eye(2), prediction=40, control=5) < 1.0


def test_zero_directions_by_inverse_iteration_equal_the_svds():
    # The null directions of the system matrix at a real zero, by inverse iteration, against
    # the last singular vectors of numpy's SVD (the textbook definition), up to sign.
    from service.solver.evaluation.advice import _null_directions
    from service.solver.models.zeros import plant_zeros

    rng = np.random.default_rng(7)
    checked = 0
    for _ in range(5):
        a = np.diag(rng.uniform(0.2, 0.9, 5))
        b, c = rng.normal(size=(5, 2)), rng.normal(size=(2, 5))
        real = [z.real for z in plant_zeros(a, b, c).transmission if abs(z.imag) < 1e-12]
        for z0 in real:
            u0, y0 = _null_directions(a, b, c, z0)
            system = np.block([[a - z0 * np.eye(5), b], [c, np.zeros((2, 2))]])
            left, _, right = np.linalg.svd(system)
            assert abs(abs(u0 @ right[-1, 5:]) - np.linalg.norm(right[-1, 5:]) * np.linalg.norm(u0)) < 1e-8
            assert abs(abs(y0 @ left[5:, -1]) - np.linalg.norm(left[5:, -1]) * np.linalg.norm(y0)) < 1e-8
            np.testing.assert_allclose(np.linalg.norm(u0), np.linalg.norm(right[-1, 5:]), rtol=1e-6)
            checked += 1
    assert checked >= 5

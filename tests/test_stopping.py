"""The stopping rule on its own: synthetic iteration histories with known errors.

No numba, no screen: the rule is a pure function of the update history. A
linear stationary iteration whose error is a sum of decaying modes,
e_k = Σ c_i λ_i^k, has updates Δ_k = e_{k-1} - e_k = Σ c_i λ_i^(k-1) (1 - λ_i)
(common practice: the eigen-decomposition of the error of a stationary
iteration, e.g. Saad, *Iterative Methods for Sparse Linear Systems*, ch. 4).
With non-negative modes and one "cell" the max-norm of both is the sum, so
the true error of every sweep is known exactly.
"""

import math

import numpy as np
import pytest

from relaxtui.solver import stopping
from relaxtui.solver.stopping import StoppingRule


def modes(coeffs, factors, sweeps):
    k = np.arange(1, sweeps + 1)
    c = np.asarray(coeffs, float)[:, None]
    lam = np.asarray(factors, float)[:, None]
    error = (c * lam ** k).sum(axis=0)
    update = (c * lam ** (k - 1) * (1 - lam)).sum(axis=0)
    return update, error


def first_converged(rule: StoppingRule, updates, chunk=16):
    for start in range(0, len(updates), chunk):
        rule.add(updates[start : start + chunk])
        d = rule.decide()
        if d.status is not None:
            return rule.sweeps, d
    return None, rule.last


@pytest.mark.parametrize("rho", [0.5, 0.9, 0.99, 0.999, 0.9999])
@pytest.mark.parametrize("tol", [1e-2, 1e-5, 1e-8])
def test_single_mode_is_honest_and_not_late(rho, tol):
    sweeps = int(40 / (1 - rho)) + 200
    upd, err = modes([100.0], [rho], sweeps)
    n, d = first_converged(StoppingRule(tol, max_sweeps=10**9), upd)
    assert d.status == stopping.CONVERGED
    assert err[n - 1] <= tol  # never converged while the true error exceeds the tolerance
    first_true = int(np.argmax(err <= tol)) + 1
    assert n <= max(1.5 * first_true, first_true + 100)  # and not needlessly late
    assert d.estimated_error >= err[n - 1]  # the reported estimate bounds the true error
    assert d.factor == pytest.approx(rho, rel=1e-6)


@pytest.mark.parametrize("tol", [1e-1, 1e-3, 1e-6])
def test_fast_modes_do_not_fool_the_rule(tol):
    # A rough component dominates the early updates (1 - λ is large) while a
    # smooth one, 1000 times slower to move, carries the error.
    upd, err = modes([5.0, 20.0], [0.3, 0.9995], 60000)
    n, d = first_converged(StoppingRule(tol, max_sweeps=10**9), upd)
    assert d.status == stopping.CONVERGED
    assert err[n - 1] <= tol
    for k in range(8, n, 7):  # the estimate bounds the true error along the way
        e = stopping.estimate(upd[:k])
        if e.mature and e.error <= tol:
            assert err[k - 1] <= tol


def test_small_update_is_not_convergence():
    # update 1e-4 per sweep but rho = 0.99999: the error is still about 10
    upd, err = modes([10.0], [0.99999], 3000)
    rule = StoppingRule(1e-3, max_sweeps=10**9)
    rule.add(upd)
    d = rule.decide()
    assert upd[-1] < 1e-3 and err[-1] > 1e-3
    assert d.status is None
    assert d.estimated_error >= err[-1]


def test_eta_predicts_remaining_sweeps():
    rho = 0.99
    upd, err = modes([100.0], [rho], 3000)
    rule = StoppingRule(1e-6, max_sweeps=10**9)
    rule.add(upd[:400])
    d = rule.decide()
    assert d.status is None and d.eta_sweeps is not None
    n, _ = first_converged(rule, upd[400:])
    remaining = n - 400
    assert d.eta_sweeps == pytest.approx(remaining, rel=0.1, abs=20)


def test_non_finite_update_is_divergence():
    rule = StoppingRule(1e-3, max_sweeps=100)
    rule.add([1.0, 0.5, float("nan")])
    assert rule.decide().status == stopping.DIVERGED


def test_sustained_growth_is_divergence():
    rule = StoppingRule(1e-3, max_sweeps=10**6, scale=1.0)
    upd = 1e-3 * 1.05 ** np.arange(400)  # grows 5 % a sweep
    n, d = first_converged(rule, upd)
    assert d.status == stopping.DIVERGED


def test_no_progress_is_stalled():
    rule = StoppingRule(1e-9, max_sweeps=10**6, scale=100.0)
    rng = np.random.default_rng(1)
    upd = 1e-3 * (1 + 0.1 * rng.random(5000))  # noisy but never better
    n, d = first_converged(rule, upd)
    assert d.status == stopping.STALLED
    assert n < 5000


def test_rounding_floor_above_tolerance_is_stalled():
    # updates reach the float64 floor of a field of size 100 while the bound is above 1e-14
    scale = 100.0
    floor = np.finfo(float).eps * scale
    upd = np.maximum(0.999 ** np.arange(1, 40001), floor)
    n, d = first_converged(StoppingRule(1e-14, max_sweeps=10**6, scale=scale), upd, chunk=64)
    assert d.status == stopping.STALLED


def test_limits_and_cancel():
    upd, _ = modes([1.0], [0.9999], 500)
    rule = StoppingRule(1e-9, max_sweeps=200)
    n, d = first_converged(rule, upd, chunk=8)
    assert d.status == stopping.SWEEP_LIMIT and n == 200
    rule = StoppingRule(1e-9, max_sweeps=10**6, time_limit=1.0)
    rule.add(upd[:50])
    assert rule.decide(seconds=0.5).status is None
    assert rule.decide(seconds=1.5).status == stopping.TIME_LIMIT
    assert rule.decide(seconds=0.5, cancelled=True).status == stopping.CANCELLED


def test_restart_measures_the_new_iteration_only():
    slow, _ = modes([1.0], [0.9999], 2000)
    fast, err = modes([slow[-1] / (1 - 0.5)], [0.5], 200)
    rule = StoppingRule(1e-9, max_sweeps=10**6)
    rule.add(slow)
    rule.restart()
    rule.add(fast[:60])
    d = rule.decide()
    assert d.factor == pytest.approx(0.5, rel=1e-3)


def test_prior_factor_only_makes_the_bound_larger():
    upd, _ = modes([10.0], [0.9], 300)
    plain = stopping.estimate(upd)
    with_prior = stopping.estimate(upd, prior_factor=0.99)
    lower_prior = stopping.estimate(upd, prior_factor=0.5)
    assert with_prior.error > plain.error
    assert lower_prior.error == plain.error


def test_exact_zero_update_is_the_fixed_point():
    rule = StoppingRule(1e-12, max_sweeps=100)
    rule.add([1.0, 0.25] + [0.0] * 20)
    d = rule.decide()
    assert d.status == stopping.CONVERGED and d.estimated_error == 0.0


def test_complex_regime_gap_is_used_only_when_the_factor_agrees():
    # SOR above its optimal omega: |λ| = ω - 1 for all modes, rotating.
    omega = 1.95
    k = np.arange(1, 2001)
    upd = (omega - 1) ** k * (1.5 + np.cos(0.3 * k))
    loose = stopping.estimate(upd, prior_factor=omega - 1)
    tight = stopping.estimate(upd, prior_factor=omega - 1, prior_gap=0.3)
    assert tight.error < loose.error
    wrong = stopping.estimate(upd * (1.01 ** k), prior_factor=omega - 1, prior_gap=0.3)  # slower than predicted
    assert wrong.error >= stopping.estimate(upd * (1.01 ** k), prior_factor=omega - 1).error * 0.999


def test_rule_rejects_bad_tolerance():
    with pytest.raises(ValueError):
        StoppingRule(0.0, 10)
    with pytest.raises(ValueError):
        StoppingRule(-1.0, 10)


def test_module_does_not_need_numba():
    import subprocess
    import sys

    code = "import sys; import relaxtui.solver.stopping; print('numba' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.strip()
    assert out == "False"
    assert math.isfinite(stopping.RATE_SAFETY)

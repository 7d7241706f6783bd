"""Automatic relaxation factor: Young's theory on the actual masked operator.

For a consistently ordered matrix (the 5-point operator in lexicographic or
red-black order is one) the SOR factor ω and the spectral radius μ = ρ(J) of
the Jacobi iteration matrix determine the SOR convergence factor exactly
(D. M. Young, *Iterative Solution of Large Linear Systems*, Academic Press
1971; R. S. Varga, *Matrix Iterative Analysis*, 1962):

* ω_opt = 2 / (1 + sqrt(1 - μ²)), and at ω ≥ ω_opt the factor is ω - 1;
* below ω_opt it is λ = ((ω μ + sqrt(ω² μ² - 4 (ω - 1))) / 2)²;
* Gauss-Seidel (ω = 1) has μ², weighted Jacobi max |1 - w (1 ± μ)| (the
  Jacobi spectrum of a 2-cyclic matrix is symmetric about 0).

μ is estimated with the Lanczos method on D^{1/2} J D^{-1/2} (symmetric,
similar to J) of the case's own operator, masks, materials and boundary
faces included, not from the rectangle formula cos(πh). Lanczos values lie
inside the spectrum, so the estimate errs low; the driver corrects it from the
factor SOR actually shows, through the inverse relation
μ = (λ + ω - 1) / (ω sqrt(λ)) (Young 1971; the adaptive procedure of Hageman &
Young, *Applied Iterative Methods*, 1981, ch. 9, in spirit).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np


def optimal_omega(mu: float) -> float:
    """Young's optimal SOR factor for Jacobi spectral radius ``mu`` (0 <= mu < 1)."""
    mu = min(max(mu, 0.0), 1.0 - 1e-16)
    return 2.0 / (1.0 + math.sqrt(1.0 - mu * mu))


def sor_factor(mu: float, omega: float) -> float:
    """Asymptotic SOR convergence factor for Jacobi radius ``mu`` and factor ``omega``."""
    if omega >= optimal_omega(mu):
        return omega - 1.0
    disc = omega * omega * mu * mu - 4.0 * (omega - 1.0)
    root = (omega * mu + math.sqrt(max(disc, 0.0))) / 2.0
    return root * root


def sor_smooth_gap(mu: float, omega: float) -> float | None:
    """|λ - 1| of the SOR eigenvalue belonging to the Jacobi eigenvalue ``mu``
    when it is complex (ω above the optimum), else None.

    From Young's relation (λ + ω - 1)² = λ ω² μ²: with ω > ω_opt,
    λ = (ω - 1) e^{2iφ}, cos φ = ω μ / (2 sqrt(ω - 1)).
    """
    if omega <= optimal_omega(mu) or omega <= 1.0:
        return None
    r = omega - 1.0
    c = min(omega * mu / (2.0 * math.sqrt(r)), 1.0)
    theta = 2.0 * math.acos(c)
    return math.sqrt(1.0 - 2.0 * r * math.cos(theta) + r * r)


def jacobi_factor(mu: float, weight: float = 1.0) -> float:
    """Weighted Jacobi factor on a 2-cyclic operator (spectrum in [-mu, mu])."""
    return max(abs(1.0 - weight * (1.0 - mu)), abs(1.0 - weight * (1.0 + mu)))


def mu_from_sor_factor(lam: float, omega: float) -> float:
    """Invert Young's relation: the Jacobi radius implied by an observed SOR factor.

    Valid for ω below the optimum, where the dominant SOR eigenvalue is real.
    """
    if not 0.0 < lam < 1.0:
        return 1.0 - 1e-12
    return min((lam + omega - 1.0) / (omega * math.sqrt(lam)), 1.0 - 1e-16)


@dataclass(frozen=True)
class RadiusEstimate:
    mu: float  # estimated Jacobi spectral radius
    steps: int  # Lanczos steps (operator applications) used
    settled: bool  # whether the estimate stopped moving before the step limit


def _sor_sweeps(mu: float) -> float:
    """Sweeps SOR at the optimal ω needs for four decades: ln(1e4) / (2 - ω_opt)."""
    return 9.2 / max(2.0 - optimal_omega(mu), 1e-300)


def jacobi_radius(apply, cls: np.ndarray, diag: np.ndarray, *, min_steps: int = 100, max_steps: int = 600,
                  budget: float = 0.6, rtol: float = 0.01, method_sweeps=_sor_sweeps) -> RadiusEstimate:
    """Estimate ρ(J) with Lanczos on J in the D-inner product (J is self-adjoint there).

    Parameters
    ----------
    apply : callable(x, out)
        ``out = J x`` for the homogeneous Jacobi iteration matrix, on arrays of
        the shape of ``cls`` (0 outside the unknowns).
    cls, diag : ndarray
        The operator's class per cell (0: not an unknown) and the diagonal per class.
    min_steps, max_steps, budget, method_sweeps
        Steps (operator applications, each costing about two sweeps) are
        spent until the estimate settles, but not beyond ``budget`` times the
        sweeps the method would need at the current estimate
        (``method_sweeps(mu)``, SOR at its optimum by default; at least
        ``min_steps``, at most ``max_steps``): a large grid solved by SOR gets
        a rough estimate that the observed SOR factor then refines.
    rtol : float
        The estimate has *settled* when the gap 1 - μ changed by less than this
        fraction over the last max(20, steps/4) steps. An unsettled estimate errs low; the
        driver then corrects ω from the observed SOR factor and does not use it
        as the stopping rule's prior.
    """
    from relaxtui.kernels import spectral

    v = np.empty(cls.shape)
    norm = spectral.start_vector(cls, diag, v)
    if norm == 0.0:
        return RadiusEstimate(0.0, 0, True)
    # The constant vector overlaps strongly with the Perron vector (the
    # slowest, smooth mode), so the top Ritz value rises quickly.
    spectral.scale_into(v, 1.0 / norm, v)
    v_prev = np.zeros_like(v)
    w = np.empty_like(v)
    alphas = np.zeros(max_steps)
    betas = np.zeros(max_steps)
    beta = 0.0
    history: list[float] = []
    settled = False
    steps = 0
    for steps in range(1, max_steps + 1):
        apply(v, w)
        alpha = spectral.d_dot(w, v, cls, diag)
        beta_new = spectral.d_orthogonalise(w, v, alpha, v_prev, beta, cls, diag)
        alphas[steps - 1] = alpha
        top = float(spectral.tridiagonal_extreme(alphas, betas, steps))
        history.append(top)
        back = max(20, steps // 4)  # Ritz values can stall for a while, then move again
        if len(history) > back:
            old, new = 1.0 - history[-1 - back], 1.0 - top
            if new > 0 and abs(old - new) <= rtol * new:
                settled = True
                break
            if steps >= max(min_steps, budget * method_sweeps(top)):
                break
        if beta_new <= 1e-14:
            settled = True
            break
        beta = beta_new
        betas[steps - 1] = beta
        v_prev, v = v, v_prev
        spectral.scale_into(w, 1.0 / beta, v)
    mu = min(max(history[-1], 0.0), 1.0 - 1e-16) if history else 0.0
    return RadiusEstimate(mu, steps, settled)

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


def jacobi_radius(apply, sqrt_d: np.ndarray, *, max_steps: int = 150, rtol: float = 0.01) -> RadiusEstimate:
    """Estimate ρ(J) with Lanczos on S = D^{1/2} J D^{-1/2}.

    Parameters
    ----------
    apply : callable(x, out)
        ``out = J x`` for the homogeneous Jacobi iteration matrix, on arrays of
        the shape of ``sqrt_d``.
    sqrt_d : ndarray
        sqrt of the diagonal per cell, 0 where the cell is not an unknown.
    max_steps : int
        Most operator applications to spend.
    rtol : float
        Stop when the gap 1 - μ changed by less than this fraction over the
        last 5 steps.
    """
    from relaxtui.kernels import spectral

    inv = np.zeros_like(sqrt_d)
    np.divide(1.0, sqrt_d, out=inv, where=sqrt_d > 0.0)
    # A smooth positive start vector overlaps strongly with the Perron vector
    # (the slowest mode), so the top Ritz value settles in few steps.
    v = sqrt_d.copy()
    spectral.scale_into(v, 1.0 / math.sqrt(spectral.rayleigh(v.copy(), np.ones_like(v), v)), v)
    v_prev = np.zeros_like(v)
    w = np.empty_like(v)
    tmp = np.empty_like(v)
    alphas = np.zeros(max_steps)
    betas = np.zeros(max_steps)
    beta = 0.0
    history: list[float] = []
    settled = False
    steps = 0
    for steps in range(1, max_steps + 1):
        spectral.unscale(v, inv, tmp)
        apply(tmp, w)
        alpha = spectral.rayleigh(w, sqrt_d, v)
        beta_new = spectral.orthogonalise(w, v, alpha, v_prev, beta)
        alphas[steps - 1] = alpha
        top = float(spectral.tridiagonal_extreme(alphas, betas, steps))
        history.append(top)
        if len(history) > 5:
            old, new = 1.0 - history[-6], 1.0 - top
            if new > 0 and abs(old - new) <= rtol * new:
                settled = True
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

"""Young's closed forms: optimal ω, SOR factor, smooth gap, radius from a factor, Jacobi factor.

For a consistently ordered matrix (the 5-point operator in lexicographic or
red-black order is one) the SOR factor ω and the spectral radius μ = ρ(J) of
the Jacobi iteration matrix determine the SOR convergence factor exactly
(D. M. Young, *Iterative Solution of Large Linear Systems*, Academic Press
1971; R. S. Varga, *Matrix Iterative Analysis*, 1962):

* ω_opt = 2 / (1 + sqrt(1 - μ²)), and at ω ≥ ω_opt the factor is ω - 1;
* below ω_opt it is λ = ((ω μ + sqrt(ω² μ² - 4 (ω - 1))) / 2)²;
* Gauss-Seidel (ω = 1) has μ², weighted Jacobi max |1 - w (1 ± μ)| (the
  Jacobi spectrum of a 2-cyclic matrix is symmetric about 0).

μ itself is estimated by :mod:`relaxtui.solver.radius` (Lanczos on the case's
own operator); the driver corrects a low estimate from the factor SOR actually
shows through the inverse relation μ = (λ + ω - 1) / (ω sqrt(λ))
(:func:`mu_from_sor_factor`; Young 1971; Hageman & Young, *Applied Iterative
Methods*, 1981, ch. 9, in spirit).

Pure Python (no numpy): the method registry imports it.
"""

from __future__ import annotations

import math


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




def sor_sweeps(mu: float) -> float:
    """Sweeps SOR at the optimal ω needs for four decades: ln(1e4) / (2 - ω_opt)."""
    return 9.2 / max(2.0 - optimal_omega(mu), 1e-300)

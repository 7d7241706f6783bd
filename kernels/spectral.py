"""Vector kernels of the Lanczos estimate of the Jacobi spectral radius.

The Jacobi matrix J = D^-1 (D - A) is self-adjoint in the inner product
<x, y>_D = sum D x y, so Lanczos runs on J itself with that inner product;
the diagonal comes from the operator's class table (``diag[cls]``), so the
estimate holds three vectors and no per-cell diagonal. numpy's ``dot``/``norm``
would go through a threaded BLAS, which on a small, busy machine spins
against numba's own threads (measured here: 16x slower per call on a loaded
2-core box); these fused loops avoid BLAS and temporaries. Arrays are 2-D in
the operator's working layout.
"""

import math

import numpy as np
from numba import prange
from relaxtui.kernels._jit import kernel


@kernel(parallel=True)
def start_vector(cls, diag, out):
    """out = 1 on the unknowns (class > 0), 0 elsewhere; returns its D-norm sqrt(sum D)."""
    s = 0.0
    for i in prange(cls.shape[0]):
        for j in range(cls.shape[1]):
            c = cls[i, j]
            out[i, j] = 1.0 if c != 0 else 0.0
            s += diag[c] if c != 0 else 0.0
    return math.sqrt(s)


@kernel(parallel=True)
def d_dot(w, v, cls, diag):
    """<w, v>_D = sum over unknowns of D w v (D per class: diag[cls])."""
    s = 0.0
    for i in prange(w.shape[0]):
        for j in range(w.shape[1]):
            c = cls[i, j]
            if c != 0:
                s += diag[c] * w[i, j] * v[i, j]
    return s


@kernel(parallel=True)
def d_orthogonalise(w, v, alpha, v_prev, beta, cls, diag):
    """w -= alpha v + beta v_prev; return the D-norm of the result."""
    s = 0.0
    for i in prange(w.shape[0]):
        for j in range(w.shape[1]):
            x = w[i, j] - alpha * v[i, j] - beta * v_prev[i, j]
            w[i, j] = x
            c = cls[i, j]
            if c != 0:
                s += diag[c] * x * x
    return math.sqrt(s)


@kernel(parallel=True)
def scale_into(w, factor, out):
    """out = w * factor."""
    for i in prange(w.shape[0]):
        for j in range(w.shape[1]):
            out[i, j] = w[i, j] * factor


@kernel
def tridiagonal_extreme(alpha, beta, n):
    """Largest |eigenvalue| of the symmetric tridiagonal matrix (alpha[:n], beta[:n-1]).

    Sturm-sequence bisection (Givens' method; e.g. Golub & Van Loan, *Matrix
    Computations*, §8.4): count eigenvalues below x from the signs of the LDL^T
    pivots, bisect for the largest and the smallest.
    """
    bound = 0.0
    for i in range(n):
        r = abs(alpha[i])
        if i > 0:
            r += abs(beta[i - 1])
        if i < n - 1:
            r += abs(beta[i])
        bound = max(bound, r)
    top = _bisect(alpha, beta, n, -bound, bound, n - 1)
    bottom = _bisect(alpha, beta, n, -bound, bound, np.int64(0))  # not the literal 0: one build of _bisect, not two
    return max(abs(top), abs(bottom))


@kernel
def _count_below(alpha, beta, n, x):
    count = 0
    d = 1.0
    for i in range(n):
        b2 = beta[i - 1] * beta[i - 1] if i > 0 else 0.0
        d = alpha[i] - x - (b2 / d if i > 0 else 0.0)
        if d == 0.0:
            d = 1e-300
        if d < 0.0:
            count += 1
    return count


@kernel
def _bisect(alpha, beta, n, lo, hi, k):
    """The k-th smallest eigenvalue (0-based) by bisection on the Sturm count."""
    for _ in range(200):
        mid = 0.5 * (lo + hi)
        if mid == lo or mid == hi:
            break
        if _count_below(alpha, beta, n, mid) > k:
            hi = mid
        else:
            lo = mid
    return 0.5 * (lo + hi)

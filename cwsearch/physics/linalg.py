"""The one LDLᵀ factorisation of the package: small symmetric positive semi-definite 4×4 systems.

The Fe-statistic (Babak & Sesana 2012; Ellis, Siemens & Creighton 2012)
needs, for every sky position and
frequency, ``N M⁻¹ N`` and ``M⁻¹ N`` with ``M`` the 4×4 matrix of antenna-
weighted inner products. ``M`` is only semi-definite where the array cannot
tell the polarisations apart, so pivots below ``1e-10 ×`` the largest
diagonal element are dropped: that gives the pseudo-inverse quadratic form
``vᵀ M⁺ v`` (Golub & Van Loan, Matrix Computations, §4.1, for LDLᵀ).
:func:`factor4` is unrolled into scalars so that it stays in registers in
the sky kernels; :func:`solve_psd4` solves with the same factors.

Larger covariances (the noise model's Woodbury form) are factorised with
:func:`scipy.linalg.cho_factor` in :mod:`cwsearch.physics.noise`, the only
place a noise covariance is inverted.

Examples
--------
>>> import numpy as np
>>> m = np.diag([4.0, 2.0, 1.0, 0.0]); v = np.array([2.0, 2.0, 1.0, 5.0]); out = np.zeros(4)
>>> solve_psd4(m, v, out); out.tolist()        # the null direction is dropped
[0.5, 1.0, 1.0, 0.0]
>>> round(float(quad4(factor4(4.0, 0, 0, 0, 2.0, 0, 0, 1.0, 0, 0.0), 2.0, 2.0, 1.0, 5.0)), 12)
4.0
"""

from __future__ import annotations

from numba import njit


@njit(cache=True, inline="always")
def factor4(m00, m01, m02, m03, m11, m12, m13, m22, m23, m33):
    """Scalar LDLᵀ of a symmetric PSD 4×4 matrix, unrolled so that it stays in registers.

    Pivots below 1e-10 × the largest diagonal element are dropped which makes
    :func:`quad4` the pseudo-inverse
    quadratic form. Returns the inverse pivots and the strict lower triangle.
    """
    tol = 1e-10 * max(max(m00, m11), max(m22, m33))
    d0 = m00 if m00 > tol else 0.0
    r0 = 1.0 / d0 if d0 > 0 else 0.0
    l10 = m01 * r0
    l20 = m02 * r0
    l30 = m03 * r0
    d1 = m11 - l10 * l10 * d0
    d1 = d1 if d1 > tol else 0.0
    r1 = 1.0 / d1 if d1 > 0 else 0.0
    l21 = (m12 - l20 * l10 * d0) * r1
    l31 = (m13 - l30 * l10 * d0) * r1
    d2 = m22 - l20 * l20 * d0 - l21 * l21 * d1
    d2 = d2 if d2 > tol else 0.0
    r2 = 1.0 / d2 if d2 > 0 else 0.0
    l32 = (m23 - l30 * l20 * d0 - l31 * l21 * d1) * r2
    d3 = m33 - l30 * l30 * d0 - l31 * l31 * d1 - l32 * l32 * d2
    r3 = 1.0 / d3 if d3 > tol else 0.0
    return r0, r1, r2, r3, l10, l20, l30, l21, l31, l32


@njit(cache=True, inline="always")
def quad4(fac, v0, v1, v2, v3):
    """``vᵀ m⁺ v`` = Σ y_i² / d_i with L y = v, from :func:`factor4`."""
    r0, r1, r2, r3, l10, l20, l30, l21, l31, l32 = fac
    y1 = v1 - l10 * v0
    y2 = v2 - l20 * v0 - l21 * y1
    y3 = v3 - l30 * v0 - l31 * y1 - l32 * y2
    return v0 * v0 * r0 + y1 * y1 * r1 + y2 * y2 * r2 + y3 * y3 * r3


@njit(cache=True)
def solve_psd4(m, v, out):
    """Solve ``m a = v`` for a symmetric PSD 4×4 ``m`` into ``out`` with :func:`factor4` (dropped pivots give
    the pseudo-inverse solution on the column space, so ``vᵀ a = vᵀ m⁺ v``)."""
    r0, r1, r2, r3, l10, l20, l30, l21, l31, l32 = factor4(m[0, 0], m[0, 1], m[0, 2], m[0, 3], m[1, 1],
                                                          m[1, 2], m[1, 3], m[2, 2], m[2, 3], m[3, 3])
    y0 = v[0]
    y1 = v[1] - l10 * y0
    y2 = v[2] - l20 * y0 - l21 * y1
    y3 = v[3] - l30 * y0 - l31 * y1 - l32 * y2
    out[3] = y3 * r3
    out[2] = y2 * r2 - l32 * out[3]
    out[1] = y1 * r1 - l21 * out[2] - l31 * out[3]
    out[0] = y0 * r0 - l10 * out[1] - l20 * out[2] - l30 * out[3]


__all__ = ["factor4", "quad4", "solve_psd4"]

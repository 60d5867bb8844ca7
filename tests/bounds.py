"""Error bounds for the numerical tests, in units of the unit roundoff u.

Every numerical test compares a measured quantity with one of these bounds, never with
another rounding of the same quantity (two codes that sum in a different order differ by
O(u), and by how much depends on the CPU's BLAS kernel). Each function names its source.
The constants in front of the published O(.) shapes are common practice (generous enough
that the test passes on any CPU and BLAS kernel, small enough that a real defect, which
shows up as an error of order 1 or of order u kappa^2, still fails); they are marked so.

u: 2^-53 for float64 and complex128, 2^-24 for float32 and complex64 (CHECKS.md).
"""

from __future__ import annotations

from typing import Any

import numpy as np

# Common-practice safety factor in front of the published O(.) shapes below.
SAFETY = 10.0


def unit_roundoff(dtype: Any = np.float64) -> float:
    """u of a dtype's real part (half its machine epsilon)."""
    return float(np.finfo(np.dtype(dtype)).eps) / 2


def stable_qr(n: int, dtype: Any = np.float64) -> float:
    """Loss of orthogonality ||I - Q^H Q||_F and relative residual ||A - QR||_F / ||A||_F of
    a backward-stable QR (Householder, TSQR with any tree, CholeskyQR2 and sCholQR3 within
    their range, BCGS2): O(u), independent of kappa.

    Source: Higham, Accuracy and Stability of Numerical Algorithms, 2nd ed. 2002, Thm 19.4
    and ch. 19.3 (Householder); Demmel, Grigori, Hoemmen, Langou, SISC 34(1) 2012 (TSQR);
    CHECKS.md. The published constant grows with m n in the worst case; observed errors grow
    like sqrt(n) u, so ``SAFETY * n * u`` (common practice) is used.
    """
    return SAFETY * n * unit_roundoff(dtype)


def cholqr2(m: int, n: int, dtype: Any = np.float64) -> float:
    """||I - Q^H Q||_F of CholeskyQR2 for kappa below about u^-1/2:
    6 (m n u + n (n+1) u).

    Source: Yamamoto, Nakatsukasa, Yanagisawa, Fukaya, ETNA 44 (2015); the constant 6 is
    from memory (CHECKS.md), so it is multiplied by SAFETY.
    """
    u = unit_roundoff(dtype)
    return SAFETY * 6 * (m * n * u + n * (n + 1) * u)


def mgs(n: int, kappa: float, dtype: Any = np.float64) -> float:
    """||I - Q^H Q|| of (block) modified Gram-Schmidt: c u kappa, for c u kappa < 1.

    Source: Björck, BIT 7 (1967); Björck & Paige, SIAM J. Matrix Anal. Appl. 13(1) 1992;
    Jalby & Philippe, SISC 12(5) 1991 for the block form (from memory). Constant ``SAFETY n``
    is common practice.
    """
    return SAFETY * n * unit_roundoff(dtype) * kappa


def r_factor(n: int, kappa: float, dtype: Any = np.float64) -> float:
    """||R1 - R2||_F / ||A||_2 between the R factors of two backward-stable QRs of A (signs
    fixed to a real non-negative diagonal).

    Source: the first-order perturbation bound of the QR factor R, ||dR||_F / ||R||_2 <=
    c kappa ||dA||_F / ||A||_2 (Sun, BIT 31 (1991); Chang, Paige & Stewart, SIAM J. Matrix
    Anal. Appl. 18(3) 1997), with ||dA||_F / ||A||_2 = O(n u) for each factorization (Higham
    Thm 19.4). ``SAFETY n u kappa`` for the difference of two is common practice.
    """
    return 2 * SAFETY * n * unit_roundoff(dtype) * max(1.0, kappa)


def lstsq_solution(
    n: int,
    kappa: float,
    residual_ratio: float = 0.0,
    dtype: Any = np.float64,
) -> float:
    """||x1 - x2|| / ||x|| between two backward-stable least-squares solutions.

    First-order perturbation bound of least squares (Wedin 1973; Higham Thm 20.1; Golub &
    Van Loan, Matrix Computations, 4th ed., Thm 5.3.1): a relative backward error eta gives
    ||dx|| / ||x|| <= c eta (kappa + kappa^2 ||r|| / (||A|| ||x||)). ``residual_ratio`` is
    ||r|| / (||A|| ||x||); eta = n u per solver and two solvers differ by twice that.
    ``SAFETY`` is common practice.
    """
    eta = n * unit_roundoff(dtype)
    k = max(1.0, kappa)
    return 2 * SAFETY * eta * (k + k * k * residual_ratio)


def residual_vector(n: int, kappa: float, dtype: Any = np.float64) -> float:
    """||r1 - r2|| / ||b|| between the residuals of two backward-stable least-squares
    solutions: c eta (1 + 2 kappa) (Higham Thm 20.1, the residual bound; Golub & Van Loan
    Thm 5.3.1). eta = n u per solver; ``SAFETY`` is common practice."""
    eta = n * unit_roundoff(dtype)
    return 2 * SAFETY * eta * (1 + 2 * max(1.0, kappa))


def relative_error(measured: np.ndarray, reference: np.ndarray) -> float:
    """||measured - reference||_F / ||reference||_F (the absolute norm when the reference
    is zero)."""
    measured, reference = np.asarray(measured), np.asarray(reference)
    scale = float(np.linalg.norm(reference))
    diff = float(np.linalg.norm(measured - reference))
    return diff / scale if scale > 0 else diff


def projector(n: int, kappa: float, dtype: Any = np.float64) -> float:
    """||P1 - P2||_2 between the orthogonal projectors onto the rank-r column space of A
    computed by two backward-stable methods, with kappa = sigma_1 / sigma_r the condition of
    the rank-r part (its gap to sigma_{r+1} = 0 is sigma_r).

    Source: the sin-theta theorem for singular subspaces, ||sin Theta|| <= ||E|| / gap
    (Wedin, BIT 12 (1972); Stewart & Sun, Matrix Perturbation Theory, 1990, Thm V.4.4),
    with ||E|| / ||A||_2 = O(n u) per method (Higham 2002, Thm 19.4). ``SAFETY`` is common
    practice. Every diagonal entry of P1 - P2 (a leverage difference) is bounded by it too.
    """
    return 2 * SAFETY * n * unit_roundoff(dtype) * max(1.0, kappa)


def pseudo_inverse(n: int, kappa: float, dtype: Any = np.float64) -> float:
    """||X1 - X2||_2 / ||A^+||_2 between the pseudo-inverses (or truncated-SVD inverses of
    the same rank) of A computed by two backward-stable methods: c kappa eta.

    Source: Wedin, BIT 13 (1973), the perturbation of the pseudo-inverse under a
    rank-preserving perturbation, ||dA^+|| <= mu ||A^+||^2 ||dA|| (mu <= 3); Stewart, SIAM
    Review 19 (1977). eta = n u per method (Higham 2002, Thm 19.4); ``SAFETY`` is common
    practice.
    """
    return 2 * 3 * SAFETY * n * unit_roundoff(dtype) * max(1.0, kappa)


def inner_products(m: int, n: int, dtype: Any = np.float64) -> float:
    """||fl(Q^H Q) - Q^H Q||_F for an m x n Q with columns of norm about 1, the products
    accumulated in ``dtype``: each entry errs by at most gamma_m |q_i|^T |q_j| <= gamma_m,
    gamma_m = m u / (1 - m u), so the Frobenius norm by at most n gamma_m.

    Source: Higham, Accuracy and Stability of Numerical Algorithms, 2nd ed. 2002, eq. (3.5)
    (inner products) and Lemma 3.1. A worst-case bound, no safety factor needed.
    """
    mu = m * unit_roundoff(dtype)
    return n * mu / (1 - mu)

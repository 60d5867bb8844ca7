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

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

# Common-practice safety factor in front of the published O(.) shapes below.
SAFETY = 10.0


def unit_roundoff(dtype: Any = np.float64) -> float:
    """u of a dtype's real part (half its machine epsilon)."""
    return float(np.finfo(np.dtype(dtype)).eps) / 2


def gamma(k: int, dtype: Any = np.float64) -> float:
    """gamma_k = k u / (1 - k u), the constant of k rounded operations.

    Source: Higham, Accuracy and Stability of Numerical Algorithms, 2nd ed. 2002, Lemma 3.1.
    """
    ku = k * unit_roundoff(dtype)
    return ku / (1 - ku)


def elementwise(operations: int, dtype: Any = np.float64) -> float:
    """Relative difference of two evaluations of one scalar formula of ``operations``
    correctly rounded operations (+ - * / sqrt), in any order: 2 gamma_operations.

    Source: the standard model fl(x op y) = (x op y)(1 + d), |d| <= u, that IEEE 754
    guarantees on every CPU (Higham 2002, sec. 2.2), with Lemma 3.1 for the product of the
    (1 + d) factors. Rigorous; no safety factor.
    """
    return 2 * gamma(operations, dtype)


def inner_products(length: int, dtype: Any = np.float64) -> float:
    """||fl(X^H Y) - X^H Y||_F / (||X||_F ||Y||_F) for inner products of ``length`` terms,
    summed in any order (any BLAS kernel, any number of threads, with or without FMA).

    Source: Higham 2002, sec. 3.1, eq. (3.5) and sec. 3.5, eq. (3.13):
    |fl(X^H Y) - X^H Y| <= gamma_length |X|^H |Y|, with gamma_{length+2} for complex data
    (sec. 3.6; from memory), and || |X|^H |Y| ||_F <= ||X||_F ||Y||_F (Cauchy-Schwarz).
    Rigorous worst case; no safety factor. Two computations of the same product differ by
    at most twice this.
    """
    complex_ = np.dtype(dtype).kind == "c"
    return gamma(max(length, 1) + (2 if complex_ else 0), dtype)


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


def gram_residual(m: int, n: int, dtype: Any = np.float64) -> float:
    """||R^H R - A^H A||_F / ||A||_F^2, both products formed in floating point, for the R of a
    backward-stable QR of an m x n matrix A (the report's ``gram_residual``).

    Source: R is the exact R factor of A + dA with ||dA||_F <= e ||A||_F, e = stable_qr(n)
    (Higham 2002, Thm 19.4), so R^H R - A^H A = dA^H A + A^H dA + dA^H dA; forming A^H A and
    R^H R adds inner_products(m) and inner_products(n) (||R||_F <= (1 + e) ||A||_F). The
    bound also holds column-scaled, ||D^-1 (R^H R - A^H A) D^-1||_F <= this ||A D^-1||_F^2,
    because Householder QR's backward error is columnwise (Higham 2002, Thm 19.4).
    """
    e = stable_qr(n, dtype)
    products = inner_products(m, dtype) + inner_products(n, dtype) * (1 + e) ** 2
    return 2 * e + e * e + products


def cholqr2_published(m: int, n: int, dtype: Any = np.float64) -> float:
    """The published form of CholeskyQR2's bound, 6 (m n u + n (n+1) u), without a margin:
    what rowfold's report states as ``orthogonality_bound`` (a formula to compare with, not
    a tolerance).

    Source: Yamamoto, Nakatsukasa, Yanagisawa, Fukaya, ETNA 44 (2015); the constant 6 is
    from memory (CHECKS.md).
    """
    u = unit_roundoff(dtype)
    return 6 * (m * n * u + n * (n + 1) * u)


def cholqr2(m: int, n: int, dtype: Any = np.float64) -> float:
    """||I - Q^H Q||_F and ||A - QR||_F / ||A||_F of CholeskyQR2 for kappa below about
    u^-1/2 (and of shifted CholeskyQR3 within its range): 6 (m n u + n (n+1) u).

    Source: Yamamoto, Nakatsukasa, Yanagisawa, Fukaya, ETNA 44 (2015); Fukaya, Kannan,
    Nakatsukasa, Yamamoto, Yanagisawa, SISC 42(1) 2020 for sCholQR3. The constant 6 is from
    memory (CHECKS.md), so it is multiplied by SAFETY.
    """
    return SAFETY * cholqr2_published(m, n, dtype)


def cholqr2_columnwise(m: int, n: int, dtype: Any = np.float64) -> float:
    """Columnwise relative backward error of CholeskyQR2 (and of its least-squares solve):
    max_j ||da_j|| / ||a_j|| with A + dA = QR, for A D^-1 (D = column norms) well inside
    CholeskyQR2's range: 2 sqrt(n) times :func:`cholqr2`.

    Source: scaling a column by a power of two scales every rounded operation of the Gram
    product, the Cholesky factorization and the triangular solves exactly, so CholeskyQR2 of
    A gives the same Q as CholeskyQR2 of A P^-1 (P = D with each entry rounded to the nearest
    power of two on a log scale, so within a factor sqrt(2) of D). Applying :func:`cholqr2`'s
    normwise residual bound to A P^-1 (Frobenius norm at most sqrt(2 n)) and scaling back by
    P (at most sqrt(2) D) bounds each column's error relative to its own norm. Our
    derivation, from the exactness of power-of-two scaling in IEEE 754; the solve
    ``R x = Q^H b`` adds a backward-stable triangular solve, covered by SAFETY.
    """
    return 2 * math.sqrt(n) * cholqr2(m, n, dtype)


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


def residual_std(n: int, kappa: float, rhs_over_residual: float, dtype: Any = np.float64) -> float:
    """|s1 - s2| / s2 between the residual norms (or residual SDs) of two backward-stable
    least-squares solutions, where ``rhs_over_residual`` is ||b|| / ||r||.

    Source: | ||r1|| - ||r2|| | <= ||r1 - r2|| (triangle inequality) with
    :func:`residual_vector` for ||r1 - r2|| / ||b||.
    """
    return residual_vector(n, kappa, dtype) * rhs_over_residual


def standard_errors(
    n: int, kappa: float, rhs_over_residual: float, dtype: Any = np.float64
) -> float:
    """Largest relative difference, entry by entry, between the standard errors
    ``s_j = sigma sqrt(C_jj)``, ``C = (A^H A)^-1``, of two backward-stable solutions.

    Source: first-order perturbation of the inverse, dC = -C dG C (Golub & Van Loan, Matrix
    Computations, 4th ed., sec. 2.3.4), with dG = A^H dA + dA^H A: since C e_j = A^+ (A^+)^H
    e_j, |dC_jj| <= 2 ||(A^+)^H e_j|| ||dA|| ||C e_j|| <= 2 kappa (||dA|| / ||A||) C_jj, so
    each s_j moves by at most kappa eta relatively (eta = SAFETY n u per solver, as in
    :func:`lstsq_solution`), plus the relative change of sigma (:func:`residual_std`).
    """
    eta = SAFETY * n * unit_roundoff(dtype)
    return residual_std(n, kappa, rhs_over_residual, dtype) + 2 * eta * max(1.0, kappa)


def inverse_gram(n: int, kappa: float, dtype: Any = np.float64) -> float:
    """||C1 - C2||_2 / ||C2||_2 between two backward-stable computations of
    C = (A^H A)^-1 (for example R^-1 R^-H, and V S^-2 V^H from an SVD of A).

    Source: perturbation of the inverse, ||dC|| / ||C|| <= kappa(G) ||dG|| / ||G|| to first
    order (Golub & Van Loan, 4th ed., sec. 2.3.4), with kappa(A^H A) = kappa^2 and
    ||dG|| <= 2 eta ||A||^2 per computation (eta = SAFETY n u, common practice).
    """
    eta = SAFETY * n * unit_roundoff(dtype)
    return 2 * 2 * eta * max(1.0, kappa) ** 2


def projector(n: int, kappa: float, dtype: Any = np.float64) -> float:
    """max_i |h1_i - h2_i| between two backward-stable computations of the leverages
    h_i = (A A^+)_ii = ||e_i^H Q||^2 (the diagonal of the orthogonal projector onto range(A)).

    Source: ||dP||_2 <= kappa ||dA|| / ||A|| to first order for rank-preserving
    perturbations (Stewart, SIAM Rev. 19(4), 1977; from memory), |dh_i| <= ||dP||_2, and
    forming ||q_i||^2 from a Q with loss of orthogonality :func:`stable_qr` adds that much.
    eta = SAFETY n u per computation (common practice).
    """
    eta = SAFETY * n * unit_roundoff(dtype)
    return 2 * (eta * max(1.0, kappa) + stable_qr(n, dtype))


def triangular_solve(n: int, kappa: float, dtype: Any = np.float64) -> float:
    """||X1 - X2||_F / ||X2||_F between two computations of X = B T^-1 (or T^-1 B) with an
    n x n triangular T of condition ``kappa``: by substitution, or with an explicit inverse.

    Source: substitution is backward stable, (T + dT) x = b with |dT| <= gamma_n |T|
    (Higham 2002, Thm 8.5), and so is a computed triangular inverse up to a small multiple
    (Higham 2002, sec. 14.2); a backward error e gives a forward error kappa e / (1 - kappa e)
    (Higham 2002, Thm 7.2). The multiple n of gamma_n in the componentwise-to-normwise step
    and SAFETY are common practice.
    """
    e = SAFETY * n * gamma(n, dtype) * max(1.0, kappa)
    return 2 * e / (1 - e) if e < 1 else np.inf


def triangular_backward(n: int, dtype: Any = np.float64) -> float:
    """Componentwise backward error of a computed ``X = B T^-1`` (or ``T^-1 B``) for an n x n
    triangular T: each row (column) x of X solves ``x (T + dT) = b`` with ``|dT| <= c |T|``,
    so ``|B - X T| <= c |X| |T|`` entry by entry; this returns c.

    Source: Higham 2002, Thm 8.5 (substitution, any order of the inner sums: c = gamma_n),
    with one more rounding for BLAS kernels that multiply by a computed reciprocal of the
    diagonal instead of dividing (gamma_{n+1}). Complex data: each complex operation errs by
    at most sqrt(2) gamma_4 (division; multiplication sqrt(2) gamma_2), Higham 2002 Lemma 3.5,
    which is below 6 real roundings, so gamma_{6(n+1)} (our reading; rigorous to first order).
    No safety factor.
    """
    steps = n + 1
    return gamma(6 * steps if np.dtype(dtype).kind == "c" else steps, dtype)


@dataclass(frozen=True)
class LstsqErrors:
    """First-order error bounds of one least-squares solve with a columnwise backward error.

    Attributes
    ----------
    coefficients : ndarray (n,)
        Bound on |x_hat_i - x_i| for each coefficient.
    residual_norm : float
        Bound on | ||r_hat|| - ||r|| |.
    inverse_diagonal : ndarray (n,)
        Bound on the relative error of sqrt(C_jj), C = (A^H A)^-1 (the standard error of
        x_j is sigma sqrt(C_jj)).
    root_diagonal : ndarray (n,)
        sqrt(C_jj) itself (not a bound: the scale of an exact fit's standard errors).
    """

    coefficients: np.ndarray
    residual_norm: float
    inverse_diagonal: np.ndarray
    root_diagonal: np.ndarray


def lstsq_columnwise(
    A: np.ndarray,
    b: np.ndarray,
    x: np.ndarray,
    eta: float | None = None,
    dtype: Any = np.float64,
) -> LstsqErrors:
    """Componentwise first-order error bounds of min ||A x - b|| (solution x, residual
    r = b - A x) solved by Householder QR (or TSQR), from A's own singular values and vectors.

    Householder QR least squares is columnwise backward stable: the computed x solves the
    problem for A + dA, b + db with ||da_j|| <= eta ||a_j||, ||db|| <= eta ||b|| (Higham
    2002, Thm 20.3, with eta = gamma~_{mn}; by default ``eta = SAFETY n u``, common practice
    as in :func:`stable_qr`; a method with a larger columnwise backward error passes its
    own ``eta``). Rounding the data to binary and forming ``b - A x`` are errors of the
    same columnwise kind and size. To first order (Higham 2002, sec. 20.1; Björck, Numerical
    Methods for Least Squares Problems, 1996, sec. 1.4),

    - dx = A^+ (db - dA x) + C dA^H r, so |dx_i| <= eta (||e_i^H A^+|| (||b|| + sum_j |x_j|
      ||a_j||) + sum_j |C_ij| ||a_j|| ||r||);
    - dr = (I - A A^+)(db - dA x) - (A^+)^H dA^H r, so ||dr|| <= eta (||b|| + sum_j |x_j|
      ||a_j|| + sqrt(n) ||r|| / sigma_min(A D^-1));
    - dC = -C dG C (see :func:`standard_errors`), so sqrt(C_jj) moves by at most
      eta (|C| d)_j / ||e_j^H A^+|| relatively.

    A^+ and C = (A^H A)^-1 are computed with numpy's SVD of the column-equilibrated
    A D^-1 (D = column norms), which is accurate where A itself is not (NIST's Filip has
    condition 1.8e15 raw and 5e9 equilibrated; van der Sluis 1969).
    """
    A, b, x = (np.asarray(v, dtype=np.float64) for v in (A, b, x))
    r = b - A @ x
    n = A.shape[1]
    if eta is None:
        eta = SAFETY * n * unit_roundoff(dtype)
    d = np.linalg.norm(A, axis=0)
    u_, s, vh = np.linalg.svd(A / d, full_matrices=False)
    pinv = (vh.conj().T / s) @ u_.conj().T / d[:, None]
    inverse = (vh.conj().T / s**2) @ vh / np.outer(d, d)
    rows = np.linalg.norm(pinv, axis=1)
    data = float(np.linalg.norm(b)) + float(np.sum(np.abs(x) * d))
    r_norm = float(np.linalg.norm(r))
    return LstsqErrors(
        coefficients=eta * (rows * data + np.abs(inverse) @ d * r_norm),
        residual_norm=eta * (data + math.sqrt(n) * r_norm / s[-1]),
        inverse_diagonal=eta * (np.abs(inverse) @ d) / rows,
        root_diagonal=rows,
    )


# A certified value printed to 15 significant digits is off by at most half a unit in the
# 15th digit, 5e-15 of its size (NIST StRD certified values; McCullough, The American
# Statistician 52(4), 1998, caps the LRE at 15 for that reason).
CERTIFIED_ROUNDING = 5e-15


def lre_floor(relative_bound: float) -> float:
    """The least log relative error (correct digits) a value within ``relative_bound`` of
    the exact answer scores against a 15-digit certified value: -log10(bound + 5e-15),
    capped at 15 (McCullough 1998). For a certified 0, pass the absolute bound."""
    return min(15.0, -math.log10(relative_bound + CERTIFIED_ROUNDING))


def relative_error(measured: np.ndarray, reference: np.ndarray) -> float:
    """||measured - reference||_F / ||reference||_F (the absolute norm when the reference
    is zero)."""
    measured, reference = np.asarray(measured), np.asarray(reference)
    scale = float(np.linalg.norm(reference))
    diff = float(np.linalg.norm(measured - reference))
    return diff / scale if scale > 0 else diff


def subspace_projector(n: int, kappa: float, dtype: Any = np.float64) -> float:
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


def gram_rounding(m: int, n: int, dtype: Any = np.float64) -> float:
    """||fl(Q^H Q) - Q^H Q||_F for an m x n Q with columns of norm about 1, the products
    accumulated in ``dtype``: each entry errs by at most gamma_m |q_i|^T |q_j| <= gamma_m,
    gamma_m = m u / (1 - m u), so the Frobenius norm by at most n gamma_m.

    Source: Higham, Accuracy and Stability of Numerical Algorithms, 2nd ed. 2002, eq. (3.5)
    (inner products) and Lemma 3.1. A worst-case bound, no safety factor needed.
    """
    mu = m * unit_roundoff(dtype)
    return n * mu / (1 - mu)


def redundancy_total(rows: int, n: int, rank: int, dof: int, block_rows: int) -> float:
    """|sum r_i - f| for redundancy numbers r_i = 1 - h_i whose leverages come from a
    backward-stable Q (f = m' - rank; in exact arithmetic the sum is f, the trace of the
    projector I - H).

    ``sum h_i = trace(U_r^H Q^H Q U_r) = r + <E, U_r U_r^H>_F`` with ``E = Q^H Q - I``, so
    ``|sum h_i - r| <= sqrt(r) ||E||_F`` (Cauchy-Schwarz for the Frobenius inner product),
    and ``||E||_F`` is the loss of orthogonality, :func:`stable_qr` (Higham 2002, Thm 19.4;
    Demmel, Grigori, Hoemmen, Langou 2012). The rounding of the leverages (n (n + 2) u over
    ``||Q||_F^2 = n``), of ``1 - h_i`` (u per row) and of the sums (pairwise within a block,
    compensated across: Higham 2002, sections 4.2 and 4.3) takes ``SAFETY`` (common
    practice).
    """
    u = unit_roundoff()
    summing = (np.log2(max(block_rows, 2)) + 32) * max(dof, 1)
    rounding = SAFETY * u * (n * (n + 2) + rows + summing)
    return float(np.sqrt(rank) * stable_qr(n) + rounding)

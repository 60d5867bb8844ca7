"""Statistical tests of a least-squares adjustment, as survey and calibration teams use them.

Convention (README, "Model tests"). The weights are ``w_i = sigma0^2 / sigma_i^2``: sigma0
(``solve.sigma0``) is the a priori standard deviation of unit weight and sigma_i the a priori
standard deviation of observation i, so ``w_i = 1 / sigma_i^2`` when sigma0 = 1, and
without weights every observation has standard deviation sigma0. ``e = sqrt(w) (b - A x)``
are the weighted residuals, ``h_i`` the leverages (the diagonal of the hat matrix of the
weighted A, rank r) and ``f = m' - r`` the degrees of freedom (m' rows of positive weight).
Under the null hypothesis (the model is right, the errors are normal, independent, with the
stated sigma_i) the formulas below hold exactly.

* **A posteriori variance factor** ``s0^2 = e^T e / f`` (s0: ``residual_std``).
* **Global test of the model**: ``T = f s0^2 / sigma0^2 = e^T e / sigma0^2`` follows
  chi-square with f degrees of freedom; the model passes at significance alpha when
  ``chi2_{alpha/2}(f) <= T <= chi2_{1-alpha/2}(f)`` (two-sided: see :data:`WHY_TWO_SIDED`),
  and the p-value is ``2 min(F(T), 1 - F(T))``. Sources: Koch, Parameter Estimation and
  Hypothesis Testing in Linear Models, 2nd ed., Springer 1999; Teunissen, Testing Theory,
  Delft University Press 2000 (the overall model test); Ghilani, Adjustment Computations,
  6th ed., Wiley 2017 (the two-tailed chi-square test of the reference variance) -- chapter
  places from memory.
* **Redundancy numbers** ``r_i = 1 - h_i``, the diagonal of ``Q_ee W`` for uncorrelated
  observations: observation i's share of the degrees of freedom, ``0 <= r_i <= 1`` and
  ``sum r_i = trace(I - H) = m' - r = f`` (the trace of a projector is its rank). Sources:
  Baarda, A testing procedure for use in geodetic networks, Netherlands Geodetic Commission,
  Publications on Geodesy, New Series 2(5), 1968; Seber & Lee, Linear Regression Analysis,
  2nd ed., Wiley 2003 (traces of projection matrices). A row of weight 0 is not an
  observation of the adjustment (it is out of f): its redundancy number is NaN.
* **Baarda's w-test** (``solve.observation_test: known_sigma0``):
  ``w_i = e_i / (sigma0 sqrt(r_i))`` is standard normal; reject when ``|w_i| > c`` with
  ``c = Phi^-1(1 - alpha0 / 2)`` (3.29 for the common-practice alpha0 = 0.001). Source:
  Baarda 1968.
* **Pope's tau test** (``estimated``, the default): ``tau_i = e_i / (s0 sqrt(r_i))`` (the
  stored ``standardized_residuals``) follows the tau distribution with f degrees of freedom,
  whose quantile comes from Student's t with f - 1: ``tau_c = t sqrt(f) / sqrt(f - 1 + t^2)``,
  ``t = t_{1 - alpha0/2}(f - 1)``. Sources: Pope, The statistics of residuals and the
  detection of outliers, NOAA Technical Report NOS 65 NGS 1, 1976; the tau distribution
  (``tau^2 / f`` is Beta(1/2, (f - 1)/2)): Thompson, Ann. Math. Statist. 6(4), 1935.
* **Externally studentized residuals** (leave-one-out): ``t_i = e_i / (s_(i) sqrt(r_i))``
  with ``s_(i)^2 = (e^T e - e_i^2 / r_i) / (f - 1)`` the variance factor of the adjustment
  without observation i, so one gross error does not inflate its own yardstick; t_i follows
  Student's t with f - 1 degrees of freedom, and ``t_i = tau_i sqrt((f - 1) / (f - tau_i^2))``
  (no second pass). Sources: Belsley, Kuh & Welsch, Regression Diagnostics, Wiley 1980
  ("RSTUDENT"); Cook & Weisberg, Residuals and Influence in Regression, Chapman & Hall 1982,
  section 2.2 (from memory). The tau test and the test on t_i at the same alpha0 flag the
  same observations (t is a monotone function of tau); t_i shows the size of the error.

scipy.stats is imported only when a test is computed (its first import costs about 0.4 s
and 39 MiB).
"""

from __future__ import annotations

import heapq
import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

KNOWN_SIGMA0 = "known_sigma0"
ESTIMATED = "estimated"
WORST_ROWS = 20
# Common-practice safety factor in front of the published O(.) error shapes below.
SAFETY = 10.0

WHY_TWO_SIDED = (
    "two-sided, the common practice in network adjustment: a variance factor far below "
    "sigma0^2 is a finding too (a priori standard deviations too pessimistic, or "
    "correlated or duplicated observations), not only one far above (a blunder, a wrong "
    "model or optimistic sigma_i)"
)
GLOBAL_SOURCE = (
    "T = e^T W e / sigma0^2 ~ chi-square(f): Koch, Parameter Estimation and Hypothesis "
    "Testing in Linear Models, 2nd ed. 1999; Teunissen, Testing Theory, 2000; Ghilani, "
    "Adjustment Computations, 6th ed. 2017"
)
OBSERVATION_TESTS = {
    KNOWN_SIGMA0: {
        "name": "w-test (Baarda 1968), sigma0 known",
        "statistic": "w_i = e_i / (sigma0 sqrt(r_i))",
        "distribution": "standard normal, two-sided",
        "source": "Baarda, A testing procedure for use in geodetic networks, Netherlands "
        "Geodetic Commission, Publications on Geodesy, New Series 2(5), 1968",
    },
    ESTIMATED: {
        "name": "tau test (Pope 1976), a posteriori s0",
        "statistic": "tau_i = e_i / (s0 sqrt(r_i))",
        "distribution": "tau with f degrees of freedom, two-sided: "
        "tau_c = t sqrt(f) / sqrt(f - 1 + t^2), t = t_{1 - alpha/2}(f - 1)",
        "source": "Pope, The statistics of residuals and the detection of outliers, NOAA "
        "Technical Report NOS 65 NGS 1, 1976; Thompson, Ann. Math. Statist. 6(4), 1935",
    },
}


def _special() -> Any:
    """scipy.special, imported on first use. The distributions below use the standard
    identities for chi-square, normal and Student t on its functions; scipy.stats itself
    costs about 0.6 s to import, a tiny job's largest single cost (measured)."""
    from scipy import special

    return special


def _per_rhs(values: np.ndarray, rhs_1d: bool) -> Any:
    """A number for a 1-D rhs, a list (one per column) for a 2-D rhs."""
    items = [v.item() if isinstance(v, np.generic) else v for v in np.asarray(values).tolist()]
    return items[0] if rhs_1d else items


# ---------------------------------------------------------------- critical values


def chi_square_bounds(dof: int, alpha: float) -> tuple[float, float]:
    """``(chi2_{alpha/2}(f), chi2_{1-alpha/2}(f))``: the two-sided acceptance region of T
    (the quantile as ``2 P^-1(f/2, p)``, the regularized incomplete gamma's inverse)."""
    special = _special()
    lower = 2 * special.gammaincinv(dof / 2, alpha / 2)
    return float(lower), float(special.chdtri(dof, alpha / 2))


def chi_square_p_value(statistic: np.ndarray, dof: int) -> np.ndarray:
    """Two-sided p-value ``min(1, 2 min(F(T), 1 - F(T)))`` of chi-square(f); F is 0 (and
    1 - F is 1) at T <= 0, and NaN stays NaN."""
    special = _special()
    t = np.asarray(statistic, dtype=float)
    inside = np.where(t > 0, t, 0.0)
    cdf = np.where(t > 0, special.chdtr(dof, inside), 0.0)
    sf = np.where(t > 0, special.chdtrc(dof, inside), 1.0)
    tails = np.where(np.isnan(t), np.nan, np.minimum(cdf, sf))
    return np.asarray(np.minimum(1.0, 2.0 * tails))


def normal_critical(alpha: float) -> float:
    """``Phi^-1(1 - alpha/2)``, the two-sided critical value of the w-test."""
    return float(-_special().ndtri(alpha / 2))


def student_critical(alpha: float, dof: int) -> float:
    """``t_{1 - alpha/2}(dof)``, two-sided."""
    return float(-_special().stdtrit(dof, alpha / 2))


def tau_critical(alpha: float, dof: int) -> float:
    """The two-sided critical value of Pope's tau with f = ``dof`` degrees of freedom, from
    Student's t with f - 1: ``t sqrt(f) / sqrt(f - 1 + t^2)``. Needs f >= 2."""
    t = student_critical(alpha, dof - 1)
    return t * math.sqrt(dof) / math.sqrt(dof - 1 + t * t)


# ---------------------------------------------------------------- the global test


@dataclass(frozen=True)
class ModelTest:
    """The global chi-square test of the model, one per right-hand side.

    Attributes
    ----------
    sigma0, alpha : float
        A priori standard deviation of unit weight; significance level.
    dof : int
        f, the degrees of freedom.
    variance_factor : ndarray (k,)
        s0^2, the a posteriori variance factor.
    statistic : ndarray (k,)
        ``T = f s0^2 / sigma0^2``.
    lower, upper : float
        The chi-square(f) quantiles at alpha/2 and 1 - alpha/2.
    p_value : ndarray (k,)
        Two-sided.
    """

    sigma0: float
    alpha: float
    dof: int
    variance_factor: np.ndarray
    statistic: np.ndarray
    lower: float
    upper: float
    p_value: np.ndarray

    @property
    def passed(self) -> np.ndarray:
        """Per rhs: T inside ``[lower, upper]`` (a NaN statistic does not pass)."""
        return np.asarray((self.statistic >= self.lower) & (self.statistic <= self.upper))

    def as_dict(self, rhs_1d: bool) -> dict[str, Any]:
        """The report's ``model_test``."""
        s0 = np.sqrt(self.variance_factor)
        return {
            "evaluated": True,
            "reason": None,
            "test": "global chi-square test of the variance factor",
            "alternative": "two-sided",
            "why_two_sided": WHY_TWO_SIDED,
            "sigma0": self.sigma0,
            "a_priori_variance_factor": self.sigma0**2,
            "variance_factor": _per_rhs(self.variance_factor, rhs_1d),
            "s0": _per_rhs(s0, rhs_1d),
            "ratio": _per_rhs(self.variance_factor / self.sigma0**2, rhs_1d),
            "degrees_of_freedom": self.dof,
            "statistic": _per_rhs(self.statistic, rhs_1d),
            "formula": "T = f s0^2 / sigma0^2 = e^T W e / sigma0^2",
            "distribution": f"chi-square with {self.dof} degrees of freedom",
            "alpha": self.alpha,
            "lower": self.lower,
            "upper": self.upper,
            "p_value": _per_rhs(self.p_value, rhs_1d),
            "passed": _per_rhs(self.passed, rhs_1d),
            "source": GLOBAL_SOURCE,
        }


def global_test(residual_norm: np.ndarray, dof: int, sigma0: float, alpha: float) -> ModelTest:
    """The global test from the residual norms ``||e||`` (per rhs) and f >= 1."""
    norms = np.asarray(residual_norm, dtype=float).reshape(-1)
    with np.errstate(over="ignore", under="ignore"):  # e.g. A scaled by 1e160: T is inf
        statistic = (norms / sigma0) ** 2
        variance_factor = (norms / math.sqrt(dof)) ** 2
    lower, upper = chi_square_bounds(dof, alpha)
    p_value = chi_square_p_value(statistic, dof)
    return ModelTest(sigma0, alpha, dof, variance_factor, statistic, lower, upper, p_value)


def global_test_unavailable(has_solution: bool, dof: int, complex_data: bool) -> str | None:
    """Why the global test cannot be evaluated, or None when it can."""
    if not has_solution:
        return "no right-hand side (input.rhs), so there is no adjustment to test"
    if dof < 1:
        return f"no degrees of freedom (f = {dof}): the data fit exactly, nothing to test"
    if complex_data:
        return "complex data: the chi-square test here assumes real normal errors"
    return None


def unavailable(alpha: float, sigma0: float, reason: str) -> dict[str, Any]:
    """The report's form of a test that was not evaluated."""
    return {"evaluated": False, "reason": reason, "alpha": alpha, "sigma0": sigma0}


# ---------------------------------------------------------------- per observation


def redundancy_numbers(leverage: np.ndarray, weights: np.ndarray | None) -> np.ndarray:
    """``r_i = 1 - h_i`` in float64, clipped to [0, 1] (rounding can put h_i a few u above
    1); NaN for rows of weight 0, which are not observations of the adjustment."""
    r = np.clip(1.0 - np.asarray(leverage, dtype=np.float64), 0.0, 1.0)
    if weights is not None:
        r = np.where(np.asarray(weights) > 0, r, np.nan)
    return np.asarray(r)


def redundancy_resolution(cols: int, scaled_condition: float, dtype: Any) -> float:
    """The smallest redundancy number the computation resolves: a computed r_i at or below
    this may be 0 (an uncontrolled observation, e.g. a spur line in a levelling network),
    and no test statistic is formed for it.

    Each leverage errs by at most ``||H - H~||_2 = O(n u kappa)`` (the sin-theta theorem,
    Wedin, BIT 12 (1972), with the backward error O(n u) of Householder QR, Higham 2002
    Thm 19.4), kappa the condition of the column-equilibrated factor (leverages do not
    depend on column scaling); ``SAFETY n u kappa`` is common practice.
    """
    u = float(np.finfo(np.dtype(dtype)).eps) / 2
    kappa = scaled_condition if math.isfinite(scaled_condition) else 1.0
    return min(1.0, SAFETY * cols * u * max(1.0, kappa))


def standardized(
    residuals: np.ndarray, redundancy: np.ndarray, scale: np.ndarray, resolution: float
) -> np.ndarray:
    """``e_i / (scale sqrt(r_i))`` (rows x k; scale per rhs: sigma0 or s0); NaN where r_i is
    NaN (weight 0) or at most ``resolution`` (uncontrolled), or the scale is 0."""
    spare = np.where(redundancy > resolution, redundancy, np.nan)
    scale = np.asarray(scale, dtype=float).reshape(-1)
    safe = np.where(scale > 0, scale, np.nan)
    return np.asarray(np.real(residuals) / (np.sqrt(spare)[:, None] * safe[None, :]))


def externally_studentized(tau: np.ndarray, dof: int) -> np.ndarray:
    """``t_i = tau_i sqrt((f - 1) / (f - tau_i^2))``: the residual studentized by the s0 of
    the adjustment without observation i. +-inf when the row holds all of e^T e (rounding
    can put tau_i^2 at f); NaN where tau is NaN or f < 2."""
    if dof < 2:
        return np.full(np.shape(tau), np.nan)
    rest = np.clip(dof - tau * tau, 0.0, None)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.asarray(tau * np.sqrt((dof - 1) / rest))


@dataclass(frozen=True)
class ObservationTest:
    """The per-observation test chosen by ``solve.observation_test``.

    Attributes
    ----------
    kind : str
        ``known_sigma0`` (w-test) or ``estimated`` (tau test).
    alpha : float
        Significance level per observation (``solve.alpha_observation``).
    dof : int
        f.
    scale : ndarray (k,)
        The yardstick per rhs: sigma0 for the w-test, s0 for the tau test.
    critical_value : float
        ``|statistic|`` above this rejects the observation.
    resolution : float
        Redundancy numbers at or below this are uncontrolled (not tested).
    """

    kind: str
    alpha: float
    dof: int
    scale: np.ndarray
    critical_value: float
    resolution: float

    def statistic(self, residuals: np.ndarray, redundancy: np.ndarray) -> np.ndarray:
        """The test statistic of each row and rhs (NaN where not testable)."""
        return standardized(residuals, redundancy, self.scale, self.resolution)

    def description(self) -> dict[str, Any]:
        """What the report says about the test besides its outcome."""
        return {
            "test": self.kind,
            **OBSERVATION_TESTS[self.kind],
            "alpha": self.alpha,
            "alpha_note": "per observation; 0.001 is the common practice in survey networks",
            "degrees_of_freedom": self.dof,
            "critical_value": self.critical_value,
            "redundancy_resolution": self.resolution,
        }


def observation_test(
    kind: str,
    alpha: float,
    dof: int,
    sigma0: float,
    s0: np.ndarray,
    resolution: float,
) -> ObservationTest | str:
    """The configured test, or why it cannot be evaluated (a text)."""
    if kind == KNOWN_SIGMA0:
        if dof < 1:
            return f"no degrees of freedom (f = {dof}): no residual can be tested"
        scale = np.full(np.size(s0), float(sigma0))
        return ObservationTest(kind, alpha, dof, scale, normal_critical(alpha), resolution)
    if dof < 2:
        return (
            f"the tau test needs f >= 2 degrees of freedom, this adjustment has {dof}; "
            "solve.observation_test: known_sigma0 tests with the a priori sigma0"
        )
    scale = np.asarray(s0, dtype=float).reshape(-1)
    return ObservationTest(kind, alpha, dof, scale, tau_critical(alpha, dof), resolution)


@dataclass
class ObservationTally:
    """Running counts and the worst rows of the per-observation test, block by block (its
    size does not depend on the number of rows).

    ``test`` None keeps only the redundancy figures (the test could not be evaluated). The
    redundancy numbers are summed block by block with Neumaier's compensated summation
    (Higham 2002, section 4.3), so the total errs by about u times the sum plus the
    rounding of each block's pairwise sum.
    """

    rhs: int
    resolution: float
    test: ObservationTest | None
    exceeding: np.ndarray = field(init=False)
    tested: np.ndarray = field(init=False)
    observations: int = 0
    zero_weight: int = 0
    uncontrolled: int = 0
    smallest: float = math.inf
    total: float = 0.0
    compensation: float = 0.0
    worst: list[tuple[float, int, int, dict[str, float]]] = field(default_factory=list)

    def __post_init__(self) -> None:
        self.exceeding = np.zeros(self.rhs, dtype=np.int64)
        self.tested = np.zeros(self.rhs, dtype=np.int64)

    @property
    def redundancy_total(self) -> float:
        """The sum of the redundancy numbers of every row of positive weight."""
        return self.total + self.compensation

    def _add_to_total(self, value: float) -> None:
        """Neumaier's compensated addition."""
        total = self.total + value
        if abs(self.total) >= abs(value):
            self.compensation += (self.total - total) + value
        else:
            self.compensation += (value - total) + self.total
        self.total = total

    def add(
        self,
        start: int,
        residuals: np.ndarray,
        redundancy: np.ndarray,
        tau: np.ndarray,
        studentized: np.ndarray,
    ) -> None:
        """Count one block (rows starting at ``start``) and keep its worst rows."""
        defined = np.isfinite(redundancy)
        self.observations += int(np.count_nonzero(defined))
        self.zero_weight += int(redundancy.size - np.count_nonzero(defined))
        self.uncontrolled += int(np.count_nonzero(defined & (redundancy <= self.resolution)))
        if np.any(defined):
            self.smallest = min(self.smallest, float(np.min(redundancy[defined])))
            self._add_to_total(float(np.sum(redundancy[defined])))
        if self.test is None:
            return
        statistic = self.test.statistic(residuals, redundancy)
        size = np.abs(statistic)
        self.tested += np.sum(np.isfinite(size), axis=0)
        self.exceeding += np.sum(size > self.test.critical_value, axis=0)
        self._keep_worst(start, size, statistic, residuals, redundancy, tau, studentized)

    def _keep_worst(
        self,
        start: int,
        size: np.ndarray,
        statistic: np.ndarray,
        residuals: np.ndarray,
        redundancy: np.ndarray,
        tau: np.ndarray,
        studentized: np.ndarray,
    ) -> None:
        ranked = np.nan_to_num(size, nan=-1.0)
        for flat in np.argsort(ranked, axis=None)[::-1][:WORST_ROWS]:
            row, col = divmod(int(flat), self.rhs)
            if np.isnan(size[row, col]):
                break  # NaN ranks last: the rest are not testable
            entry = {
                "residual": float(np.real(residuals[row, col])),
                "redundancy": float(redundancy[row]),
                "statistic": float(statistic[row, col]),
                "tau": float(tau[row, col]),
                "studentized": float(studentized[row, col]),
            }
            item = (float(size[row, col]), -(start + row), col, entry)
            if len(self.worst) < WORST_ROWS:
                heapq.heappush(self.worst, item)
            elif item[:3] > self.worst[0][:3]:
                heapq.heapreplace(self.worst, item)

    def worst_rows(self) -> list[dict[str, Any]]:
        """The rows of largest |statistic|, largest first."""
        ordered = sorted(self.worst, key=lambda item: item[:3], reverse=True)
        return [
            {
                "row": -negative_row,
                "rhs": col,
                **entry,
                "exceeds": bool(self.test is not None and size > self.test.critical_value),
            }
            for size, negative_row, col, entry in ordered
        ]

    def redundancy_report(self, dof: int, bound: float) -> dict[str, Any]:
        """The report's ``redundancy``: the total against f, and what was not tested."""
        total = self.redundancy_total
        return {
            "total": total,
            "degrees_of_freedom": dof,
            "difference": total - dof,
            "bound": bound,
            "observations": self.observations,
            "mean": total / self.observations if self.observations else None,
            "smallest": self.smallest if self.observations else None,
            "uncontrolled": self.uncontrolled,
            "resolution": self.resolution,
            "zero_weight_rows": self.zero_weight,
            "formula": "r_i = 1 - h_i; over the rows of positive weight sum r_i = f = m' - rank",
            "stored_as": "redundancy (m rows; NaN for rows of weight 0, which are out of f)",
            "source": "Baarda 1968; Seber & Lee, Linear Regression Analysis, 2nd ed. 2003 "
            "(the trace of a projector is its rank)",
        }

    def test_report(self, rhs_1d: bool) -> dict[str, Any]:
        """The report's ``observation_test`` (the test must have been evaluated)."""
        assert self.test is not None
        expected = self.tested * self.test.alpha
        return {
            "evaluated": True,
            "reason": None,
            **self.test.description(),
            "tested": _per_rhs(self.tested, rhs_1d),
            "exceeding": _per_rhs(self.exceeding, rhs_1d),
            "expected_false_alarms": _per_rhs(expected, rhs_1d),
            "uncontrolled": self.uncontrolled,
            "worst": self.worst_rows(),
            "studentized_note": "studentized: the externally studentized (leave-one-out) "
            "residual t_i, Student's t with f - 1 degrees of freedom; stored as "
            "studentized_residuals",
        }


def redundancy_total_bound(
    rows: int, cols: int, rank: int, dof: int, loss_of_orthogonality: float, block_rows: int
) -> float:
    """How far the computed ``sum r_i`` may lie from f (in float64 arithmetic).

    ``sum h_i = trace(U_r^H Q^H Q U_r)``, so with ``E = Q^H Q - I`` the sum errs from the
    rank by ``|<E, U_r U_r^H>_F| <= sqrt(r) ||E||_F`` (Cauchy-Schwarz for the Frobenius
    inner product); ``||E||_F`` is the measured loss of orthogonality plus the rounding of
    the measured ``Q^H Q``, at most ``n gamma_m`` (Higham 2002, eq. (3.5), Lemma 3.1). The
    rounding of the leverages themselves (``n (n + 2) u`` over ``||Q||_F^2 = n``), of
    ``1 - h_i`` (u per row) and of the sums (pairwise within a block, compensated across,
    Higham 2002 section 4) take ``SAFETY`` (common practice).
    """
    u = float(np.finfo(np.float64).eps) / 2
    mu = rows * u
    inner = cols * mu / (1 - mu) if mu < 1 else math.inf
    orthogonality = math.sqrt(max(rank, 0)) * (loss_of_orthogonality + inner)
    summing = (math.log2(max(block_rows, 2)) + 32) * max(dof, 1)
    rounding = SAFETY * u * (cols * (cols + 2) + rows + summing)
    return orthogonality + rounding

r"""No-signalling: projecting finite-data frequencies, and testing the marginals.

Frequencies ``f = N[x,y,a,b] / N_xy`` of a finite run signal slightly even for a physical
source: Alice's marginal at setting ``x`` differs a little between Bob's settings.  The
visibility LP needs a no-signalling point, so we project first.

Projection (count-weighted least squares)
-----------------------------------------
.. math::
    \hat p = \arg\min_p \sum_{x,y} N_{xy} \sum_{a,b} (p_{xyab} - f_{xyab})^2
    \quad\text{s.t.}\quad p \ge 0,\ \sum_{ab} p_{xyab} = 1,\ p \text{ no-signalling},

a convex QP (diagonal Hessian) solved by HiGHS.  The weight ``N_xy`` makes well-sampled
setting pairs move least; it does not depend on ``f``, so with inactive bounds the projection
is the fixed linear map :meth:`NoSignallingProjector.linear_map_transpose` uses -- that is
what the delta method of :mod:`labwatch.polytope.uncertainty` differentiates.  (Maximum
likelihood would weight by ``N_xy / p``; for the small adjustments of a working experiment
the two agree to first order only when the frequencies are nearly uniform, and we prefer the
fixed, data-independent weights.)

Test (G-test on the marginals)
------------------------------
For each Alice setting ``x`` the table ``O[y, a] = sum_b N[x, y, a, b]`` is tested for
homogeneity across ``y`` with the likelihood-ratio statistic
``G = 2 sum O ln(O / E)``, ``E[y, a] = (row total)(column total)/(table total)``, with
``(rows - 1)(columns - 1)`` degrees of freedom after dropping empty rows and columns; the
tables of different ``x`` use disjoint data, so their ``G`` and degrees of freedom add.  Bob's
side is the same with the roles swapped.  The two sides share data, so they are combined by
Bonferroni: ``p = min(1, 2 min(p_A, p_B))``.  Under no-signalling the per-side p-values are
asymptotically uniform and the combined one is conservative.  The chi-square approximation
wants expected counts of about 5 or more (common practice, no source).
"""

from __future__ import annotations

from dataclasses import dataclass

import highspy
import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from labwatch.polytope._highs import as_index, new_model, solve_checked
from labwatch.scenario import Scenario, ScenarioError

__all__ = [
    "NoSignallingProjection",
    "NoSignallingProjector",
    "NoSignallingTest",
    "no_signalling_constraints",
    "no_signalling_test",
    "project_no_signalling",
]


def no_signalling_constraints(
    scenario: Scenario,
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Independent linear constraints ``A p = b`` of normalised no-signalling tensors.

    Rows: normalisation of every setting pair; ``p_A(a|x, y) = p_A(a|x, 0)`` for ``y >= 1``,
    ``a < d_A - 1``; and Bob's equivalent.  ``p`` is flattened row-major ``[x, y, a, b]``.
    Returns ``A`` (dense, shape ``(k, m_A m_B d_A d_B)``) and ``b``.
    """
    m_a, m_b, d_a, d_b = scenario.shape
    idx = np.arange(scenario.size).reshape(scenario.shape)
    rows: list[NDArray[np.float64]] = []
    rhs: list[float] = []
    for x in range(m_a):
        for y in range(m_b):
            r = np.zeros(scenario.size)
            r[idx[x, y].ravel()] = 1.0
            rows.append(r)
            rhs.append(1.0)
    for x in range(m_a):
        for y in range(1, m_b):
            for a in range(d_a - 1):
                r = np.zeros(scenario.size)
                r[idx[x, y, a, :]] = 1.0
                r[idx[x, 0, a, :]] = -1.0
                rows.append(r)
                rhs.append(0.0)
    for y in range(m_b):
        for x in range(1, m_a):
            for b in range(d_b - 1):
                r = np.zeros(scenario.size)
                r[idx[x, y, :, b]] = 1.0
                r[idx[0, y, :, b]] = -1.0
                rows.append(r)
                rhs.append(0.0)
    return np.array(rows), np.array(rhs)


@dataclass(frozen=True)
class NoSignallingProjection:
    """Frequencies and their count-weighted least-squares projection.

    Attributes
    ----------
    probabilities : ndarray, shape (m_A, m_B, d_A, d_B)
        The projection ``p_hat``: non-negative, normalised, no-signalling (to ~1e-9).
    frequencies : ndarray, shape (m_A, m_B, d_A, d_B)
        ``N[x,y,a,b] / N_xy``.
    trials : ndarray of int, shape (m_A, m_B)
        ``N_xy``.
    weighted_distance : float
        ``sum N_xy (p_hat - f)^2`` at the optimum (dimensionless, in counts).
    max_adjustment : float
        ``max |p_hat - f|``.
    status : str
        HiGHS model status of the QP.
    """

    probabilities: NDArray[np.float64]
    frequencies: NDArray[np.float64]
    trials: NDArray[np.int64]
    weighted_distance: float
    max_adjustment: float
    status: str

    def __post_init__(self) -> None:
        for name in ("probabilities", "frequencies", "trials"):
            arr = np.array(getattr(self, name), copy=True)
            arr.setflags(write=False)
            object.__setattr__(self, name, arr)


class NoSignallingProjector:
    """Count-weighted projection onto the no-signalling set for fixed trial numbers.

    The QP is built once for the weights ``N_xy``; :meth:`project` changes only the linear
    cost, so bootstrap replicates with the same ``N_xy`` reuse the model.

    Parameters
    ----------
    scenario : Scenario
    trials : array_like of int, shape (m_A, m_B)
        ``N_xy``; every setting pair needs at least one trial.
    """

    def __init__(self, scenario: Scenario, trials: ArrayLike) -> None:
        n = np.asarray(trials)
        if n.shape != scenario.shape[:2]:
            raise ScenarioError(f"trials have shape {n.shape}, scenario needs {scenario.shape[:2]}")
        if np.any(n <= 0):
            bad = tuple(int(i) for i in np.argwhere(n <= 0)[0])
            raise ScenarioError(f"setting pair {bad} has no trials; cannot project")
        self.scenario = scenario
        self.trials = n.astype(np.int64)
        size = scenario.size
        # Weights scaled to mean 1 keep the QP well conditioned for any run length.
        w = np.broadcast_to(
            (self.trials / self.trials.mean())[:, :, None, None], scenario.shape
        ).ravel()
        self._w = w.astype(np.float64)
        a_mat, b_vec = no_signalling_constraints(scenario)
        self._a = a_mat
        h = new_model()
        h.setOptionValue("primal_feasibility_tolerance", 1e-10)
        h.setOptionValue("dual_feasibility_tolerance", 1e-10)
        # The Hessian is positive definite (all N_xy > 0): HiGHS' default regularisation
        # (1e-7) would only bias the solution.
        h.setOptionValue("qp_regularization_value", 1e-12)
        h.addCols(
            size,
            np.zeros(size),
            np.zeros(size),
            np.ones(size),
            0,
            as_index(np.zeros(size)),
            as_index([]),
            np.empty(0),
        )
        csr_start, csr_index, csr_value = [], [], []
        pos = 0
        for row in a_mat:
            nz = np.flatnonzero(row)
            csr_start.append(pos)
            csr_index.append(nz)
            csr_value.append(row[nz])
            pos += nz.size
        h.addRows(
            a_mat.shape[0],
            b_vec,
            b_vec,
            pos,
            as_index(csr_start),
            as_index(np.concatenate(csr_index)),
            np.concatenate(csr_value),
        )
        h.passHessian(
            size,
            size,
            highspy.HessianFormat.kTriangular,
            as_index(np.arange(size + 1)),
            as_index(np.arange(size)),
            2.0 * self._w,
        )
        self._h = h

    def project(self, counts: ArrayLike) -> NoSignallingProjection:
        """Project the frequencies of ``counts`` (whose ``N_xy`` must match ``trials``)."""
        n = self.scenario.check_counts(counts)
        totals = n.sum(axis=(2, 3))
        if not np.array_equal(totals, self.trials):
            raise ScenarioError(
                "counts have trials per setting pair "
                f"{totals.ravel().tolist()}, projector was built for {self.trials.ravel().tolist()}"
            )
        return self.project_frequencies(n / totals[:, :, None, None])

    def project_frequencies(self, frequencies: ArrayLike) -> NoSignallingProjection:
        """Project a tensor of frequencies with this projector's weights ``N_xy``.

        ``frequencies`` need not be normalised (the constraints normalise the result).
        """
        f = np.asarray(frequencies, dtype=np.float64)
        if f.shape != self.scenario.shape or not np.all(np.isfinite(f)):
            raise ScenarioError(
                f"frequencies must be finite with shape {self.scenario.shape}, got {f.shape}"
            )
        h = self._h
        size = self.scenario.size
        h.changeColsCost(size, as_index(np.arange(size)), -2.0 * self._w * f.ravel())
        status = solve_checked(h, "no-signalling projection QP")
        p = np.clip(np.asarray(h.getSolution().col_value), 0.0, None).reshape(self.scenario.shape)
        p /= p.sum(axis=(2, 3), keepdims=True)
        diff = p - f
        return NoSignallingProjection(
            probabilities=p,
            frequencies=f,
            trials=self.trials,
            weighted_distance=float(np.sum(self.trials[:, :, None, None] * diff**2)),
            max_adjustment=float(np.max(np.abs(diff))),
            status=status,
        )

    def linear_map_transpose(self, coefficients: NDArray[np.float64]) -> NDArray[np.float64]:
        """``Pi^T beta`` for the projection's linear part ``Pi`` (bounds inactive).

        ``Pi = I - W^-1 A^T (A W^-1 A^T)^-1 A`` is the ``W``-orthogonal projection onto the
        no-signalling tangent space, so ``beta . (Pi df) = (Pi^T beta) . df``.
        """
        beta = np.asarray(coefficients, dtype=np.float64).ravel()
        winv = 1.0 / self._w
        a = self._a
        gram = (a * winv[None, :]) @ a.T
        corr = a.T @ np.linalg.solve(gram, a @ (winv * beta))
        return (beta - corr).reshape(self.scenario.shape)


def project_no_signalling(counts: ArrayLike) -> NoSignallingProjection:
    """Count-weighted least-squares projection of ``counts``' frequencies (see module doc).

    Parameters
    ----------
    counts : array_like of int, shape (m_A, m_B, d_A, d_B)

    Examples
    --------
    >>> import numpy as np
    >>> counts = np.array([[[[40, 10], [12, 38]], [[35, 25], [20, 20]]]])  # 1 x 2 settings
    >>> proj = project_no_signalling(counts)
    >>> proj.probabilities.sum(axis=3).round(4)  # Alice's marginal no longer depends on y
    array([[[0.55, 0.45],
            [0.55, 0.45]]])
    """
    arr = np.asarray(counts)
    scenario = Scenario.from_shape(arr.shape)
    n = scenario.check_counts(arr)
    return NoSignallingProjector(scenario, n.sum(axis=(2, 3))).project(n)


@dataclass(frozen=True)
class NoSignallingTest:
    """G-test of no-signalling on the marginals.

    Attributes
    ----------
    statistic : float
        ``G_A + G_B``.
    dof : int
        ``dof_A + dof_B``.
    pvalue : float
        Bonferroni combination ``min(1, 2 min(pvalue_a, pvalue_b))`` (conservative).
    statistic_a, dof_a, pvalue_a : float, int, float
        Alice's marginals homogeneous across Bob's settings.
    statistic_b, dof_b, pvalue_b : float, int, float
        Bob's marginals homogeneous across Alice's settings.
    """

    statistic: float
    dof: int
    pvalue: float
    statistic_a: float
    dof_a: int
    pvalue_a: float
    statistic_b: float
    dof_b: int
    pvalue_b: float

    def __str__(self) -> str:
        return f"no-signalling G = {self.statistic:.3f} (dof {self.dof}), p = {self.pvalue:.3g}"


def _g_homogeneity(tables: NDArray[np.int64]) -> tuple[float, int]:
    """Summed G statistic and degrees of freedom of a stack of tables ``(k, rows, cols)``."""
    g_total, dof_total = 0.0, 0
    for table in tables:
        t = table[table.sum(axis=1) > 0][:, table.sum(axis=0) > 0].astype(np.float64)
        if t.shape[0] < 2 or t.shape[1] < 2:
            continue
        expected = t.sum(axis=1, keepdims=True) * t.sum(axis=0, keepdims=True) / t.sum()
        pos = t > 0
        g_total += 2.0 * float(np.sum(t[pos] * np.log(t[pos] / expected[pos])))
        dof_total += (t.shape[0] - 1) * (t.shape[1] - 1)
    return g_total, dof_total


def no_signalling_test(counts: ArrayLike) -> NoSignallingTest:
    """G-test that each party's marginals do not depend on the other's setting.

    Parameters
    ----------
    counts : array_like of int, shape (m_A, m_B, d_A, d_B)

    Returns
    -------
    NoSignallingTest
        A small ``pvalue`` means the data signal: a setting leaks to the other side, the
        settings drift with time, or the outcome labels are mixed up.
    """
    arr = np.asarray(counts)
    n = Scenario.from_shape(arr.shape).check_counts(arr)
    g_a, dof_a = _g_homogeneity(n.sum(axis=3))  # per x: table [y, a]
    g_b, dof_b = _g_homogeneity(np.transpose(n.sum(axis=2), (1, 0, 2)))  # per y: [x, b]
    p_a = float(stats.chi2.sf(g_a, dof_a)) if dof_a > 0 else 1.0
    p_b = float(stats.chi2.sf(g_b, dof_b)) if dof_b > 0 else 1.0
    return NoSignallingTest(
        statistic=g_a + g_b,
        dof=dof_a + dof_b,
        pvalue=min(1.0, 2.0 * min(p_a, p_b)),
        statistic_a=g_a,
        dof_a=dof_a,
        pvalue_a=p_a,
        statistic_b=g_b,
        dof_b=dof_b,
        pvalue_b=p_b,
    )

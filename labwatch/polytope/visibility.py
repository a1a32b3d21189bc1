r"""White-noise visibility: how much noise the data stand before they become local.

The linear program
------------------
Let ``p`` be a no-signalling tensor, ``n`` the noise (uniform ``1/(d_A d_B)`` by default) and
``D_lambda`` the deterministic vertices of the local polytope.  The visibility is

.. math:: v^* = \max \{ v : v p + (1 - v) n \in \mathrm{conv}\{D_\lambda\} \}.

Dividing the mixture by ``v`` and writing ``q_lambda = w_lambda / v``, ``t = (1 - v) / v``
turns it into a problem whose data sit only in the right-hand side:

.. math::
    \min t \quad \text{s.t.} \quad \sum_\lambda q_\lambda C(D_\lambda) - t\, C(n) = C(p),
    \quad q \ge 0, \quad t \ge t_\min = 1/v_\max - 1,

with ``C`` the Collins-Gisin coordinates (:mod:`labwatch.polytope.coordinates`; they drop the
redundant rows of the full tensor so the constraint matrix has full row rank).  Then
``v^* = 1 / (1 + t^*)``.  Because ``p`` enters only the RHS, a new data set keeps the optimal
basis dual feasible and HiGHS' dual simplex restarts from it: a live refresh is a few pivots
(measured by benchmarks/bench_polytope.py: about 0.5-2 ms for two settings and up to five
outcomes, or 3 x 3 settings and outcomes, on a 2-core machine).
``v_max`` caps ``v`` for data very close to the noise (``v^* = inf`` at ``p = n``); a result
at the cap has ``capped=True``.

The dual and the certificate
----------------------------
The dual is ``max y . C(p) + mu t_min`` subject to ``y . C(D_lambda) <= 0`` for every vertex
and ``-y . C(n) + mu = 1``, ``mu >= 0``.  Away from the cap ``mu = 0``, so ``F(p) = y . C(p)``
is a Bell functional with ``F(D) <= 0`` on the local polytope, ``F(n) = -1`` and
``F(p) = t^*``.  We report it shifted and scaled as the certificate

.. math:: I(p) = \frac{F(p) + c}{c}, \qquad c = -F(n),

so that **white noise scores 0, the local bound is 1 and the data score** ``I(p) = 1 / v^*``:
``v^* < 1`` exactly when the data violate ``I <= 1``.  Its coefficients (``M^T y`` plus a
constant) spread each marginal term evenly over the other party's settings.  The shift uses
the exact maximum of ``F`` over the vertices (all columns for enumeration, the pricing oracle
for column generation), so the local bound is 1 up to rounding, not up to the LP tolerance; :class:`labwatch.bell.BellFunctional` recomputes it.

Column generation
-----------------
Above ``max_enumerated_vertices`` vertices the LP keeps only some vertex columns (a restricted
master).  Its duals ``y`` are a functional on the coordinates; the pricing oracle
(:func:`labwatch.polytope.pricing.best_vertices`, exact: enumerate the smaller party, best
response for the other) finds the vertices with the largest ``F(D) = -(reduced cost)``; they
enter the master until none improves it.  Every priced functional ``F`` also proves a bound:
with ``delta = max_D F(D)`` (exact), ``I = (F - F(n)) / (delta - F(n))`` is a valid
inequality (local bound 1, noise 0), so ``v^* <= 1 / I(p)``; the master's own value is a
lower bound (it is a feasible mixture).  We stop when the two meet within ``tolerance``
(relative) or no column improves the master, and report the bound as ``visibility_upper``
and the best ``I`` as the certificate.  Pricing uses a point between the best functional so
far and the master's duals (Wentges smoothing).  The master starts from vertices whose
average is the uniform point and which span the coordinate space (so it is feasible for any
data; a custom noise adds the vertices of its own local model), plus the vertices scoring
best on ``p - noise``.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field

import highspy
import numpy as np
from numpy.typing import ArrayLike, NDArray

from labwatch.bell import BellFunctional
from labwatch.polytope._highs import INF, SolverError, as_index, new_model, solve_checked
from labwatch.polytope.coordinates import (
    cg_dimension,
    functional_from_cg,
    functional_to_cg,
    to_cg,
    vertex_columns,
)
from labwatch.polytope.pricing import best_vertices_both_sides
from labwatch.scenario import Scenario, ScenarioError
from labwatch.strategies import party_strategies, vertex_tensor

__all__ = [
    "DEFAULT_V_MAX",
    "LocalDecomposition",
    "METHODS",
    "MAX_ENUMERATED_VERTICES",
    "NoiseError",
    "SIGNALLING_MODES",
    "SignallingError",
    "VisibilityResult",
    "VisibilitySolver",
    "white_noise_visibility",
]

#: Default cap on the visibility (data within ``1e-6`` of the noise are reported at the cap).
DEFAULT_V_MAX = 1e6
#: Up to this many vertices ``method="auto"`` holds all of them in the LP; beyond, column
#: generation (measured on this project's 2-core machine: column generation already wins on
#: refresh time at 4096 vertices, see benchmarks/bench_polytope.py).
MAX_ENUMERATED_VERTICES = 2_000
#: ``method="enumeration"`` refuses scenarios with more vertices than this (memory).
ENUMERATION_HARD_CAP = 2_000_000
#: Allowed ``method`` options.
METHODS = ("auto", "enumeration", "column_generation")
#: Allowed ``signalling`` options: refuse signalling data, or average the marginals.
SIGNALLING_MODES = ("raise", "average")
#: Largest no-signalling violation ``max |p_A(a|x,y) - p_A(a|x,y')|`` (and Bob's) accepted
#: under ``signalling="raise"``; Born-rule tensors are ~1e-15, frequencies far above.
SIGNALLING_ATOL = 1e-7


_DUAL, _PRIMAL = 1, 4  # HiGHS simplex_strategy values


class SignallingError(ScenarioError):
    """The data signal: a party's marginals depend on the other party's setting."""


class NoiseError(ScenarioError):
    """The noise tensor is not a valid noise model (normalised, interior local point)."""


@dataclass(frozen=True)
class LocalDecomposition:
    """A local model: a mixture of deterministic strategy pairs.

    Attributes
    ----------
    strategies_a : ndarray of int, shape (k, m_A)
        Alice's outcome for each setting, one row per term.
    strategies_b : ndarray of int, shape (k, m_B)
    weights : ndarray, shape (k,)
        Non-negative, summing to 1.
    """

    strategies_a: NDArray[np.int64]
    strategies_b: NDArray[np.int64]
    weights: NDArray[np.float64]

    def __post_init__(self) -> None:
        for name in ("strategies_a", "strategies_b", "weights"):
            arr = np.array(getattr(self, name), copy=True)
            arr.setflags(write=False)
            object.__setattr__(self, name, arr)

    def __len__(self) -> int:
        return int(self.weights.shape[0])

    def tensor(self, outcomes_a: int, outcomes_b: int) -> NDArray[np.float64]:
        """The mixture ``sum_k w_k D_k``, shape ``(m_A, m_B, d_A, d_B)``."""
        m_a, m_b = self.strategies_a.shape[1], self.strategies_b.shape[1]
        out = np.zeros((m_a, m_b, outcomes_a, outcomes_b))
        for sa, sb, w in zip(self.strategies_a, self.strategies_b, self.weights):
            out += w * vertex_tensor(sa, sb, outcomes_a, outcomes_b)
        return out

    def __repr__(self) -> str:
        return (
            f"LocalDecomposition({len(self)} strategy pairs, total weight {self.weights.sum():.6g})"
        )


@dataclass(frozen=True)
class VisibilityResult:
    """Outcome of a visibility LP.

    Attributes
    ----------
    visibility : float
        Largest ``v`` with ``v p + (1 - v) n`` local (dimensionless); ``< 1`` means the data are
        nonlocal, ``>= 1`` local.  At most ``v_max``.
    visibility_upper : float
        Proven upper bound on the exact optimum (equal to ``visibility`` for enumeration; for
        column generation it comes from the last pricing round).
    certificate : BellFunctional or None
        ``I`` with ``I(noise) = 0``, local bound 1 and ``I(p) = 1 / visibility``; ``None`` when
        the result is capped (the dual then carries no inequality).
    certificate_value : float
        ``I(p)``, the data's score on the certificate.
    local_weights : LocalDecomposition or None
        A local model of ``p`` itself when ``visibility >= 1``, else ``None``.
    status : str
        HiGHS model status of the final solve (always ``"Optimal"``; anything else raised).
    method : str
        ``"enumeration"`` or ``"column_generation"``.
    iterations : int
        LP solves (master re-solves for column generation).
    simplex_iterations : int
        Simplex pivots over those solves.
    solve_time : float
        Wall time in seconds, validation and certificate included.
    columns : int
        Vertex columns held by the LP.
    vertices : int
        Vertices of the local polytope.
    v_max : float
        The cap on ``visibility``.
    capped : bool
        Whether ``visibility`` sits at the cap.
    """

    visibility: float
    visibility_upper: float
    certificate: BellFunctional | None
    certificate_value: float
    local_weights: LocalDecomposition | None
    status: str
    method: str
    iterations: int
    simplex_iterations: int
    solve_time: float
    columns: int
    vertices: int
    v_max: float
    capped: bool
    scenario: Scenario = field(repr=False, default=None)  # type: ignore[assignment]

    @property
    def is_nonlocal(self) -> bool:
        """``visibility < 1``: the data lie outside the local polytope."""
        return self.visibility < 1.0

    def __str__(self) -> str:
        tag = "nonlocal" if self.visibility < 1 else "local"
        cap = " (capped)" if self.capped else ""
        return (
            f"visibility {self.visibility:.7g}{cap} ({tag}; {self.method}, "
            f"{self.iterations} LP solves, {1e3 * self.solve_time:.1f} ms)"
        )


def _check_option(name: str, value: str, allowed: tuple[str, ...]) -> str:
    if value not in allowed:
        raise ValueError(f"{name}={value!r} is not one of {allowed}")
    return value


def signalling_deviation(p: NDArray[np.float64]) -> float:
    """Largest change of a party's marginal with the other party's setting."""
    pa = p.sum(axis=3)  # (x, y, a)
    pb = p.sum(axis=2)  # (x, y, b)
    dev_a = np.max(pa.max(axis=1) - pa.min(axis=1))
    dev_b = np.max(pb.max(axis=0) - pb.min(axis=0))
    return float(max(dev_a, dev_b))


def _shift_strategies(settings: int, outcomes: int) -> NDArray[np.int64]:
    """Strategies ``b + k (mod d)`` for ``b`` = 0 and the unit vectors, every ``k``.

    Their average gives uniform marginals and their party vectors span the party space, so
    the product set has the uniform point in the relative interior of its hull.
    """
    bases = [np.zeros(settings, dtype=np.int64)]
    for x in range(settings):
        e = np.zeros(settings, dtype=np.int64)
        e[x] = 1
        bases.append(e)
    rows = [(b + k) % outcomes for b in bases for k in range(outcomes)]
    return np.unique(np.array(rows), axis=0)


class VisibilitySolver:
    """Reusable visibility LP for one scenario and one noise model.

    The HiGHS model is built once; :meth:`solve` changes only the right-hand side and
    re-solves from the previous optimal basis.

    Parameters
    ----------
    scenario : Scenario
    noise : array_like, shape (m_A, m_B, d_A, d_B), optional
        Noise model; uniform when omitted.  Must be normalised, no-signalling and strictly
        inside the local polytope.
    method : {"auto", "enumeration", "column_generation"}
        ``"auto"`` enumerates up to ``max_enumerated_vertices`` vertices.
    v_max : float
        Cap on the visibility (``> 1``).
    tolerance : float
        LP feasibility tolerances, and the column-generation stop: the relative gap between
        the master's visibility (a lower bound) and the best certificate's bound, or the
        largest reduced-cost violation.  The visibility is accurate to about ``tolerance``.
    max_enumerated_vertices : int
    columns_per_round : int, optional
        Vertices added per pricing round (default: half the coordinate count, at least 16).
    max_rounds : int
        Cap on pricing rounds per solve; exceeding it raises :class:`SolverError`.
    smoothing : float
        Weight of the best functional so far in the pricing point (Wentges smoothing,
        0 switches it off).
    seed_columns : int, optional
        Vertices added before the first master solve, those scoring best on
        ``p - noise`` (default ``8 n_A n_B``).
    max_columns : int, optional
        When a re-solve starts with more generated columns than this (default
        ``20 n_A n_B``), the non-basic ones are dropped, oldest first, down to half.

    Examples
    --------
    >>> from labwatch.models import cglmp_bases, maximally_entangled, probabilities
    >>> a, b = cglmp_bases(3)
    >>> p = probabilities(maximally_entangled(3), a, b)
    >>> solver = VisibilitySolver(Scenario.from_shape(p.shape))
    >>> round(solver.solve(p).visibility, 4)
    0.6962
    """

    def __init__(
        self,
        scenario: Scenario,
        noise: ArrayLike | None = None,
        *,
        method: str = "auto",
        v_max: float = DEFAULT_V_MAX,
        tolerance: float = 1e-9,
        max_enumerated_vertices: int = MAX_ENUMERATED_VERTICES,
        columns_per_round: int | None = None,
        max_rounds: int = 10_000,
        smoothing: float = 0.5,
        seed_columns: int | None = None,
        max_columns: int | None = None,
    ) -> None:
        if not isinstance(scenario, Scenario):
            raise TypeError(f"scenario must be a Scenario, got {type(scenario).__name__}")
        _check_option("method", method, METHODS)
        if not (isinstance(v_max, (int, float)) and v_max > 1.0 and math.isfinite(v_max)):
            raise ValueError(f"v_max must be a finite number > 1, got {v_max!r}")
        if not (0.0 < tolerance < 1e-3):
            raise ValueError(f"tolerance must be in (0, 1e-3), got {tolerance!r}")
        self.scenario = scenario
        self.v_max = float(v_max)
        self.tolerance = float(tolerance)
        self.max_rounds = int(max_rounds)
        if not 0.0 <= smoothing < 1.0:
            raise ValueError(f"smoothing must be in [0, 1), got {smoothing!r}")
        self.smoothing = float(smoothing)
        self._seeded = False
        if method == "auto":
            method = (
                "enumeration"
                if scenario.local_vertices <= max_enumerated_vertices
                else "column_generation"
            )
        if method == "enumeration" and scenario.local_vertices > ENUMERATION_HARD_CAP:
            raise ValueError(
                f"method='enumeration' would hold {scenario.local_vertices} vertex columns "
                f"(cap {ENUMERATION_HARD_CAP}); use method='column_generation' or 'auto'"
            )
        self.method = method
        self.rows = cg_dimension(scenario)
        self.columns_per_round = (
            max(16, self.rows // 2) if columns_per_round is None else int(columns_per_round)
        )
        self.seed_columns = 8 * self.rows if seed_columns is None else int(seed_columns)
        self.max_columns = 20 * self.rows if max_columns is None else int(max_columns)
        self._uniform = noise is None
        self._noise_decomposition: LocalDecomposition | None = None
        seed_a = seed_b = None
        if noise is None:
            self.noise = scenario.uniform()
        else:
            self.noise, seed_a, seed_b = self._check_noise(noise)
        self.noise.setflags(write=False)
        self._build(seed_a, seed_b)

    # -- construction -------------------------------------------------------------------
    def _check_noise(self, noise: ArrayLike) -> tuple[NDArray, NDArray, NDArray]:
        sc = self.scenario
        try:
            arr = sc.check_probabilities(noise)
        except ScenarioError as exc:
            raise NoiseError(f"noise: {exc}") from exc
        dev = signalling_deviation(arr)
        if dev > SIGNALLING_ATOL:
            raise NoiseError(f"the noise tensor signals (marginal deviation {dev:.3g})")
        probe = VisibilitySolver(sc, tolerance=1e-10)
        res = probe.solve(arr)
        if not res.visibility > 1.0 + 1e-7:
            raise NoiseError(
                "the noise tensor must lie strictly inside the local polytope "
                f"(its visibility against white noise is {res.visibility:.9g}, need > 1)"
            )
        assert res.local_weights is not None
        self._noise_decomposition = res.local_weights
        return arr.copy(), res.local_weights.strategies_a, res.local_weights.strategies_b

    def _build(self, seed_a: NDArray | None, seed_b: NDArray | None) -> None:
        sc = self.scenario
        h = new_model()
        h.setOptionValue("primal_feasibility_tolerance", self.tolerance)
        h.setOptionValue("dual_feasibility_tolerance", self.tolerance)
        h.setOptionValue("presolve", "off")  # keep the basis across re-solves
        self._h = h
        zeros = np.zeros(self.rows)
        h.addRows(self.rows, zeros, zeros, 0, as_index([]), as_index([]), np.empty(0))
        noise_cg = to_cg(self.noise)
        self._noise_cg = noise_cg
        nz = np.flatnonzero(np.abs(noise_cg) > 0)
        h.addCols(
            1,
            np.array([1.0]),
            np.array([1.0 / self.v_max - 1.0]),
            np.array([INF]),
            nz.size,
            as_index([0]),
            as_index(nz),
            -noise_cg[nz],
        )
        self._strat_a = np.empty((0, sc.settings_a), dtype=np.int64)
        self._strat_b = np.empty((0, sc.settings_b), dtype=np.int64)
        if self.method == "enumeration":
            sa = party_strategies(sc.settings_a, sc.outcomes_a)
            sb = party_strategies(sc.settings_b, sc.outcomes_b)
            ia = np.repeat(np.arange(sa.shape[0]), sb.shape[0])
            ib = np.tile(np.arange(sb.shape[0]), sa.shape[0])
            self._add_columns(sa[ia], sb[ib])
        else:
            sa = _shift_strategies(sc.settings_a, sc.outcomes_a)
            sb = _shift_strategies(sc.settings_b, sc.outcomes_b)
            ia = np.repeat(np.arange(sa.shape[0]), sb.shape[0])
            ib = np.tile(np.arange(sb.shape[0]), sa.shape[0])
            cols_a, cols_b = sa[ia], sb[ib]
            if seed_a is not None and seed_b is not None:
                cols_a = np.concatenate([cols_a, seed_a])
                cols_b = np.concatenate([cols_b, seed_b])
            self._add_columns(cols_a, cols_b)
        self._kept = self.columns  # starting columns are never pruned (feasibility)

    def _add_columns(self, sa: NDArray[np.int64], sb: NDArray[np.int64]) -> None:
        sc = self.scenario
        starts, indices, values = vertex_columns(sa, sb, sc.outcomes_a, sc.outcomes_b)
        n = sa.shape[0]
        self._h.addCols(
            n,
            np.zeros(n),
            np.zeros(n),
            np.full(n, INF),
            indices.size,
            as_index(starts[:-1]),
            as_index(indices),
            values,
        )
        self._strat_a = np.concatenate([self._strat_a, sa])
        self._strat_b = np.concatenate([self._strat_b, sb])
        if self.method == "enumeration":  # kept to score every vertex cheaply
            self._enum_starts, self._enum_indices = starts[:-1], indices

    @property
    def columns(self) -> int:
        """Vertex columns currently in the LP."""
        return int(self._strat_a.shape[0])

    # -- solving ------------------------------------------------------------------------
    def solve(self, probabilities: ArrayLike, *, signalling: str = "raise") -> VisibilityResult:
        """Visibility of ``probabilities`` against this solver's noise.

        Parameters
        ----------
        probabilities : array_like, shape (m_A, m_B, d_A, d_B)
            Normalised per setting pair.
        signalling : {"raise", "average"}
            Signalling data (marginal deviation above ``SIGNALLING_ATOL``) raise
            :class:`SignallingError` (project them first, see
            :func:`labwatch.polytope.project_no_signalling`), or are read with each marginal
            averaged over the other party's settings.
        """
        start = time.perf_counter()
        _check_option("signalling", signalling, SIGNALLING_MODES)
        p = self.scenario.check_probabilities(probabilities, atol=1e-6)
        if signalling == "raise":
            dev = signalling_deviation(p)
            if dev > SIGNALLING_ATOL:
                raise SignallingError(
                    f"the data signal (marginal deviation {dev:.3g} > {SIGNALLING_ATOL:g}); "
                    "project them onto the no-signalling set first (project_no_signalling) "
                    "or pass signalling='average'"
                )
        h = self._h
        rhs = to_cg(p)
        h.changeRowsBounds(self.rows, as_index(np.arange(self.rows)), rhs, rhs)
        if self.method == "column_generation":
            if not self._seeded:
                self._seed(p)
            elif self.columns > self.max_columns:
                self._prune()
        solves = pivots = 0
        center: NDArray[np.float64] | None = None  # best normalised functional so far
        best_bound = math.inf  # visibility upper bound of ``center``
        while True:
            # New data keep the basis dual feasible (dual simplex); new columns keep it
            # primal feasible (primal simplex).
            h.setOptionValue("simplex_strategy", _DUAL if solves == 0 else _PRIMAL)
            solve_checked(h, "visibility LP")
            solves += 1
            pivots += int(h.getInfo().simplex_iteration_count)
            sol = h.getSolution()
            y = np.asarray(sol.row_dual)
            if self.method == "enumeration":
                # Exact maximum (cheap here) so the certificate's local bound is exactly 1.
                top = float(np.max(np.add.reduceat(y[self._enum_indices], self._enum_starts)))
                center, best_bound = self._normalise(y, top, rhs)
                break
            lower = 1.0 / (1.0 + float(sol.col_value[0]))
            # Price at a point between the best functional so far and the master's duals
            # (Wentges smoothing); fall back to the master's duals when that finds nothing.
            added = False
            for weight in (self.smoothing, 0.0) if center is not None else (0.0,):
                probe = y if weight == 0.0 else weight * center + (1.0 - weight) * y
                priced = best_vertices_both_sides(probe, self.scenario, self.columns_per_round)
                cand, bound = self._normalise(probe, float(priced.values[0]), rhs)
                if bound < best_bound:
                    center, best_bound = cand, bound
                if best_bound - lower <= self.tolerance * lower:
                    break
                gain = self._vertex_scores(y, priced.strategies_a, priced.strategies_b)
                new = gain > self.tolerance
                if np.any(new):
                    self._add_columns(priced.strategies_a[new], priced.strategies_b[new])
                    added = True
                    break
            if not added:
                break
            if solves >= self.max_rounds:
                raise SolverError(
                    f"column generation did not converge in {self.max_rounds} rounds "
                    f"(visibility between {lower:.9g} and {best_bound:.9g})"
                )
        assert center is not None
        return self._result(p, center, best_bound, solves, pivots, start)

    def _prune(self) -> None:
        """Drop non-basic generated columns, oldest first, down to half of ``max_columns``.

        Keeps a long-running live solver from growing without bound; the basis stays valid
        because only non-basic columns go.
        """
        status = self._h.getBasis().col_status
        basic = np.array([s == highspy.HighsBasisStatus.kBasic for s in status[1:]])
        candidates = np.flatnonzero(~basic[self._kept :]) + self._kept
        excess = self.columns - self.max_columns // 2
        drop = candidates[: max(0, excess)]
        if drop.size == 0:
            return
        self._h.deleteCols(drop.size, as_index(drop + 1))  # +1: column 0 is t
        keep = np.ones(self.columns, dtype=bool)
        keep[drop] = False
        self._strat_a = self._strat_a[keep]
        self._strat_b = self._strat_b[keep]

    def _seed(self, p: NDArray[np.float64]) -> None:
        """Add the vertices that score best on ``p - noise`` (a cheap guess of the facet).

        Done once, before the first master solve: it replaces many pricing rounds that
        would otherwise start from a master far from the optimum.
        """
        self._seeded = True
        guess = functional_to_cg(p - self.noise)
        priced = best_vertices_both_sides(guess, self.scenario, self.seed_columns)
        self._add_columns(priced.strategies_a, priced.strategies_b)

    def _normalise(
        self, y: NDArray[np.float64], top: float, rhs: NDArray[np.float64]
    ) -> tuple[NDArray[np.float64], float]:
        """Shift and scale ``y`` so that ``max_D F = 0`` and ``F(noise) = -1``.

        ``top`` is the exact ``max_D F_y(D)``.  Returns the normalised functional and the
        visibility upper bound ``(top - F(n)) / (F(p) - F(n))`` it proves (``inf`` when the
        data do not score above the noise).
        """
        y = y.copy()
        y[0] -= top
        kappa = -float(y @ self._noise_cg)
        if not kappa > 0.0:
            return y, math.inf
        y /= kappa
        gap = float(y @ rhs) + 1.0
        return y, (1.0 / gap if gap > 0.0 else math.inf)

    def _vertex_scores(
        self, y: NDArray[np.float64], sa: NDArray[np.int64], sb: NDArray[np.int64]
    ) -> NDArray[np.float64]:
        """``F_y(D)`` of the given vertices."""
        sc = self.scenario
        starts, indices, _ = vertex_columns(sa, sb, sc.outcomes_a, sc.outcomes_b)
        return np.add.reduceat(y[indices], starts[:-1])

    def _result(
        self,
        p: NDArray[np.float64],
        y: NDArray[np.float64],
        bound: float,
        solves: int,
        pivots: int,
        start: float,
    ) -> VisibilityResult:
        h = self._h
        sc = self.scenario
        col_value = np.asarray(h.getSolution().col_value)
        t = float(col_value[0])
        t_min = 1.0 / self.v_max - 1.0
        capped = t <= t_min + 1e-12
        visibility = 1.0 / (1.0 + t)
        certificate = None if capped else self._certificate(y)
        value = float(np.sum(certificate.coefficients * p)) if certificate else math.nan
        local = self._local_model(col_value[1:], t) if t <= 0.0 else None
        return VisibilityResult(
            visibility=visibility,
            visibility_upper=self.v_max if capped else max(min(bound, self.v_max), visibility),
            certificate=certificate,
            certificate_value=value,
            local_weights=local,
            status=str(h.modelStatusToString(h.getModelStatus())),
            method=self.method,
            iterations=solves,
            simplex_iterations=pivots,
            solve_time=time.perf_counter() - start,
            columns=self.columns,
            vertices=sc.local_vertices,
            v_max=self.v_max,
            capped=capped,
            scenario=sc,
        )

    def _certificate(self, y: NDArray[np.float64]) -> BellFunctional | None:
        """The certificate ``I = F + 1`` of a normalised functional (module docstring)."""
        sc = self.scenario
        if not np.all(np.isfinite(y)):
            return None
        coeffs = functional_from_cg(y, sc) + 1.0 / sc.setting_pairs
        coeffs[np.abs(coeffs) < 1e-13] = 0.0
        return BellFunctional(
            coeffs,
            name="visibility certificate",
            description="I(noise) = 0, local bound 1, I(data) = 1/visibility",
        )

    def _local_model(self, q: NDArray[np.float64], t: float) -> LocalDecomposition:
        """``p = sum q D + |t| noise`` with the noise itself decomposed."""
        sc = self.scenario
        keep = q > 1e-12
        parts_a = [self._strat_a[keep]]
        parts_b = [self._strat_b[keep]]
        parts_w = [q[keep]]
        if t < 0.0:
            if self._noise_decomposition is None:  # uniform = mixture of constant strategies
                ka = np.repeat(np.arange(sc.outcomes_a), sc.outcomes_b)
                kb = np.tile(np.arange(sc.outcomes_b), sc.outcomes_a)
                parts_a.append(np.repeat(ka[:, None], sc.settings_a, axis=1))
                parts_b.append(np.repeat(kb[:, None], sc.settings_b, axis=1))
                parts_w.append(np.full(ka.shape[0], -t / (sc.outcomes_a * sc.outcomes_b)))
            else:
                nd = self._noise_decomposition
                parts_a.append(nd.strategies_a)
                parts_b.append(nd.strategies_b)
                parts_w.append(-t * nd.weights)
        sa = np.concatenate(parts_a)
        sb = np.concatenate(parts_b)
        w = np.concatenate(parts_w)
        keys = np.concatenate([sa, sb], axis=1)
        uniq, inverse = np.unique(keys, axis=0, return_inverse=True)
        merged = np.zeros(uniq.shape[0])
        np.add.at(merged, inverse.ravel(), w)
        return LocalDecomposition(
            strategies_a=uniq[:, : sc.settings_a],
            strategies_b=uniq[:, sc.settings_a :],
            weights=merged,
        )


def white_noise_visibility(
    probabilities: ArrayLike, noise: ArrayLike | None = None, **options: object
) -> VisibilityResult:
    """Largest ``v`` such that ``v p + (1 - v) n`` lies in the local polytope.

    One-shot convenience around :class:`VisibilitySolver` (see the module docstring for the
    LP, its dual and the certificate's normalisation).

    Parameters
    ----------
    probabilities : array_like, shape (m_A, m_B, d_A, d_B)
        No-signalling probabilities ``p[x, y, a, b]``.
    noise : array_like, optional
        Noise tensor ``n``; uniform ``1/(d_A d_B)`` when omitted.
    **options
        ``signalling`` goes to :meth:`VisibilitySolver.solve`; the rest (``method``,
        ``v_max``, ``tolerance``, ``max_enumerated_vertices``, ``columns_per_round``,
        ``max_rounds``) to the solver.

    Returns
    -------
    VisibilityResult
        ``.visibility < 1`` means nonlocal; ``.certificate`` is then a Bell inequality
        ``I <= 1`` that the data violate with ``I(p) = 1 / visibility``.

    Examples
    --------
    >>> from labwatch.models import cglmp_bases, maximally_entangled, probabilities
    >>> a, b = cglmp_bases(2)
    >>> res = white_noise_visibility(probabilities(maximally_entangled(2), a, b))
    >>> round(res.visibility, 6), round(res.certificate.local_bound, 6)
    (0.707107, 1.0)
    """
    arr = np.asarray(probabilities, dtype=np.float64)
    scenario = Scenario.from_shape(arr.shape)
    signalling = options.pop("signalling", "raise")
    solver = VisibilitySolver(scenario, noise, **options)  # type: ignore[arg-type]
    return solver.solve(arr, signalling=signalling)  # type: ignore[arg-type]

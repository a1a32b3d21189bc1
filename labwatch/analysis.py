"""Figures computed from accumulated counts at each analysis epoch (pure core).

:class:`Analyzer` holds what must persist between epochs of a run (warm LP models, running
test martingales) and turns a :class:`~labwatch.accumulate.RunAccumulator` into figures.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from statistics import NormalDist
from typing import Any

import numpy as np
from numpy.typing import NDArray

from labwatch.accumulate import RunAccumulator
from labwatch.bell import BellFunctional, BellValue, cglmp, ch_eberhard, chsh
from labwatch.polytope import (
    SolverError,
    VisibilitySolver,
    subset_visibilities,
    visibility_from_counts,
)
from labwatch.scenario import Scenario
from labwatch.snapshot import Figure, RateFigures
from labwatch.stats import LocalRealismTest, statistical_strength
from labwatch.stats.confseq import BellValueSequence
from labwatch.stats.target import TargetWatch, parse_target

__all__ = [
    "FUNCTIONAL_CHOICES",
    "AnalysisConfig",
    "EpochFigures",
    "Analyzer",
    "correlators",
    "correlation_contrast",
    "default_functional",
]

#: Named functional choices accepted by :class:`AnalysisConfig` (or pass a BellFunctional).
FUNCTIONAL_CHOICES = ("auto", "chsh", "cglmp", "ch", "certificate")


def default_functional(scenario: Scenario) -> BellFunctional | None:
    """CHSH for 2 settings x 2 outcomes, CGLMP for 2 settings x d outcomes, else None."""
    m_a, m_b, d_a, d_b = scenario.shape
    if (m_a, m_b) != (2, 2) or d_a != d_b:
        return None
    return chsh() if d_a == 2 else cglmp(d_a)


def correlators(
    counts: NDArray[np.int64],
) -> tuple[NDArray[np.float64], NDArray[np.float64]] | None:
    """``E_xy = (N_same - N_diff) / N_xy`` and ``sqrt((1 - E^2)/N_xy)`` for two outcomes.

    Outcome 0 is +1 and outcome 1 is -1.  Setting pairs without trials give ``nan``.
    Returns None unless both parties have two outcomes.
    """
    if counts.shape[2:] != (2, 2):
        return None
    n = counts.sum(axis=(2, 3)).astype(float)
    same = counts[:, :, 0, 0] + counts[:, :, 1, 1]
    diff = counts[:, :, 0, 1] + counts[:, :, 1, 0]
    with np.errstate(divide="ignore", invalid="ignore"):
        e = np.where(n > 0, (same - diff) / n, np.nan)
        err = np.where(n > 0, np.sqrt(np.maximum(1 - e**2, 0) / n), np.nan)
    return e, err


def correlation_contrast(counts: NDArray[np.int64]) -> NDArray[np.float64]:
    """Per setting pair: ``(P_k - 1/d) / (1 - 1/d)``, ``P_k = max_k P(b = a + k mod d)``.

    1 for perfectly correlated outcomes (up to a relabelling shift), 0 for uniform noise; for
    qubits it is the fringe visibility ``|E|`` of the better of the two labellings.  Uses
    ``d = min(d_A, d_B)`` and only outcomes below it.
    """
    d = min(counts.shape[2], counts.shape[3])
    sub = counts[:, :, :d, :d].astype(float)
    n = sub.sum(axis=(2, 3))
    a = np.arange(d)
    shifted = np.stack([sub[:, :, a, (a + k) % d].sum(axis=2) for k in range(d)], axis=-1)
    with np.errstate(divide="ignore", invalid="ignore"):
        best = np.where(n > 0, shifted.max(axis=-1) / n, np.nan)
    return (best - 1.0 / d) / (1.0 - 1.0 / d)


@dataclass(frozen=True)
class AnalysisConfig:
    """What the analyzer computes.

    Attributes
    ----------
    functional : str or BellFunctional
        One of :data:`FUNCTIONAL_CHOICES` or a user tensor.  ``"auto"`` picks CHSH/CGLMP when
        the scenario has two settings per party, else the polytope certificate.
    visibility : bool
        Solve the local-polytope LP (white-noise visibility) at each epoch.
    bootstrap : int
        Parametric-bootstrap resamples for the visibility (0: delta method only).
    best_pair : bool
        Search all 2x2 sub-scenarios when a party has more than two settings.
    confidence_level : float
        Level of the reported intervals.
    lp_vertex_cap : int
        Scenarios with more local vertices than this skip the LP at the display rate.
    seed : int
        Seed of the bootstrap resampling (so replays reproduce the live figures).
    target : str or None
        Confidence target (see :mod:`labwatch.stats.target`), e.g. ``"p<=1e-6"``.
    betting : str
        Betting method of the stopping-safe test (:data:`labwatch.stats.BETTING_METHODS`).
    max_subsets : int
        The best-pair search is skipped when it would need more 2x2 sub-problems than this.
    """

    functional: str | BellFunctional = "auto"
    visibility: bool = True
    bootstrap: int = 0
    best_pair: bool = True
    confidence_level: float = 0.95
    lp_vertex_cap: int = 10**9
    seed: int = 0
    target: str | None = None
    betting: str = "grid"
    max_subsets: int = 400

    def __post_init__(self) -> None:
        if isinstance(self.functional, str) and self.functional not in FUNCTIONAL_CHOICES:
            raise ValueError(f"functional {self.functional!r} not in {FUNCTIONAL_CHOICES}")
        if not 0 < self.confidence_level < 1:
            raise ValueError(f"confidence_level must be in (0, 1), got {self.confidence_level}")
        if self.target is not None:
            parse_target(self.target)  # raises with the allowed forms


@dataclass(frozen=True)
class EpochFigures:
    """What :meth:`Analyzer.analyze` returns for one epoch."""

    functional: str
    bell: BellValue | None
    bell_window: BellValue | None
    correlators: NDArray[np.float64] | None
    correlator_errors: NDArray[np.float64] | None
    contrast: NDArray[np.float64]
    rates: RateFigures
    figures: tuple[Figure, ...]
    extras: dict[str, Any]


#: What each kind of confidence target assumes.
_TARGET_ASSUMPTIONS = {
    "p_value": ("random settings", "stopping-safe"),
    "bell_lcb": ("i.i.d.", "stopping-safe"),
    "visibility_ucb": ("fixed n", "Gaussian", "i.i.d."),
}

BLOCK_SETTINGS_NOTE = (
    "settings held in blocks: these data cannot test local realism (a local model can fake "
    "any block-wise violation); figures assume i.i.d. trials"
)


class Analyzer:
    """Per-run analysis state; one instance per run (a new run gets a fresh analyzer).

    Holds the warm LP model, the running stopping-safe test and the certificate found at the
    previous epoch.  A functional chosen from the data ("certificate") is always the one found
    at an *earlier* epoch, so the test of local realism only bets on past data.
    """

    def __init__(self, scenario: Scenario, config: AnalysisConfig | None = None) -> None:
        self.scenario = scenario
        self.config = config or AnalysisConfig()
        self._fixed = self._resolve_functional()
        self._functional = self._fixed
        self._certificate: BellFunctional | None = None
        self._solver: VisibilitySolver | None = None
        self._lrt: LocalRealismTest | None = None
        self._lrt_functional: BellFunctional | None = None
        self._sequence: BellValueSequence | None = None
        self._target = None if self.config.target is None else TargetWatch(self.config.target)
        self.epochs = 0
        self._no_click_seen = False
        self._untested_total = 0

    def _resolve_functional(self, no_click: bool = False) -> BellFunctional | None:
        f = self.config.functional
        m_a, m_b, d_a, d_b = self.scenario.shape
        if f == "ch" or (f == "auto" and no_click):
            # the no-click outcome is the last one; "+" is outcome 0 (Clauser-Horne/Eberhard)
            return ch_eberhard(d_a, d_b) if (m_a, m_b) == (2, 2) else None
        if isinstance(f, BellFunctional):
            return f if f.coefficients.shape == self.scenario.shape else None
        if f == "chsh":
            return chsh() if self.scenario.shape == (2, 2, 2, 2) else None
        if f == "cglmp":
            m_a, m_b, d_a, d_b = self.scenario.shape
            return cglmp(d_a) if (m_a, m_b) == (2, 2) and d_a == d_b else None
        if f == "auto":
            return default_functional(self.scenario)
        return None  # "certificate": taken from the LP of an earlier epoch

    @property
    def functional(self) -> BellFunctional | None:
        """The functional currently used for the Bell value (may be the LP certificate)."""
        return self._functional

    def rates(self, acc: RunAccumulator) -> RateFigures:
        """Coincidence and singles rates over the rolling window, heralding and accidentals.

        Coincidences exclude trials in which either party's no-click outcome occurred.
        """
        live = acc.window.live_time_s
        total = acc.window.total
        # with a kept no-click outcome (the last one) a coincidence is a trial where both clicked
        trials = int(total[:, :, :-1, :-1].sum() if acc.no_click else total.sum())
        if live <= 0:
            return RateFigures(math.nan, math.nan, None, None, None, None, None)
        rate = trials / live
        rate_err = math.sqrt(trials) / live
        if not acc.has_singles:
            return RateFigures(rate, rate_err, None, None, None, None, None)
        s_a, s_b = acc.window.singles_total
        ra, rb = s_a / live, s_b / live
        acc_hz = ra * rb * acc.coincidence_window_s if acc.coincidence_window_s else None
        her_a = trials / s_b if s_b > 0 else None
        her_b = trials / s_a if s_a > 0 else None
        return RateFigures(rate, rate_err, ra, rb, acc_hz, her_a, her_b)

    # ------------------------------------------------------------------ parts
    @staticmethod
    def _labels(acc: RunAccumulator, base: tuple[str, ...]) -> tuple[str, ...]:
        return base if acc.no_click else base + ("fair sampling",)

    def _visibility(
        self, acc: RunAccumulator, figures: list[Figure], extras: dict[str, Any]
    ) -> None:
        cfg = self.config
        if not cfg.visibility:
            return
        if acc.scenario.local_vertices > cfg.lp_vertex_cap:
            extras["visibility_note"] = (
                f"LP skipped: {acc.scenario.local_vertices} local vertices exceed the cap"
            )
            return
        totals = acc.counts.sum(axis=(2, 3))
        if np.any(totals == 0):
            extras["visibility_note"] = "waiting for trials at every setting pair"
            return
        if self._solver is None:
            self._solver = VisibilitySolver(acc.scenario)
        rng = np.random.default_rng([cfg.seed, self.epochs])
        try:
            cv = visibility_from_counts(
                acc.counts,
                bootstrap=cfg.bootstrap,
                rng=rng,
                solver=self._solver,
                confidence_level=cfg.confidence_level,
            )
        except (SolverError, ValueError) as exc:
            extras["visibility_note"] = f"LP failed: {exc}"[:300]
            self._solver = None  # rebuild from scratch next epoch
            return
        low = high = math.nan
        if cv.interval is not None:
            low, high = cv.interval.low, cv.interval.high
        figures.append(
            Figure(
                "visibility",
                cv.visibility,
                cv.stderr,
                low,
                high,
                cfg.confidence_level if cv.interval is not None else math.nan,
                self._labels(acc, tuple(cv.assumptions)),
                "white-noise visibility from the local-polytope LP; v < 1 means nonlocal",
            )
        )
        sig = cv.signalling
        figures.append(
            Figure(
                "no_signalling_p",
                sig.pvalue,
                assumptions=("i.i.d.",),
                note=f"G-test of the marginals: G = {sig.statistic:.2f}, {sig.dof} dof; "
                "small values flag setting-dependent efficiencies or drifts",
            )
        )
        res = cv.result
        extras["visibility"] = {
            "method": res.method,
            "solve_time_s": res.solve_time,
            "capped": res.capped,
            "visibility_upper": res.visibility_upper,
            "vertices": res.vertices,
            "bootstrap": cfg.bootstrap,
        }
        cert = res.certificate
        if cert is not None:
            extras["certificate"] = {
                "name": cert.name,
                "local_bound": cert.local_bound,
                "value": res.certificate_value,
                "coefficients": cert.coefficients.tolist(),
                "note": "white noise scores 0, local bound 1, the data score 1/visibility",
            }
        if cfg.best_pair and max(acc.scenario.settings_a, acc.scenario.settings_b) > 2:
            m_a, m_b = acc.scenario.settings_a, acc.scenario.settings_b
            n_sub = math.comb(m_a, min(2, m_a)) * math.comb(m_b, min(2, m_b))
            if n_sub <= cfg.max_subsets:
                search = subset_visibilities(
                    cv.projection.probabilities, min(2, m_a), min(2, m_b), include_full=False
                )
                extras["best_pair"] = {
                    "settings_a": list(search.best.settings_a),
                    "settings_b": list(search.best.settings_b),
                    "visibility": search.best.visibility,
                    "subsets": len(search.subsets),
                    "full_visibility": cv.visibility,
                }
        self._certificate = cert

    def _evidence(
        self,
        acc: RunAccumulator,
        epoch_counts: NDArray[np.int64],
        functional: BellFunctional | None,
        figures: list[Figure],
        extras: dict[str, Any],
    ) -> None:
        if acc.block_settings or not acc.random_settings:
            extras["local_realism"] = BLOCK_SETTINGS_NOTE
            return
        if functional is None or not epoch_counts.any():
            return  # nothing to bet on yet: this batch is simply not tested (predictable)
        q = acc.setting_probabilities
        declared = q is not None
        if q is None:
            q = np.full(
                (acc.scenario.settings_a, acc.scenario.settings_b), 1.0 / acc.scenario.setting_pairs
            )
        if self._lrt is None:
            self._lrt = LocalRealismTest(
                functional, q, method=self.config.betting, no_click_discarded=not acc.no_click
            )
            self._lrt_functional = functional
        elif functional is not self._lrt_functional:
            self._lrt.update_functional(functional)
            self._lrt_functional = functional
        res = self._lrt.update(epoch_counts)
        labels = tuple(res.assumptions)
        if not declared:
            labels += ("setting probabilities assumed uniform",)
        figures.append(
            Figure(
                "p_value",
                res.p_value,
                assumptions=labels,
                note="stopping-safe p-value against local realism (test supermartingale, Ville)",
            )
        )
        extras["evidence"] = {
            "log10_evidence": res.log10_evidence,
            "log_m": res.log_m,
            "trials": res.trials,
            "batches": res.batches,
            "method": res.method,
            "functional": res.functional,
            "growth_per_trial": res.growth_per_trial,
            "realised_growth_per_trial": res.realised_growth_per_trial,
            "factor_bound": res.factor_bound,
            "untested_late_trials": self._untested_total,
            "setting_probabilities_declared": declared,
        }

    def _sequence_bound(
        self, acc: RunAccumulator, epoch_counts: NDArray[np.int64], figures: list[Figure]
    ) -> None:
        f = self._fixed  # a confidence sequence needs one functional for the whole run
        if f is None:
            return
        if self._sequence is None:
            self._sequence = BellValueSequence(f, no_click_discarded=not acc.no_click)
        if epoch_counts.any():
            self._sequence.update(epoch_counts)
        alpha = 1.0 - self.config.confidence_level
        totals = acc.counts.sum(axis=(2, 3))
        if np.any(totals == 0):
            return
        # a two-sided interval at the stated level: each side at alpha / 2
        lo = self._sequence.lower_bound(alpha / 2)
        hi = self._sequence.upper_bound(alpha / 2)
        figures.append(
            Figure(
                "bell_lcb",
                lo,
                low=lo,
                high=hi,
                confidence_level=self.config.confidence_level,
                assumptions=tuple(
                    a
                    for a in self._sequence.assumptions
                    if acc.block_settings or "block settings" not in a
                ),
                note="confidence sequence of the Bell value (valid at every look); "
                "an estimate under i.i.d., not a test of local realism",
            )
        )

    def _strength(self, acc: RunAccumulator, extras: dict[str, Any]) -> None:
        if acc.block_settings or not acc.random_settings:
            return  # no test of local realism is possible, so no evidence rate to quote
        totals = acc.counts.sum(axis=(2, 3))
        if np.any(totals == 0) or acc.scenario.local_vertices > 10**7:
            return
        q = acc.setting_probabilities
        freq = acc.counts / totals[:, :, None, None]
        try:
            st = statistical_strength(freq, q)
        except (ValueError, ArithmeticError) as exc:
            extras["strength_note"] = f"not computed: {exc}"[:200]
            return
        p_target = self._p_target()
        extras["strength"] = {
            "kl_nats_per_trial": st.nats_per_trial,
            "p_target": p_target,
            "min_trials": st.minimum_trials(p_target) if st.nats_per_trial > 0 else None,
            "note": "KL divergence of the observed frequencies to the nearest local model, "
            "weighted by the setting probabilities: the best possible evidence rate",
        }

    def _p_target(self) -> float:
        t = self._target.target if self._target is not None else None
        if t is not None and t.kind == "p_value" and t.threshold is not None:
            return float(t.threshold)
        return 1e-6

    def _forecast(self, acc: RunAccumulator, rate_hz: float, extras: dict[str, Any]) -> None:
        if self._lrt is None or self._lrt.trials == 0:
            return
        p_target = self._p_target()
        try:
            fc = self._lrt.forecast(p_target, rate_hz if rate_hz > 0 else None)
        except ValueError as exc:
            extras["forecast_note"] = f"no forecast: {exc}"[:200]
            return
        extras["forecast"] = {
            "p_target": p_target,
            "reached": fc.reached,
            "trials": fc.trials,
            "trials_low": fc.trials_low,
            "trials_high": fc.trials_high,
            "seconds": fc.seconds,
            "seconds_low": fc.seconds_low,
            "seconds_high": fc.seconds_high,
            "growth_per_trial": fc.growth_per_trial,
            "growth_stderr": fc.growth_stderr,
            "assumptions": list(fc.assumptions),
        }

    def _check_target(
        self, acc: RunAccumulator, figures: list[Figure], extras: dict[str, Any]
    ) -> None:
        if self._target is None:
            return
        by_name = {f.name: f for f in figures}
        vis = by_name.get("visibility")

        def visibility_ucb(alpha: float) -> float:
            assert vis is not None
            return vis.value + NormalDist().inv_cdf(1.0 - alpha) * vis.stderr

        seq = self._sequence
        figs: dict[str, object] = {
            "random_settings": acc.random_settings and not acc.block_settings,
            "time": (acc.t_last or 0.0) - (acc.t_first or 0.0),
            "trials": acc.trials,
        }
        declared = acc.setting_probabilities is not None
        if "p_value" in by_name and declared:
            figs["p_value"] = by_name["p_value"].value
        if seq is not None and "bell_lcb" in by_name:
            figs["bell_lcb"] = seq.lower_bound
            figs["local_bound"] = seq.functional.local_bound
        if vis is not None and math.isfinite(vis.stderr):
            figs["visibility_ucb"] = visibility_ucb
        d = self._target.check(figs)
        extras["target"] = {
            "description": d.target,
            "met": d.met,
            "fired_now": d.fired_now,
            "met_at_source_time": d.time if d.met else None,
            "trials": d.trials,
            "value": d.value,
            "threshold": d.threshold,
            "reason": d.reason,
            "assumptions": list(_TARGET_ASSUMPTIONS[self._target.target.kind]),
        }
        random_stream = acc.random_settings and not acc.block_settings
        if self._target.target.kind == "p_value" and random_stream and not declared and not d.met:
            extras["target"]["reason"] = (
                "the stream does not declare its setting probabilities: a p-value target "
                "does not fire on assumed ones"
            )

    def analyze(
        self,
        acc: RunAccumulator,
        epoch_counts: NDArray[np.int64],
        untested: NDArray[np.int64] | None = None,
    ) -> EpochFigures:
        """Figures for the run so far.

        ``epoch_counts`` are the counts added since the last epoch; ``untested`` the part of
        them that arrived out of order and is left out of the stopping-safe test.
        """
        figures: list[Figure] = []
        extras: dict[str, Any] = {}
        if acc.no_click and not self._no_click_seen:
            self._no_click_seen = True
            self._fixed = self._resolve_functional(no_click=True)
        if self._fixed is None and self.config.functional not in ("auto", "certificate"):
            extras["functional_note"] = (
                f"the requested functional does not fit the scenario {acc.scenario.shape}; "
                "showing the LP certificate instead"
            )
        # a data-chosen functional comes from an earlier epoch's LP (see class docstring)
        f = self._fixed if self._fixed is not None else self._certificate
        self._functional = f
        tested = epoch_counts if untested is None else epoch_counts - untested
        if untested is not None:
            self._untested_total += int(untested.sum())
        try:
            self._evidence(acc, tested, f, figures, extras)
        except ValueError as exc:  # e.g. a functional that no local or quantum data can violate
            extras["evidence_note"] = f"no stopping-safe test: {exc}"[:300]
        self._visibility(acc, figures, extras)
        self._sequence_bound(acc, epoch_counts, figures)
        rates = self.rates(acc)
        self._strength(acc, extras)
        self._forecast(acc, rates.coincidence_hz, extras)
        self._check_target(acc, figures, extras)
        bell = f.evaluate_counts(acc.counts) if f is not None else None
        bell_w = f.evaluate_counts(acc.window.total) if f is not None else None
        if f is not None:
            extras["functional"] = {
                "name": f.name,
                "local_bound": f.local_bound,
                "quantum_bound": f.quantum_bound,
                "no_signalling_bound": f.no_signalling_bound,
                "chosen_from_data": f is not self._fixed,
            }
        corr = correlators(acc.counts)
        self.epochs += 1
        return EpochFigures(
            functional=f.name if f is not None else "",
            bell=bell,
            bell_window=bell_w,
            correlators=None if corr is None else corr[0],
            correlator_errors=None if corr is None else corr[1],
            contrast=correlation_contrast(acc.counts),
            rates=rates,
            figures=tuple(figures),
            extras=extras,
        )

"""Stopping targets: "stop when the evidence or the estimate is good enough".

A target is written as a short string and parsed strictly:

``p<=1e-6`` (or ``p<1e-6``)
    the stopping-safe p-value against local realism is at most ``1e-6``; needs a
    random-setting stream.
``S_lcb>2@0.01``, ``lcb>local@0.01``, ``lcb>=2.1@0.05``
    the lower confidence-sequence bound of the Bell value at level ``alpha`` (after ``@``)
    exceeds a number or the functional's local bound; the prefix before ``_lcb`` is a free
    label (``S``, ``I``, ...).  An i.i.d. estimate, not a test of local realism.
``v<1@0.01`` (or ``v<=0.95@0.01``, ``v_ucb<1@0.01``)
    the upper bound on the white-noise visibility at level ``alpha`` is below the number
    (the bound is an input figure).

:meth:`ConfidenceTarget.evaluate` looks at one snapshot's figures (a mapping or an object with
attributes); :class:`TargetWatch` latches the first time the target is met (fires once).

Figure names read: ``p_value`` (float), ``random_settings`` (bool, optional), ``bell_lcb`` and
``visibility_ucb`` (a callable ``alpha -> bound`` or a mapping ``{alpha: bound}``),
``local_bound`` (float, for ``local``), ``time`` (s) and ``trials`` (optional).
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable, Mapping
from dataclasses import dataclass

from labwatch.stats._checks import StatsError

__all__ = [
    "TARGET_FORMS",
    "ConfidenceTarget",
    "TargetDecision",
    "TargetParseError",
    "TargetWatch",
    "parse_target",
]

#: Examples of every accepted form (quoted in parse errors).
TARGET_FORMS: tuple[str, ...] = (
    "p<=1e-6",
    "p<1e-6",
    "S_lcb>2@0.01",
    "lcb>local@0.01",
    "lcb>=2.1@0.05",
    "v<1@0.01",
    "v<=0.95@0.01",
)

#: Kinds of target.
TARGET_KINDS: tuple[str, ...] = ("p_value", "bell_lcb", "visibility_ucb")

_NUMBER = r"[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?"
_P = re.compile(rf"^p(<=|<)({_NUMBER})$")
_LCB = re.compile(rf"^(?:([A-Za-z][A-Za-z0-9]*)_)?lcb(>=|>)({_NUMBER}|local)@({_NUMBER})$")
_V = re.compile(rf"^v(?:_ucb)?(<=|<)({_NUMBER})@({_NUMBER})$")


class TargetParseError(StatsError):
    """A target string that is not one of the accepted forms."""


def _fail(text: str, why: str) -> TargetParseError:
    return TargetParseError(
        f"cannot parse target {text!r}: {why}; accepted forms: {', '.join(TARGET_FORMS)}"
    )


def _level(text: str, value: str, what: str) -> float:
    v = float(value)
    if not 0.0 < v < 1.0:
        raise _fail(text, f"{what} must be in (0, 1), got {value}")
    return v


@dataclass(frozen=True)
class TargetDecision:
    """Whether a target is met at one snapshot.

    Attributes
    ----------
    met : bool
    target : str
        The target as written.
    time : float or None
        Snapshot time (s) when met or checked.
    trials : int or None
        Trials behind the snapshot.
    value : float
        The figure compared (p-value, lower bound or visibility bound; ``nan`` if missing).
    threshold : float
        What it was compared with.
    reason : str
        A sentence saying why the target is or is not met, with the figure's assumptions.
    fired_now : bool
        ``TargetWatch`` only: this check is the first one at which the target was met.
    """

    met: bool
    target: str
    time: float | None
    trials: int | None
    value: float
    threshold: float
    reason: str
    fired_now: bool = False


def _get(figures: object, name: str) -> object:
    if isinstance(figures, Mapping):
        return figures.get(name)
    return getattr(figures, name, None)


def _at_level(figure: object, alpha: float) -> float | None:
    if figure is None:
        return None
    if callable(figure):
        return float(figure(alpha))
    if isinstance(figure, Mapping):
        for key, value in figure.items():
            if math.isclose(float(key), alpha, rel_tol=1e-12):
                return float(value)
        return None
    raise StatsError(
        f"a level-dependent figure must be a callable alpha -> bound or a mapping "
        f"{{alpha: bound}}, got {figure!r}"
    )


@dataclass(frozen=True)
class ConfidenceTarget:
    """A parsed stopping target (use :func:`parse_target` or :meth:`parse`).

    Attributes
    ----------
    text : str
        The target as written.
    kind : {"p_value", "bell_lcb", "visibility_ucb"}
    threshold : float or None
        Number compared with; ``None`` for ``local`` (the local bound from the figures).
    strict : bool
        ``<``/``>`` (True) or ``<=``/``>=`` (False).
    alpha : float or None
        Level of the confidence bound (``None`` for p-value targets).
    label : str
        Name before ``_lcb`` (``S``, ``I``...), else ``""``.
    """

    text: str
    kind: str
    threshold: float | None
    strict: bool
    alpha: float | None
    label: str = ""

    @classmethod
    def parse(cls, text: str) -> ConfidenceTarget:
        """Parse ``text`` strictly; raise :class:`TargetParseError` listing the allowed forms."""
        if not isinstance(text, str):
            raise _fail(repr(text), "a target is a string")
        compact = "".join(text.split())
        if not compact:
            raise _fail(text, "empty")
        if m := _P.match(compact):
            return cls(text, "p_value", _level(text, m[2], "the p-value"), m[1] == "<", None)
        if m := _LCB.match(compact):
            threshold = None if m[3] == "local" else float(m[3])
            alpha = _level(text, m[4], "the level after @")
            return cls(text, "bell_lcb", threshold, m[2] == ">", alpha, m[1] or "")
        if m := _V.match(compact):
            alpha = _level(text, m[3], "the level after @")
            return cls(text, "visibility_ucb", float(m[2]), m[1] == "<", alpha)
        raise _fail(text, "not a recognised form")

    def evaluate(self, figures: Mapping[str, object] | object) -> TargetDecision:
        """Is the target met by this snapshot's ``figures``?  Pure; see the module docstring."""
        time = _get(figures, "time")
        trials = _get(figures, "trials")
        time = None if time is None else float(time)  # type: ignore[arg-type]
        trials = None if trials is None else int(trials)  # type: ignore[call-overload]

        def decide(met: bool, value: float, threshold: float, reason: str) -> TargetDecision:
            return TargetDecision(met, self.text, time, trials, value, threshold, reason)

        if self.kind == "p_value":
            assert self.threshold is not None
            if _get(figures, "random_settings") is False:
                return decide(
                    False,
                    math.nan,
                    self.threshold,
                    "a p-value target needs a "
                    "random-setting stream (settings held in blocks cannot test "
                    "local realism)",
                )
            p = _get(figures, "p_value")
            if p is None:
                return decide(False, math.nan, self.threshold, "no stopping-safe p-value yet")
            p = float(p)  # type: ignore[arg-type]
            met = p < self.threshold if self.strict else p <= self.threshold
            rel = ("<" if self.strict else "<=") if met else (">=" if self.strict else ">")
            return decide(
                met,
                p,
                self.threshold,
                f"p = {p:.3g} {rel} {self.threshold:g} (random settings, stopping-safe)",
            )
        assert self.alpha is not None
        if self.kind == "bell_lcb":
            threshold = self.threshold
            if threshold is None:
                bound = _get(figures, "local_bound")
                if bound is None:
                    return decide(False, math.nan, math.nan, "no local bound given for 'local'")
                threshold = float(bound)  # type: ignore[arg-type]
            lcb = _at_level(_get(figures, "bell_lcb"), self.alpha)
            if lcb is None:
                return decide(
                    False, math.nan, threshold, f"no lower confidence bound at level {self.alpha:g}"
                )
            met = lcb > threshold if self.strict else lcb >= threshold
            name = self.label or "Bell value"
            rel = (">" if self.strict else ">=") if met else ("<=" if self.strict else "<")
            return decide(
                met,
                lcb,
                threshold,
                f"{name} lower bound {lcb:.4g} {rel} {threshold:g} at level "
                f"{self.alpha:g} (i.i.d. estimate, not a test of local realism)",
            )
        assert self.threshold is not None
        ucb = _at_level(_get(figures, "visibility_ucb"), self.alpha)
        if ucb is None:
            return decide(
                False,
                math.nan,
                self.threshold,
                f"no visibility upper bound at level {self.alpha:g}",
            )
        met = ucb < self.threshold if self.strict else ucb <= self.threshold
        rel = ("<" if self.strict else "<=") if met else (">=" if self.strict else ">")
        return decide(
            met,
            ucb,
            self.threshold,
            f"visibility upper bound {ucb:.4g} {rel} {self.threshold:g} at level {self.alpha:g}",
        )


def parse_target(text: str) -> ConfidenceTarget:
    """Parse a target string (see the module docstring for the forms)."""
    return ConfidenceTarget.parse(text)


class TargetWatch:
    """Checks a target at every snapshot and latches the first time it is met.

    Parameters
    ----------
    target : str or ConfidenceTarget
    on_fire : callable, optional
        Called once with the first met :class:`TargetDecision`.
    """

    def __init__(
        self,
        target: str | ConfidenceTarget,
        on_fire: Callable[[TargetDecision], None] | None = None,
    ) -> None:
        self.target = target if isinstance(target, ConfidenceTarget) else parse_target(target)
        self.on_fire = on_fire
        self.decision: TargetDecision | None = None

    @property
    def fired(self) -> bool:
        return self.decision is not None

    def check(self, figures: Mapping[str, object] | object) -> TargetDecision:
        """Evaluate now; after the first success keep returning that decision (not re-fired)."""
        if self.decision is not None:
            d = self.decision
            return TargetDecision(
                d.met, d.target, d.time, d.trials, d.value, d.threshold, d.reason, fired_now=False
            )
        d = self.target.evaluate(figures)
        if d.met:
            d = TargetDecision(
                d.met, d.target, d.time, d.trials, d.value, d.threshold, d.reason, fired_now=True
            )
            self.decision = d
            if self.on_fire is not None:
                self.on_fire(d)
        return d

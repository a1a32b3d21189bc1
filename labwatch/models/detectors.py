"""Threshold-detector model: efficiencies, dark counts, coincidence window, accidentals.

Two ways of turning Born-rule probabilities ``p[x, y, a, b]`` into data are modelled.

**Per emitted pair, no-click kept** (:meth:`DetectorModel.trial_probabilities`).  One trial is
one emitted pair and its coincidence window of full width ``tau``.  Party A's photon goes to
detector ``a`` (Born rule) and fires it with probability ``eta_a``; independently every
detector ``k`` of the party has a dark count in the window with probability
``q_k = 1 - exp(-r_k tau)``.  If no detector fires the trial is recorded as the extra outcome
``d`` ("no click").  *Double clicks* (two or more detectors of one party firing) are assigned
uniformly at random to one of the fired detectors -- one of the common conventions (common
practice, no source); it keeps the no-click outcome exactly "nothing fired".  Multi-pair
emission is not modelled.  The result has shape ``(m_A, m_B, d_A + 1, d_B + 1)``.

**Coincidences only** (:meth:`DetectorModel.coincidence_rates`), the fair-sampling view of a
continuous-wave experiment: true coincidences ``R p[x,y,a,b] eta_a eta_b`` plus accidental
coincidences ``R_acc = S_A S_B tau`` from the singles rates ``S``.  ``tau`` is the *full*
width of the window: a coincidence is counted when ``|t_A - t_B| < tau / 2``, so a detector
pair with uncorrelated Poisson rates ``S_A``, ``S_B`` collects ``S_A S_B tau`` accidentals per
second (common practice, no source; valid while ``S tau << 1``).  Some groups quote the
half-width instead; then use ``window_s = 2 * half_width``.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

__all__ = [
    "DetectorError",
    "DetectorModel",
    "accidental_coincidence_rate",
    "click_response",
]


class DetectorError(ValueError):
    """Detector parameters are out of range or do not fit the number of outcomes."""


def _as_per_detector(value: float | Sequence[float], d: int, name: str) -> NDArray[np.float64]:
    arr = np.asarray(value, dtype=np.float64)
    if arr.ndim == 0:
        return np.full(d, float(arr))
    if arr.shape != (d,):
        raise DetectorError(f"{name} needs one value per detector ({d}), got {value!r}")
    return arr.copy()


def _check_values(value: float | Sequence[float], name: str, upper: float | None) -> None:
    arr = np.asarray(value, dtype=np.float64)
    if arr.ndim > 1 or arr.size == 0 or not np.all(np.isfinite(arr)):
        raise DetectorError(f"{name} must be a finite number or a list of them, got {value!r}")
    if np.any(arr < 0) or (upper is not None and np.any(arr > upper)):
        bounds = f"[0, {upper:g}]" if upper is not None else ">= 0"
        raise DetectorError(f"{name} must lie in {bounds}, got {value!r}")


def click_response(efficiency: ArrayLike, dark_probability: ArrayLike) -> NDArray[np.float64]:
    """Response matrix ``R[a, o]`` of one party's ``d`` threshold detectors in one window.

    Parameters
    ----------
    efficiency : array_like, shape (d,)
        ``eta_k``: probability that detector ``k`` fires when the photon reaches it.
    dark_probability : array_like, shape (d,)
        ``q_k``: probability of a dark count of detector ``k`` within the window.

    Returns
    -------
    ndarray, shape (d, d + 1)
        ``R[a, o]`` = probability of recording outcome ``o`` (``o = d``: no click) when the
        photon was headed for detector ``a``.  Double clicks are split uniformly among the
        fired detectors.  Rows sum to one.

    Notes
    -----
    ``R[a, o] = c_o * E[1 / (1 + N)]`` where ``c_o`` is the firing probability of ``o`` and
    ``N`` the number of other fired detectors, a Poisson-binomial variable whose distribution
    is built by dynamic programming over the detectors, vectorised over ``(a, o)``.
    """
    eta = np.asarray(efficiency, dtype=np.float64)
    q = np.asarray(dark_probability, dtype=np.float64)
    d = eta.shape[0]
    # fire[a, k]: probability that detector k fires given the photon went to detector a
    fire = np.broadcast_to(q, (d, d)).copy()
    diag = np.arange(d)
    fire[diag, diag] = 1.0 - (1.0 - eta) * (1.0 - q)
    # pmf[a, o, n]: distribution of the number of fired detectors other than o
    pmf = np.zeros((d, d, d))
    pmf[:, :, 0] = 1.0
    for k in range(d):
        pk = np.broadcast_to(fire[:, k][:, None], (d, d)).copy()
        pk[:, k] = 0.0  # detector o = k is not one of "the others"
        shifted = np.zeros_like(pmf)
        shifted[:, :, 1:] = pmf[:, :, :-1]
        pmf = pmf * (1.0 - pk[:, :, None]) + shifted * pk[:, :, None]
    mean_share = pmf @ (1.0 / (1.0 + np.arange(d)))  # E[1 / (1 + N)], shape (d, d)
    out = np.empty((d, d + 1))
    out[:, :d] = fire * mean_share
    out[:, d] = np.prod(1.0 - fire, axis=1)
    return out


def accidental_coincidence_rate(
    rate_a_hz: ArrayLike, rate_b_hz: ArrayLike, window_s: float
) -> NDArray[np.float64]:
    """Accidental coincidence rate ``R_acc = S_A S_B tau`` (Hz) of uncorrelated detectors.

    ``tau`` is the full window width (see the module notes).  Broadcasts ``rate_a_hz`` and
    ``rate_b_hz`` as an outer product over their last axes when both are arrays: shapes
    ``(..., d_A)`` and ``(..., d_B)`` give ``(..., d_A, d_B)``.
    """
    sa = np.asarray(rate_a_hz, dtype=np.float64)
    sb = np.asarray(rate_b_hz, dtype=np.float64)
    if float(window_s) < 0 or np.any(sa < 0) or np.any(sb < 0):
        raise DetectorError(
            f"rates and window must be non-negative, got {rate_a_hz!r}, {rate_b_hz!r}, {window_s!r}"
        )
    if sa.ndim == 0 or sb.ndim == 0:
        return sa * sb * float(window_s)
    return sa[..., :, None] * sb[..., None, :] * float(window_s)


@dataclass(frozen=True)
class DetectorModel:
    """Threshold detectors of both parties and the pair source feeding them.

    Parameters
    ----------
    efficiency_a, efficiency_b : float or sequence of float
        Detection efficiency (heralding efficiency including losses) in ``[0, 1]``, one value
        for all detectors of the party or one per detector (outcome).
    dark_rate_a_hz, dark_rate_b_hz : float or sequence of float
        Dark-count rate per detector, Hz.
    window_s : float
        Full coincidence-window width ``tau``, seconds.
    pair_rate_hz : float
        Emitted pairs per second (Poisson), Hz.

    Examples
    --------
    >>> det = DetectorModel(efficiency_a=0.8, efficiency_b=0.8)
    >>> det.response("a", 2).round(3)
    array([[0.8, 0. , 0.2],
           [0. , 0.8, 0.2]])
    """

    efficiency_a: float | tuple[float, ...] = 1.0
    efficiency_b: float | tuple[float, ...] = 1.0
    dark_rate_a_hz: float | tuple[float, ...] = 0.0
    dark_rate_b_hz: float | tuple[float, ...] = 0.0
    window_s: float = 1e-9
    pair_rate_hz: float = 1e5

    def __post_init__(self) -> None:
        for name in ("efficiency_a", "efficiency_b", "dark_rate_a_hz", "dark_rate_b_hz"):
            value = getattr(self, name)
            _check_values(value, name, 1.0 if name.startswith("eff") else None)
            if np.ndim(value) == 1:
                object.__setattr__(self, name, tuple(float(v) for v in value))
            else:
                object.__setattr__(self, name, float(value))
        for name in ("window_s", "pair_rate_hz"):
            value = float(getattr(self, name))
            if not (math.isfinite(value) and value >= 0):
                raise DetectorError(f"{name} must be a finite number >= 0, got {value!r}")
            object.__setattr__(self, name, value)

    _PARTIES = ("a", "b")

    def _party(self, party: str) -> str:
        if party not in self._PARTIES:
            raise DetectorError(f"party must be one of {self._PARTIES}, got {party!r}")
        return party

    def efficiencies(self, party: str, d: int) -> NDArray[np.float64]:
        """Per-detector efficiencies of ``party`` (``"a"`` or ``"b"``), shape ``(d,)``."""
        value = self.efficiency_a if self._party(party) == "a" else self.efficiency_b
        return _as_per_detector(value, d, f"efficiency_{party}")

    def dark_rates_hz(self, party: str, d: int) -> NDArray[np.float64]:
        """Per-detector dark-count rates of ``party`` in Hz, shape ``(d,)``."""
        value = self.dark_rate_a_hz if self._party(party) == "a" else self.dark_rate_b_hz
        return _as_per_detector(value, d, f"dark_rate_{party}_hz")

    def dark_probabilities(self, party: str, d: int) -> NDArray[np.float64]:
        """Probability of at least one dark count per detector in one window, ``1 - e^{-r tau}``."""
        return -np.expm1(-self.dark_rates_hz(party, d) * self.window_s)

    def response(self, party: str, d: int) -> NDArray[np.float64]:
        """:func:`click_response` of ``party``'s ``d`` detectors, shape ``(d, d + 1)``."""
        return click_response(self.efficiencies(party, d), self.dark_probabilities(party, d))

    def trial_probabilities(self, probabilities: ArrayLike) -> NDArray[np.float64]:
        """Per-emitted-pair outcome probabilities with the no-click outcome kept.

        Parameters
        ----------
        probabilities : array_like, shape (m_A, m_B, d_A, d_B)
            Born-rule ``p(a, b | x, y)`` of the photons reaching the detectors.

        Returns
        -------
        ndarray, shape (m_A, m_B, d_A + 1, d_B + 1)
            Outcome ``d_A`` (``d_B``) is "no click"; each setting pair sums to one.
        """
        p = np.asarray(probabilities, dtype=np.float64)
        _, _, d_a, d_b = p.shape
        ra, rb = self.response("a", d_a), self.response("b", d_b)
        return np.einsum("xyab,ai,bj->xyij", p, ra, rb)

    def singles_rates(
        self, probabilities: ArrayLike
    ) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """Expected singles rates (Hz) per detector: ``S = R P(click of k) + r_k``.

        Returns ``(S_A, S_B)`` with shapes ``(m_A, d_A)`` and ``(m_B, d_B)``: Alice's rate for
        each of her settings (Bob's marginal is taken at his setting 0, Alice's at hers;
        no-signalling makes the choice immaterial for quantum data).  Dead time and
        saturation are not modelled.
        """
        p = np.asarray(probabilities, dtype=np.float64)
        _, _, d_a, d_b = p.shape
        out = []
        for party, marg, d in (("a", p[:, 0].sum(axis=2), d_a), ("b", p[0].sum(axis=1), d_b)):
            eta = self.efficiencies(party, d)
            dark = self.dark_rates_hz(party, d)
            out.append(self.pair_rate_hz * marg * eta + dark)
        return out[0], out[1]

    def true_coincidence_rates(self, probabilities: ArrayLike) -> NDArray[np.float64]:
        """``R p[x,y,a,b] eta_a eta_b`` (Hz), shape ``(m_A, m_B, d_A, d_B)``."""
        p = np.asarray(probabilities, dtype=np.float64)
        _, _, d_a, d_b = p.shape
        eta = np.outer(self.efficiencies("a", d_a), self.efficiencies("b", d_b))
        return self.pair_rate_hz * p * eta[None, None]

    def accidental_rates(self, probabilities: ArrayLike) -> NDArray[np.float64]:
        """Accidental coincidence rates ``S_A[x,a] S_B[y,b] tau`` (Hz), ``(m_A, m_B, d_A, d_B)``."""
        sa, sb = self.singles_rates(probabilities)
        return sa[:, None, :, None] * sb[None, :, None, :] * self.window_s

    def coincidence_rates(self, probabilities: ArrayLike) -> NDArray[np.float64]:
        """Detected coincidence rates, true plus accidental (Hz), ``(m_A, m_B, d_A, d_B)``."""
        return self.true_coincidence_rates(probabilities) + self.accidental_rates(probabilities)

    def coincidence_probabilities(self, probabilities: ArrayLike) -> NDArray[np.float64]:
        """Detected-coincidence distribution per setting pair (fair sampling), same shape.

        ``coincidence_rates`` normalised over ``(a, b)`` for each ``(x, y)``.

        Raises
        ------
        DetectorError
            A setting pair has zero coincidence rate (e.g. zero efficiency, no dark counts).
        """
        rates = self.coincidence_rates(probabilities)
        totals = rates.sum(axis=(2, 3))
        if np.any(totals <= 0):
            raise DetectorError("a setting pair has zero coincidence rate; nothing is detected")
        return rates / totals[:, :, None, None]

    def detected_probabilities(
        self, probabilities: ArrayLike, keep_no_click: bool = False
    ) -> NDArray[np.float64]:
        """:meth:`trial_probabilities` if ``keep_no_click``, else :meth:`coincidence_probabilities`.

        Shape ``(m_A, m_B, d_A + 1, d_B + 1)`` or ``(m_A, m_B, d_A, d_B)`` respectively.
        """
        if keep_no_click:
            return self.trial_probabilities(probabilities)
        return self.coincidence_probabilities(probabilities)

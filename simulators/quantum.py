"""Quantum pair sources: Born-rule probabilities of a bipartite state, seen through detectors.

``QuantumSource`` is the general form (any state, any bases, any :class:`DetectorModel`);
``polarization_source`` builds a polarization-entangled photon pair with waveplate analyzers,
``qudit_source`` a high-dimensional pair measured in mutually unbiased bases.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence

import numpy as np
from numpy.typing import ArrayLike, NDArray

from labwatch.models.bases import (
    CHSH_HWP_DEG,
    as_bases,
    haar_unitary,
    mutually_unbiased_bases,
    polarization_analyzer_basis,
    rotate,
)
from labwatch.models.born import probabilities as born_probabilities
from labwatch.models.detectors import DetectorModel
from labwatch.models.states import as_density_matrix, maximally_entangled, with_white_noise
from labwatch.scenario import Scenario
from simulators.base import ProbabilitySource

__all__ = [
    "FRAME_OPTIONS",
    "QuantumSource",
    "polarization_source",
    "qudit_source",
]

#: Allowed ``frames`` of :func:`qudit_source`.
FRAME_OPTIONS: tuple[str, ...] = ("shared", "random")


class QuantumSource(ProbabilitySource):
    """A stationary i.i.d. source of photon pairs in a fixed state, measured in fixed bases.

    Parameters
    ----------
    state_or_rho : array_like
        Unit state vector ``(d_A d_B,)`` or density matrix ``(d_A d_B, d_A d_B)``.
    bases_a, bases_b : array_like, shape (m, d, d)
        Analyzer bases per setting (columns are basis vectors).
    pair_rate_hz : float, optional
        Emitted pairs per second; overrides ``detector.pair_rate_hz`` when given.
    detector : DetectorModel, optional
        Detectors; ideal (unit efficiency, no dark counts) when omitted.
    keep_no_click : bool
        ``True``: one trial per emitted pair, outcome ``d`` = no click, scenario
        ``(m_A, m_B, d_A + 1, d_B + 1)``.  ``False``: trials are detected coincidences
        (true + accidental), scenario ``(m_A, m_B, d_A, d_B)``.
    dims : (int, int), optional
        Local dimensions when they differ.

    Notes
    -----
    :attr:`born` holds the probabilities of the photons reaching the detectors; the source
    samples from :meth:`probabilities`, which include the detector model.
    """

    def __init__(
        self,
        state_or_rho: ArrayLike,
        bases_a: ArrayLike,
        bases_b: ArrayLike,
        pair_rate_hz: float | None = None,
        detector: DetectorModel | None = None,
        keep_no_click: bool = False,
        dims: Sequence[int] | None = None,
    ) -> None:
        det = detector if detector is not None else DetectorModel()
        if pair_rate_hz is not None:
            det = dataclasses.replace(det, pair_rate_hz=pair_rate_hz)
        self.detector: DetectorModel = det
        self.keep_no_click = bool(keep_no_click)
        self.state = as_density_matrix(state_or_rho)
        self.bases_a = as_bases(bases_a)
        self.bases_b = as_bases(bases_b)
        self.born = born_probabilities(self.state, self.bases_a, self.bases_b, dims)
        self.born.setflags(write=False)
        detected = det.detected_probabilities(self.born, self.keep_no_click)
        detected.setflags(write=False)
        self._detected = detected
        self.scenario = Scenario.from_shape(detected.shape)
        if self.keep_no_click:
            self._rate = det.pair_rate_hz
        else:  # mean over setting pairs: settings are assumed to be chosen uniformly
            self._rate = float(det.coincidence_rates(self.born).sum(axis=(2, 3)).mean())

    def trial_rate(self, t: float) -> float:
        """Trials per second: pairs emitted (no-click kept) or mean detected coincidences."""
        return self._rate

    def probabilities(self, t: float) -> NDArray[np.float64]:
        """Outcome probabilities per trial (read-only), shape :attr:`scenario.shape`."""
        return self._detected

    def singles_rates(self, t: float) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """Singles rates (Hz) per setting and detector, shapes ``(m_A, d_A)``, ``(m_B, d_B)``."""
        return self.detector.singles_rates(self.born)

    def __repr__(self) -> str:
        return (
            f"QuantumSource(scenario={self.scenario}, pair_rate_hz={self.detector.pair_rate_hz:g},"
            f" keep_no_click={self.keep_no_click})"
        )


def _same_detectors(
    efficiency: float, dark_rate_hz: float, window_s: float, pair_rate_hz: float
) -> DetectorModel:
    """Both parties with identical detectors (efficiency, dark counts in Hz, window in s)."""
    return DetectorModel(
        efficiency_a=efficiency,
        efficiency_b=efficiency,
        dark_rate_a_hz=dark_rate_hz,
        dark_rate_b_hz=dark_rate_hz,
        window_s=window_s,
        pair_rate_hz=pair_rate_hz,
    )


def polarization_source(
    visibility: float = 0.98,
    misalignment_deg: float = 0.0,
    pair_rate_hz: float = 50_000.0,
    efficiency: float = 0.25,
    dark_rate_hz: float = 300.0,
    window_s: float = 2e-9,
    keep_no_click: bool = False,
    hwp_deg: Sequence[Sequence[float]] = CHSH_HWP_DEG,
) -> QuantumSource:
    """Polarization-entangled pairs ``|Phi+>`` with white noise and CHSH analyzers.

    The state is ``V |Phi+><Phi+| + (1 - V) I / 4``.  Each party has a half-wave plate before a
    PBS; ``hwp_deg = ((a0, a1), (b0, b1))`` are the plate angles per setting (default: the
    optimal CHSH analyzers, ``S = 2 sqrt(2) V`` with :func:`labwatch.bell.chsh`).
    ``misalignment_deg`` is an extra rotation of Bob's half-wave plate (it rotates his
    analyzer by twice that angle).

    Parameters
    ----------
    visibility : float
        White-noise visibility ``V`` in ``[0, 1]``.
    misalignment_deg : float
        Extra HWP rotation on Bob, degrees.
    pair_rate_hz : float
        Emitted pairs per second.
    efficiency : float
        Detection efficiency of every detector, ``[0, 1]``.
    dark_rate_hz : float
        Dark-count rate per detector, Hz.
    window_s : float
        Full coincidence-window width, s.
    keep_no_click : bool
        See :class:`QuantumSource`.
    hwp_deg : ((float, float), (float, float))
        Half-wave-plate angles, degrees.
    """
    (a0, a1), (b0, b1) = hwp_deg
    bases_a = np.stack([polarization_analyzer_basis(a) for a in (a0, a1)])
    bases_b = np.stack([polarization_analyzer_basis(b + misalignment_deg) for b in (b0, b1)])
    rho = with_white_noise(maximally_entangled(2), visibility)
    det = _same_detectors(efficiency, dark_rate_hz, window_s, pair_rate_hz)
    return QuantumSource(rho, bases_a, bases_b, detector=det, keep_no_click=keep_no_click)


def qudit_source(
    d: int,
    n_bases: int = 2,
    frames: str = "shared",
    seed: int | None = 0,
    visibility: float = 1.0,
    pair_rate_hz: float = 50_000.0,
    efficiency: float = 1.0,
    dark_rate_hz: float = 0.0,
    window_s: float = 2e-9,
    keep_no_click: bool = False,
) -> QuantumSource:
    """A maximally entangled qudit pair with white noise, measured in mutually unbiased bases.

    Alice measures the first ``n_bases`` bases ``M_k`` of :func:`mutually_unbiased_bases`;
    Bob measures their complex conjugates ``conj(M_k)``, which for
    ``|Phi_d> = sum_j |jj>/sqrt(d)`` gives perfectly correlated outcomes at equal settings
    (``(U (x) conj(U)) |Phi_d> = |Phi_d>``).

    Parameters
    ----------
    d : int
        Local dimension; a prime power.
    n_bases : int
        Settings per party, ``1 <= n_bases <= d + 1``.
    frames : {"shared", "random"}
        ``"shared"``: both parties use the same reference frame.  ``"random"``: each party's
        bases are rotated by its own seeded Haar-random unitary, unknown to the analysis
        (``V_A M_k`` and ``V_B conj(M_k)``).
    seed : int or None
        Seed of the frame unitaries (used only with ``frames="random"``).
    visibility, pair_rate_hz, efficiency, dark_rate_hz, window_s, keep_no_click
        As in :func:`polarization_source`.
    """
    if frames not in FRAME_OPTIONS:
        raise ValueError(f"frames must be one of {FRAME_OPTIONS}, got {frames!r}")
    mubs = mutually_unbiased_bases(d)
    if isinstance(n_bases, bool) or not isinstance(n_bases, (int, np.integer)):
        raise ValueError(f"n_bases must be an integer, got {n_bases!r}")
    if not 1 <= n_bases <= len(mubs):
        raise ValueError(f"n_bases must be between 1 and {len(mubs)} for d={d}, got {n_bases}")
    bases_a = np.stack(mubs[:n_bases])
    bases_b = bases_a.conj()
    if frames == "random":
        rng = np.random.default_rng(seed)
        v_a, v_b = haar_unitary(d, rng), haar_unitary(d, rng)
        bases_a = rotate(bases_a, v_a)
        bases_b = rotate(bases_b, v_b)
    rho = with_white_noise(maximally_entangled(d), visibility)
    det = _same_detectors(efficiency, dark_rate_hz, window_s, pair_rate_hz)
    return QuantumSource(rho, bases_a, bases_b, detector=det, keep_no_click=keep_no_click)

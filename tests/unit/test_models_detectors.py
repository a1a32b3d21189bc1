"""Detector model: click statistics, accidentals, and published detection-efficiency thresholds."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from scipy.optimize import brentq, minimize

from labwatch.bell import ch_eberhard, chsh
from labwatch.models import (
    DetectorError,
    DetectorModel,
    accidental_coincidence_rate,
    chsh_bases,
    click_response,
    linear_polarization_basis,
    maximally_entangled,
    probabilities,
    schmidt_state,
)


def test_ideal_and_lossy_responses():
    assert np.allclose(DetectorModel().response("a", 3), np.hstack([np.eye(3), np.zeros((3, 1))]))
    r = DetectorModel(efficiency_b=(0.5, 0.9)).response("b", 2)
    assert np.allclose(r, [[0.5, 0.0, 0.5], [0.0, 0.9, 0.1]])


def brute_force_response(eta, q):
    """R[a, o] by enumerating every subset of fired detectors (independent of the DP)."""
    d = len(eta)
    out = np.zeros((d, d + 1))
    for a in range(d):
        fire = np.array(q, dtype=float)
        fire[a] = 1 - (1 - eta[a]) * (1 - q[a])
        for pattern in itertools.product((0, 1), repeat=d):
            prob = np.prod([f if s else 1 - f for f, s in zip(fire, pattern)])
            fired = [k for k in range(d) if pattern[k]]
            if not fired:
                out[a, d] += prob
            for k in fired:
                out[a, k] += prob / len(fired)  # double clicks split uniformly
    return out


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_click_response_matches_subset_enumeration(seed):
    rng = np.random.default_rng(seed)
    d = 4
    eta, q = rng.uniform(0.2, 1.0, d), rng.uniform(0.0, 0.4, d)
    r = click_response(eta, q)
    assert np.allclose(r, brute_force_response(eta, q), atol=1e-14)
    assert np.allclose(r.sum(axis=1), 1.0)


def test_dark_probability_in_window():
    det = DetectorModel(dark_rate_a_hz=1e6, window_s=1e-6)
    assert np.allclose(det.dark_probabilities("a", 2), 1 - math.exp(-1.0))


def test_trial_probabilities_shape_and_no_click_marginal():
    eta_a, eta_b = 0.7, 0.6
    det = DetectorModel(eta_a, eta_b)
    p = probabilities(maximally_entangled(2), *chsh_bases())
    t = det.trial_probabilities(p)
    assert t.shape == (2, 2, 3, 3)
    assert np.allclose(t.sum(axis=(2, 3)), 1.0)
    assert np.allclose(t[:, :, 2, 2], (1 - eta_a) * (1 - eta_b))
    assert np.allclose(t[:, :, :2, :2], eta_a * eta_b * p)


def test_accidental_rate_against_poisson_simulation():
    # Two independent Poisson streams, coincidences counted when |t_A - t_B| < tau/2:
    # expected S_A S_B tau T (common practice, no source).  Tolerance: 5 Poisson sigmas.
    rng = np.random.default_rng(42)
    s_a, s_b, tau, duration = 2e4, 5e4, 2e-6, 5.0
    ta = np.sort(rng.uniform(0, duration, rng.poisson(s_a * duration)))
    tb = np.sort(rng.uniform(0, duration, rng.poisson(s_b * duration)))
    counted = np.sum(
        np.searchsorted(tb, ta + tau / 2, side="left") - np.searchsorted(tb, ta - tau / 2, "right")
    )
    expected = float(accidental_coincidence_rate(s_a, s_b, tau)) * duration
    assert expected == pytest.approx(s_a * s_b * tau * duration)
    assert abs(counted - expected) < 5 * math.sqrt(expected)


def test_singles_and_coincidence_rates():
    det = DetectorModel(
        0.5, 0.4, dark_rate_a_hz=100.0, dark_rate_b_hz=(50.0, 70.0), window_s=1e-9, pair_rate_hz=1e5
    )
    p = probabilities(maximally_entangled(2), *chsh_bases())
    sa, sb = det.singles_rates(p)
    assert sa.shape == (2, 2)
    assert np.allclose(sa, 1e5 * 0.5 * 0.5 + 100.0)
    assert np.allclose(sb, 1e5 * 0.5 * 0.4 + np.array([50.0, 70.0]))
    acc = det.accidental_rates(p)
    assert np.allclose(acc[1, 0, 0, 1], sa[1, 0] * sb[0, 1] * 1e-9)
    assert np.allclose(det.coincidence_rates(p), 1e5 * 0.2 * p + acc)
    q = det.coincidence_probabilities(p)
    assert np.allclose(q.sum(axis=(2, 3)), 1.0)


def test_accidentals_reduce_chsh_like_white_noise():
    # Accidentals are uncorrelated across the analyzers, so they act as white noise:
    # S_detected = 2 sqrt(2) * true / (true + acc) per setting pair (direct algebra).
    det = DetectorModel(
        0.3, 0.3, dark_rate_a_hz=2e4, dark_rate_b_hz=2e4, window_s=5e-8, pair_rate_hz=2e5
    )
    p = probabilities(maximally_entangled(2), *chsh_bases())
    true = det.true_coincidence_rates(p).sum(axis=(2, 3))
    acc = det.accidental_rates(p).sum(axis=(2, 3))
    v = float((true / (true + acc))[0, 0])
    assert np.allclose(true / (true + acc), v)
    s = chsh().evaluate(det.coincidence_probabilities(p)).value
    assert s == pytest.approx(2 * math.sqrt(2) * v, rel=1e-12)
    assert s < 2 * math.sqrt(2)


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"efficiency_a": 1.2}, "efficiency_a"),
        ({"efficiency_b": (0.5, -0.1)}, "efficiency_b"),
        ({"dark_rate_a_hz": -1.0}, "dark_rate_a_hz"),
        ({"window_s": -1e-9}, "window_s"),
        ({"pair_rate_hz": math.inf}, "pair_rate_hz"),
    ],
)
def test_bad_parameters_are_refused(kwargs, message):
    with pytest.raises(DetectorError, match=message):
        DetectorModel(**kwargs)


def test_per_detector_list_must_fit_the_outcomes():
    det = DetectorModel(efficiency_a=(0.9, 0.8))
    with pytest.raises(DetectorError, match="one value per detector"):
        det.response("a", 3)
    with pytest.raises(DetectorError, match="party"):
        det.response("c", 2)


# --- detection-efficiency thresholds of the CH/Eberhard inequality, no fair sampling ---------

CH = ch_eberhard(3, 3)  # outcome 0 = "+" detector, 1 = other detector, 2 = no click


def _analyzers(angles):
    return np.stack([linear_polarization_basis(a) for a in angles])


def _ch_value(angles, psi, det):
    p = probabilities(psi, _analyzers(angles[:2]), _analyzers(angles[2:]))
    return CH.evaluate(det.trial_probabilities(p)).value


def _max_ch(psi, eta, starts):
    """Largest CH over linear-polarizer angles (BFGS from several starts)."""
    det = DetectorModel(eta, eta)
    best = max(
        (
            minimize(lambda a: -_ch_value(a, psi, det), x0, method="BFGS", options={"gtol": 1e-10})
            for x0 in starts
        ),
        key=lambda r: -r.fun,
    )
    return -best.fun, best.x


def _efficiency_threshold(r, seed=0):
    """Efficiency where the optimised CH of (|00> + r|11>)/sqrt(1 + r^2) crosses 0."""
    psi = schmidt_state([1.0, r])
    rng = np.random.default_rng(seed)
    starts = [np.array([0.0, 45.0, 22.5, -22.5])] + [rng.uniform(-90, 90, 4) for _ in range(3)]

    def best_ch(eta):
        value, x = _max_ch(psi, eta, starts)
        starts[:] = [x]  # warm start: the optimal angles move continuously with eta
        return value

    return brentq(best_ch, 0.6, 0.99, xtol=1e-7)


def test_garg_mermin_threshold_maximally_entangled():
    # Garg & Mermin, PRD 35, 3831 (1987): with the maximally entangled state, CH needs
    # eta > 2/(1 + sqrt(2)) = 0.8284.  Tolerance 1e-5: root-finder and optimiser tolerances.
    assert _efficiency_threshold(1.0) == pytest.approx(2 / (1 + math.sqrt(2)), abs=1e-5)


@pytest.mark.slow
def test_eberhard_threshold_falls_towards_two_thirds():
    # Eberhard, PRA 47, R747 (1993): with weakly entangled states (|00> + r|11>) the required
    # efficiency decreases towards 2/3 as r -> 0, and no state violates CH at eta <= 2/3.
    thresholds = [_efficiency_threshold(r) for r in (0.3, 0.1)]
    assert 2 / (1 + math.sqrt(2)) > thresholds[0] > thresholds[1] > 2 / 3
    assert thresholds[1] < 0.70
    rng = np.random.default_rng(7)
    for r in (0.3, 0.05):
        starts = [rng.uniform(-90, 90, 4) for _ in range(4)]
        assert _max_ch(schmidt_state([1.0, r]), 2 / 3, starts)[0] < 0

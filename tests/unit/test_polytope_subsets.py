"""Sub-scenario search over choices of settings."""

from __future__ import annotations

import itertools

import numpy as np
import pytest

from labwatch.models import cglmp_bases, haar_unitary, maximally_entangled, probabilities
from labwatch.polytope import white_noise_visibility
from labwatch.polytope.subsets import subset_visibilities


def three_setting_point(rng):
    """CGLMP d=3 settings at positions (2, 0) for Alice and (1, 2) for Bob, rest Haar-random."""
    a, b = cglmp_bases(3)
    ua = np.stack([a[1], haar_unitary(3, rng), a[0]])
    ub = np.stack([haar_unitary(3, rng), b[0], b[1]])
    return probabilities(maximally_entangled(3), ua, ub)


def test_every_pair_is_its_own_lp_and_the_best_is_reported():
    rng = np.random.default_rng(9)
    p = three_setting_point(rng)
    search = subset_visibilities(p, 2)
    assert len(search.subsets) == 9  # C(3,2)^2
    pairs = [(s.settings_a, s.settings_b) for s in search.subsets]
    assert pairs == list(
        itertools.product(itertools.combinations(range(3), 2), itertools.combinations(range(3), 2))
    )
    for s in search.subsets:
        sub = p[np.ix_(s.settings_a, s.settings_b)]
        # Same LP solved cold: warm re-solves on the shared solver agree to 1e-9.
        assert s.visibility == pytest.approx(white_noise_visibility(sub).visibility, abs=1e-9)
    assert search.best.visibility == min(s.visibility for s in search.subsets)
    # CGLMP settings sit at Alice (0, 2), Bob (1, 2): at most their visibility 0.6962
    # (Kaszlikowski et al., PRL 85, 4418 (2000)).
    cg = next(s for s in search.subsets if s.settings_a == (0, 2) and s.settings_b == (1, 2))
    assert cg.visibility == pytest.approx(0.6962, abs=5e-5)
    # More settings can only help the data: the full LP is at most the best subset.
    assert search.full.visibility <= search.best.visibility + 1e-9


def test_unequal_sizes_and_no_full():
    rng = np.random.default_rng(2)
    p = three_setting_point(rng)
    search = subset_visibilities(p, 1, 3, include_full=False)
    assert search.full is None and len(search.subsets) == 3
    # One setting for Alice is always local.
    assert all(s.visibility >= 1 - 1e-9 for s in search.subsets)


def test_bad_subset_size_is_quoted():
    p = three_setting_point(np.random.default_rng(0))
    with pytest.raises(ValueError, match="size_a must be .* got 4"):
        subset_visibilities(p, 4)

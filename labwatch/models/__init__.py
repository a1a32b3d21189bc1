"""Physics models: bipartite states, measurement bases, the Born rule and detectors.

Pure layer (numpy only).  Modules: :mod:`~labwatch.models.states`,
:mod:`~labwatch.models.bases`, :mod:`~labwatch.models.born`,
:mod:`~labwatch.models.detectors`, :mod:`~labwatch.models.finite_field`.
"""

from __future__ import annotations

from labwatch.models.bases import (
    CHSH_HWP_DEG,
    BasisError,
    NotPrimePowerError,
    as_bases,
    cglmp_bases,
    chsh_bases,
    computational_basis,
    fourier_basis,
    haar_unitary,
    half_wave_plate,
    linear_polarization_basis,
    mutually_unbiased_bases,
    polarization_analyzer_basis,
    quarter_wave_plate,
    rotate,
)
from labwatch.models.born import probabilities
from labwatch.models.detectors import (
    DetectorError,
    DetectorModel,
    accidental_coincidence_rate,
    click_response,
)
from labwatch.models.states import (
    StateError,
    as_density_matrix,
    density_matrix,
    dephased,
    infer_dims,
    is_density_matrix,
    maximally_entangled,
    schmidt_state,
    validate_density_matrix,
    validate_state_vector,
    with_white_noise,
)

__all__ = [
    "CHSH_HWP_DEG",
    "BasisError",
    "DetectorError",
    "DetectorModel",
    "accidental_coincidence_rate",
    "click_response",
    "NotPrimePowerError",
    "StateError",
    "as_bases",
    "as_density_matrix",
    "cglmp_bases",
    "chsh_bases",
    "computational_basis",
    "dephased",
    "density_matrix",
    "fourier_basis",
    "haar_unitary",
    "half_wave_plate",
    "infer_dims",
    "is_density_matrix",
    "linear_polarization_basis",
    "maximally_entangled",
    "mutually_unbiased_bases",
    "polarization_analyzer_basis",
    "probabilities",
    "quarter_wave_plate",
    "rotate",
    "schmidt_state",
    "validate_density_matrix",
    "validate_state_vector",
    "with_white_noise",
]

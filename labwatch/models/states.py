"""Bipartite quantum states of photon pairs: vectors, density matrices and noise models.

Conventions
-----------
A two-party state lives on ``C^{d_A} (x) C^{d_B}``.  Joint index ``j * d_B + k`` stands for
``|j>_A |k>_B`` (Alice's index major, as ``numpy.kron``).  A state vector has shape
``(d_A d_B,)``; a density matrix ``(d_A d_B, d_A d_B)``.  ``dims = (d_A, d_B)``; when omitted
the dimension must be a perfect square and ``d_A = d_B`` is assumed.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
from numpy.typing import ArrayLike, NDArray

__all__ = [
    "StateError",
    "as_density_matrix",
    "dephased",
    "density_matrix",
    "infer_dims",
    "is_density_matrix",
    "maximally_entangled",
    "schmidt_state",
    "validate_density_matrix",
    "validate_state_vector",
    "with_white_noise",
]

#: Default absolute tolerance of the Hermiticity, trace, norm and positivity checks.
STATE_ATOL = 1e-8


class StateError(ValueError):
    """A state vector or density matrix is malformed or unphysical."""


def _check_dimension(d: int, name: str = "d") -> int:
    if isinstance(d, bool) or not isinstance(d, (int, np.integer)) or d < 1:
        raise StateError(f"{name} must be a positive integer, got {d!r}")
    return int(d)


def infer_dims(total: int, dims: Sequence[int] | None = None) -> tuple[int, int]:
    """Local dimensions ``(d_A, d_B)`` of a joint dimension ``total``.

    Parameters
    ----------
    total : int
        Joint Hilbert-space dimension ``d_A * d_B``.
    dims : (int, int), optional
        Explicit local dimensions; checked against ``total``.  Without it ``total`` must be a
        perfect square.
    """
    if dims is not None:
        if len(dims) != 2:
            raise StateError(f"dims must be a pair (d_A, d_B), got {dims!r}")
        d_a = _check_dimension(dims[0], "d_A")
        d_b = _check_dimension(dims[1], "d_B")
        if d_a * d_b != total:
            raise StateError(f"dims {tuple(dims)!r} do not match the state dimension {total}")
        return d_a, d_b
    root = math.isqrt(int(total))
    if root * root != total:
        raise StateError(
            f"cannot infer (d_A, d_B) from dimension {total}: not a perfect square; pass dims"
        )
    return root, root


def maximally_entangled(d: int) -> NDArray[np.complex128]:
    """``|Phi_d> = sum_j |j>_A |j>_B / sqrt(d)``, shape ``(d*d,)``.

    Examples
    --------
    >>> maximally_entangled(2).real.round(4)
    array([0.7071, 0.    , 0.    , 0.7071])
    """
    d = _check_dimension(d)
    psi = np.zeros(d * d, dtype=np.complex128)
    psi[np.arange(d) * (d + 1)] = 1.0 / math.sqrt(d)
    return psi


def schmidt_state(coefficients: ArrayLike) -> NDArray[np.complex128]:
    """``sum_j c_j |j>_A |j>_B``, normalised; shape ``(d*d,)`` with ``d = len(coefficients)``.

    Complex coefficients are allowed (their phases are kept).

    Raises
    ------
    StateError
        Empty, non-finite or all-zero coefficients.
    """
    c = np.asarray(coefficients, dtype=np.complex128).ravel()
    if c.size == 0 or not np.all(np.isfinite(c)):
        raise StateError(f"Schmidt coefficients must be a non-empty finite list, got {c!r}")
    norm = float(np.linalg.norm(c))
    if norm == 0.0:
        raise StateError("Schmidt coefficients are all zero")
    d = c.size
    psi = np.zeros(d * d, dtype=np.complex128)
    psi[np.arange(d) * (d + 1)] = c / norm
    return psi


def validate_state_vector(psi: ArrayLike, atol: float = STATE_ATOL) -> NDArray[np.complex128]:
    """Return ``psi`` as a complex 1-D array after checking it is finite and has unit norm."""
    v = np.asarray(psi, dtype=np.complex128)
    if v.ndim != 1 or v.size == 0:
        raise StateError(f"a state vector must be 1-D and non-empty, got shape {v.shape}")
    if not np.all(np.isfinite(v)):
        raise StateError("state vector has non-finite entries")
    norm = float(np.linalg.norm(v))
    if abs(norm - 1.0) > atol:
        raise StateError(f"state vector must have norm 1, got {norm:.10g}")
    return v


def density_matrix(psi: ArrayLike) -> NDArray[np.complex128]:
    """``|psi><psi|`` of a unit state vector, shape ``(D, D)``."""
    v = validate_state_vector(psi)
    return np.outer(v, v.conj())


def validate_density_matrix(rho: ArrayLike, atol: float = STATE_ATOL) -> NDArray[np.complex128]:
    """Return ``rho`` as a complex array after checking it is a density matrix.

    Checks: square 2-D finite array, Hermitian (``max|rho - rho^H| <= atol``), unit trace
    (``|tr rho - 1| <= atol``) and positive semidefinite (smallest eigenvalue ``>= -atol``).

    Raises
    ------
    StateError
        Naming the failed check and the offending figure.
    """
    r = np.asarray(rho, dtype=np.complex128)
    if r.ndim != 2 or r.shape[0] != r.shape[1] or r.shape[0] == 0:
        raise StateError(f"a density matrix must be square and non-empty, got shape {r.shape}")
    if not np.all(np.isfinite(r)):
        raise StateError("density matrix has non-finite entries")
    herm = float(np.max(np.abs(r - r.conj().T)))
    if herm > atol:
        raise StateError(f"density matrix is not Hermitian (max |rho - rho^H| = {herm:.3g})")
    tr = complex(np.trace(r))
    if abs(tr - 1.0) > atol:
        raise StateError(f"density matrix must have trace 1, got {tr.real:.10g}")
    lowest = float(np.linalg.eigvalsh((r + r.conj().T) / 2)[0])
    if lowest < -atol:
        raise StateError(f"density matrix is not positive semidefinite (eigenvalue {lowest:.3g})")
    return r


def is_density_matrix(rho: ArrayLike, atol: float = STATE_ATOL) -> bool:
    """``True`` when :func:`validate_density_matrix` accepts ``rho``."""
    try:
        validate_density_matrix(rho, atol)
    except StateError:
        return False
    return True


def as_density_matrix(state: ArrayLike, atol: float = STATE_ATOL) -> NDArray[np.complex128]:
    """A validated density matrix from either a unit state vector or a density matrix."""
    arr = np.asarray(state)
    if arr.ndim == 1:
        return density_matrix(validate_state_vector(arr, atol))
    return validate_density_matrix(arr, atol)


def _check_fraction(value: float, name: str) -> float:
    v = float(value)
    if not (0.0 <= v <= 1.0):
        raise StateError(f"{name} must lie in [0, 1], got {value!r}")
    return v


def with_white_noise(
    rho: ArrayLike, visibility: float, dims: Sequence[int] | None = None
) -> NDArray[np.complex128]:
    """Isotropic (Werner-type) mixture ``V rho + (1 - V) I / (d_A d_B)``.

    Parameters
    ----------
    rho : array_like
        State vector ``(D,)`` or density matrix ``(D, D)``, ``D = d_A d_B``.
    visibility : float
        ``V`` in ``[0, 1]``.
    dims : (int, int), optional
        ``(d_A, d_B)``; only checked against ``D`` (the identity is the same either way), but
        required when ``D`` is not a perfect square.

    Returns
    -------
    ndarray, shape (D, D)
    """
    v = _check_fraction(visibility, "visibility")
    rho = as_density_matrix(rho)
    total = rho.shape[0]
    infer_dims(total, dims)
    return v * rho + (1.0 - v) * np.eye(total) / total


def dephased(
    rho: ArrayLike, strength: float, dims: Sequence[int] | None = None
) -> NDArray[np.complex128]:
    """Coloured (dephasing) noise in the product computational basis.

    ``rho -> (1 - s) rho + s diag(rho)``: every off-diagonal element, in particular the
    ``|jj><kk|`` coherences of an entangled pair, is multiplied by ``1 - s`` while the
    populations stay.  This is a mixture of the identity and the completely dephasing channel,
    hence a physical (CPTP) map for ``0 <= s <= 1``.

    Parameters
    ----------
    rho : array_like
        State vector or density matrix of dimension ``D = d_A d_B``.
    strength : float
        ``s`` in ``[0, 1]``; 1 removes all coherence.
    dims : (int, int), optional
        Local dimensions (checked; needed when ``D`` is not a perfect square).
    """
    s = _check_fraction(strength, "strength")
    rho = as_density_matrix(rho)
    infer_dims(rho.shape[0], dims)
    return (1.0 - s) * rho + s * np.diag(np.diag(rho))

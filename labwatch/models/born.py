"""Born-rule probabilities ``p[x, y, a, b]`` of local measurements on a bipartite state."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from numpy.typing import ArrayLike, NDArray

from labwatch.models.bases import as_bases
from labwatch.models.states import (
    StateError,
    infer_dims,
    validate_density_matrix,
    validate_state_vector,
)

__all__ = ["probabilities"]

#: Negative probabilities above this magnitude signal a bug, not rounding.
_NEGATIVE_ATOL = 1e-9


def probabilities(
    state: ArrayLike,
    bases_a: ArrayLike,
    bases_b: ArrayLike,
    dims: Sequence[int] | None = None,
) -> NDArray[np.float64]:
    """Born-rule probability tensor ``p(a, b | x, y) = <e_xa f_yb| rho |e_xa f_yb>``.

    Parameters
    ----------
    state : array_like
        Unit state vector, shape ``(d_A d_B,)``, or density matrix ``(d_A d_B, d_A d_B)``;
        index ``j * d_B + k`` is ``|j>_A |k>_B``.
    bases_a : array_like, shape (m_A, d_A, d_A) or (d_A, d_A)
        Alice's bases, columns are basis vectors (:mod:`labwatch.models.bases`).
    bases_b : array_like, shape (m_B, d_B, d_B) or (d_B, d_B)
        Bob's bases.
    dims : (int, int), optional
        ``(d_A, d_B)``; inferred from the bases when omitted.

    Returns
    -------
    ndarray, shape (m_A, m_B, d_A, d_B)
        Non-negative (rounding negatives clipped to 0), each setting pair summing to 1.

    Examples
    --------
    >>> from labwatch.models import maximally_entangled, computational_basis
    >>> probabilities(maximally_entangled(2), computational_basis(2), computational_basis(2))[0, 0]
    array([[0.5, 0. ],
           [0. , 0.5]])
    """
    ua = as_bases(bases_a)
    ub = as_bases(bases_b)
    d_a, d_b = ua.shape[1], ub.shape[1]
    arr = np.asarray(state)
    total = arr.shape[0] if arr.ndim >= 1 else 0
    if dims is not None:
        if tuple(infer_dims(total, dims)) != (d_a, d_b):
            raise StateError(f"dims {tuple(dims)!r} do not match the bases ({d_a}, {d_b})")
    if total != d_a * d_b:
        raise StateError(
            f"state of dimension {total} does not fit bases of dimensions {d_a} x {d_b}"
        )
    if arr.ndim == 1:
        psi = validate_state_vector(arr).reshape(d_a, d_b)
        # amp[x, y, a, b] = sum_jk conj(U_x[j, a]) conj(V_y[k, b]) psi[j, k]
        left = np.einsum("xja,jk->xak", ua.conj(), psi)
        amp = np.einsum("xak,ykb->xyab", left, ub.conj())
        p = amp.real**2 + amp.imag**2
    else:
        rho = validate_density_matrix(arr).reshape(d_a, d_b, d_a, d_b)
        # contract Alice's bra and ket first, then Bob's (pairwise einsums, no path search)
        t = np.einsum("xja,jkJK->xakJK", ua.conj(), rho)
        t = np.einsum("xakJK,xJa->xakK", t, ua)
        t = np.einsum("ykb,xakK->xyabK", ub.conj(), t)
        p = np.einsum("xyabK,yKb->xyab", t, ub).real
    worst = float(p.min())
    if worst < -_NEGATIVE_ATOL:
        raise StateError(f"Born rule produced a negative probability {worst:.3g}")
    p = np.clip(p, 0.0, None)
    sums = p.sum(axis=(2, 3))
    if np.max(np.abs(sums - 1.0)) > 1e-8:
        bad = float(sums.ravel()[np.argmax(np.abs(sums - 1.0))])
        raise StateError(f"probabilities do not sum to 1 (worst setting pair sums to {bad:.10g})")
    return p / sums[:, :, None, None]

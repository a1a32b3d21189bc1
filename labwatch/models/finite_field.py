"""Small finite-field arithmetic GF(p^k) for building mutually unbiased bases.

An element of GF(p^k) is stored as an integer ``0 <= n < p**k`` whose base-``p`` digits are the
coefficients of a polynomial in a root ``alpha`` of a fixed monic irreducible polynomial of
degree ``k`` (digit ``i`` multiplies ``alpha**i``).  Addition is digit-wise mod ``p``;
multiplication is polynomial multiplication reduced by that polynomial.

Only what the MUB construction needs is provided: multiplication tables, the absolute trace
``Tr: GF(p^k) -> GF(p)`` and the trace form ``M_s[i, j] = Tr(s alpha^i alpha^j)``.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass
from functools import cached_property

import numpy as np
from numpy.typing import NDArray

__all__ = ["GaloisField", "NotPrimePowerError", "prime_power"]

#: Largest field order we build (labwatch caps outcomes at 64).
MAX_ORDER = 1 << 12


class NotPrimePowerError(ValueError):
    """The requested dimension is not a prime power, so no finite field of that order exists."""


def _is_prime(n: int) -> bool:
    if n < 2:
        return False
    return all(n % f for f in range(2, int(n**0.5) + 1))


def prime_power(q: int) -> tuple[int, int]:
    """Return ``(p, k)`` with ``q == p**k`` and ``p`` prime.

    Raises
    ------
    NotPrimePowerError
        When ``q`` is not an integer prime power ``>= 2``.
    """
    if isinstance(q, bool) or not isinstance(q, (int, np.integer)) or q < 2:
        raise NotPrimePowerError(f"a field order must be an integer prime power >= 2, got {q!r}")
    q = int(q)
    p = next(f for f in range(2, q + 1) if q % f == 0)  # smallest prime factor
    k, rest = 0, q
    while rest % p == 0:
        rest //= p
        k += 1
    if rest != 1:
        raise NotPrimePowerError(f"{q} is not a prime power (it has prime factors {p} and others)")
    return p, k


def _poly_mod(num: list[int], den: list[int], p: int) -> list[int]:
    """Remainder of ``num / den`` over GF(p); coefficient lists, lowest degree first."""
    num = [c % p for c in num]
    inv_lead = pow(den[-1], p - 2, p)
    while len(num) >= len(den):
        factor = (num[-1] * inv_lead) % p
        shift = len(num) - len(den)
        for i, c in enumerate(den):
            num[shift + i] = (num[shift + i] - factor * c) % p
        while num and num[-1] == 0:
            num.pop()
    return num


def _irreducible_polynomial(p: int, k: int) -> tuple[int, ...]:
    """The first monic irreducible polynomial of degree ``k`` over GF(p) in lexicographic order.

    Coefficients lowest degree first, leading 1 included.  Irreducibility is checked by trial
    division by every monic polynomial of degree ``1..k//2`` (fine for the small fields here).
    """
    if k == 1:
        return (0, 1)
    divisors = [
        list(tail) + [1]
        for deg in range(1, k // 2 + 1)
        for tail in itertools.product(range(p), repeat=deg)
    ]
    for tail in itertools.product(range(p), repeat=k):
        if tail[0] == 0:
            continue  # divisible by x
        cand = list(tail) + [1]
        if all(_poly_mod(cand, div, p) for div in divisors):
            return tuple(cand)
    raise AssertionError(f"no irreducible polynomial of degree {k} over GF({p})")  # unreachable


@dataclass(frozen=True)
class GaloisField:
    """The finite field GF(p^k) in a polynomial basis ``1, alpha, ..., alpha^(k-1)``.

    Parameters
    ----------
    order : int
        ``q = p**k``; must be a prime power up to ``MAX_ORDER``.

    Examples
    --------
    >>> f = GaloisField(4)
    >>> f.p, f.k, f.modulus
    (2, 2, (1, 1, 1))
    >>> int(f.mul[2, 2])  # alpha * alpha = alpha + 1 in GF(4)
    3
    """

    order: int

    def __post_init__(self) -> None:
        prime_power(self.order)
        if self.order > MAX_ORDER:
            raise ValueError(f"field order {self.order} exceeds the supported maximum {MAX_ORDER}")

    @property
    def p(self) -> int:
        """The characteristic."""
        return prime_power(self.order)[0]

    @property
    def k(self) -> int:
        """The extension degree."""
        return prime_power(self.order)[1]

    @cached_property
    def modulus(self) -> tuple[int, ...]:
        """Monic irreducible polynomial defining ``alpha`` (coefficients lowest degree first)."""
        return _irreducible_polynomial(self.p, self.k)

    @cached_property
    def digits(self) -> NDArray[np.int64]:
        """``digits[n, i]``: coefficient of ``alpha**i`` in element ``n``, shape ``(q, k)``."""
        n = np.arange(self.order, dtype=np.int64)
        return (n[:, None] // self.p ** np.arange(self.k)[None, :]) % self.p

    def from_digits(self, digits: NDArray[np.int64]) -> NDArray[np.int64]:
        """Element numbers of coefficient vectors (last axis of length ``k``)."""
        return (np.asarray(digits) % self.p) @ (self.p ** np.arange(self.k))

    @cached_property
    def companion(self) -> NDArray[np.int64]:
        """Matrix of multiplication by ``alpha`` on coefficient vectors (mod ``p``)."""
        p, k = self.p, self.k
        c = np.zeros((k, k), dtype=np.int64)
        c[1:, :-1] = np.eye(k - 1, dtype=np.int64)
        c[:, -1] = [(-coef) % p for coef in self.modulus[:-1]]
        return c

    @cached_property
    def multiplication_matrices(self) -> NDArray[np.int64]:
        """``L[n]``: the ``k x k`` matrix of multiplication by element ``n`` (mod ``p``)."""
        p, k = self.p, self.k
        powers = [np.eye(k, dtype=np.int64)]
        for _ in range(k - 1):
            powers.append((self.companion @ powers[-1]) % p)
        stack = np.stack(powers)  # (k, k, k): alpha^i
        return np.einsum("ni,irc->nrc", self.digits, stack) % p

    @cached_property
    def mul(self) -> NDArray[np.int64]:
        """Multiplication table ``mul[m, n]`` of element numbers, shape ``(q, q)``."""
        prod = np.einsum("mrc,nc->mnr", self.multiplication_matrices, self.digits) % self.p
        return self.from_digits(prod)

    @cached_property
    def add(self) -> NDArray[np.int64]:
        """Addition table ``add[m, n]`` of element numbers, shape ``(q, q)``."""
        return self.from_digits(self.digits[:, None, :] + self.digits[None, :, :])

    @cached_property
    def trace(self) -> NDArray[np.int64]:
        """Absolute trace ``Tr(n) = n + n^p + ... + n^(p^(k-1))`` in ``{0..p-1}``, shape ``(q,)``.

        Computed as the trace of the multiplication matrix, which equals the field trace.
        """
        return np.trace(self.multiplication_matrices, axis1=1, axis2=2) % self.p

    def trace_form(self, s: int) -> NDArray[np.int64]:
        """``M_s[i, j] = Tr(s alpha^i alpha^j)``: a symmetric ``k x k`` matrix over GF(p).

        For ``s != 0`` it is non-degenerate (the trace form of a separable extension).
        """
        alpha_pow = np.array([self.p**i for i in range(self.k)])  # element numbers of alpha^i
        prod = self.mul[alpha_pow[:, None], alpha_pow[None, :]]
        return self.trace[self.mul[int(s), prod]]

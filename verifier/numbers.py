"""Number forms and fast modular arithmetic.

Only Mersenne numbers N = 2^p - 1 (p prime, p >= 3) are supported in this version. Arithmetic
works on gmpy2 ``mpz`` values kept in [0, N). Reduction modulo 2^p - 1 uses the identity
2^p = 1 (mod N): a value v is folded to (v & N) + (v >> p), and one conditional
subtraction brings it into [0, N) for any v <= (N-1)^2.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field

import gmpy2
from gmpy2 import mpz

from .errors import UsageError

#: Largest exponent accepted anywhere (a 512 MiB residue). Checked before any big number is built.
MAX_EXPONENT = 1 << 32

_MERSENNE_RE = re.compile(r"^\s*2\s*\^\s*([0-9]{1,12})\s*-\s*1\s*$")


@dataclass(frozen=True)
class Mersenne:
    """The modulus N = 2^p - 1 with p an odd prime, and arithmetic modulo it.

    Construct through :func:`parse_number` or :meth:`from_exponent`, which validate p.
    """

    p: int
    N: mpz = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "N", (mpz(1) << self.p) - 1)

    @classmethod
    def from_exponent(cls, p: int) -> Mersenne:
        """Validate p (prime, 3 <= p <= MAX_EXPONENT) and build the form.

        Raises UsageError when p is out of range or not prime.
        """
        if not 3 <= p <= MAX_EXPONENT:
            raise UsageError(f"exponent p={p} out of range: need 3 <= p <= 2^32")
        if not gmpy2.is_prime(p):
            raise UsageError(f"exponent p={p} is not prime, so 2^{p}-1 is trivially composite")
        return cls(p)

    # -- identity -------------------------------------------------------------------------
    @property
    def text(self) -> str:
        """Canonical spelling, e.g. ``2^86243-1``."""
        return f"2^{self.p}-1"

    @property
    def bits(self) -> int:
        return self.p

    @property
    def nbytes(self) -> int:
        """Length of a residue in the certificate (little-endian, fixed width)."""
        return (self.p + 7) // 8

    @property
    def known_order_exponent(self) -> int:
        """Exponent of the subgroup <-1, 2> whose elements everyone knows.

        -1 has order 2 and 2 has order p (2^p = 1 mod N), so the subgroup is cyclic of order 2p and
        every element g of it satisfies g^(2p) = 1.
        """
        return 2 * self.p

    # -- encoding -------------------------------------------------------------------------
    def to_bytes(self, x: mpz) -> bytes:
        return int(x).to_bytes(self.nbytes, "little")

    def from_bytes(self, data: bytes) -> mpz:
        """Decode a fixed-width residue. The caller checks the range."""
        return mpz(int.from_bytes(data, "little"))

    # -- arithmetic -----------------------------------------------------------------------
    def reduce(self, v: mpz) -> mpz:
        """Reduce 0 <= v <= (N-1)^2 (a product of two reduced values) into [0, N).

        The fold leaves at most (N-1) + (N-2) < 2N, so one conditional subtraction suffices. (At
        v = 2^(2p)-1 the fold gives 2N; that value is outside the contract.)
        """
        N, p = self.N, self.p
        v = (v & N) + (v >> p)
        if v >= N:
            v -= N
        return v

    def mul(self, a: mpz, b: mpz) -> mpz:
        return self.reduce(a * b)

    def square_n(self, x: mpz, n: int) -> mpz:
        """Return x^(2^n) mod N for x in [0, N). This is the hot loop of every run."""
        N, p = self.N, self.p
        for _ in range(n):
            x = x * x
            x = (x & N) + (x >> p)
            if x >= N:
                x -= N
        return x

    def pow(self, x: mpz, e: int) -> mpz:
        """x^e mod N for e >= 0: left-to-right sliding window (width 4, odd powers only).

        Used for Fiat-Shamir exponents (about 80 bits), where the fold reduction beats
        gmpy2.powmod's generic reduction several times over. Costs e.bit_length() - 1 squarings
        plus about bits/5 + 8 multiplications.
        """
        if e < 0:
            raise ValueError("negative exponent")
        if e == 0:
            return mpz(1)
        x2 = self.mul(x, x)
        odd = [x]  # x, x^3, ..., x^15
        for _ in range(7):
            odd.append(self.mul(odd[-1], x2))
        bits = bin(e)[2:]
        r: mpz | None = None
        i = 0
        while i < len(bits):
            if bits[i] == "0":
                r = self.mul(r, r) if r is not None else r
                i += 1
                continue
            j = min(i + 4, len(bits))
            while bits[j - 1] == "0":  # window ends on a 1, so its value is odd
                j -= 1
            if r is not None:
                r = self.square_n(r, j - i)
            w = int(bits[i:j], 2)
            r = odd[w >> 1] if r is None else self.mul(r, odd[w >> 1])
            i = j
        assert r is not None
        return r

    def inverse(self, x: mpz) -> mpz:
        return gmpy2.invert(x, self.N)

    def is_unit(self, x: mpz) -> bool:
        return 0 < x < self.N and gmpy2.gcd(x, self.N) == 1


def parse_number(text: str) -> Mersenne:
    """Parse the number syntax ``2^p-1`` (p prime, p >= 3).

    Raises UsageError with a message naming the accepted syntax for anything else.
    """
    m = _MERSENNE_RE.match(text)
    if not m:
        raise UsageError(
            f"cannot read number {text!r}: this version accepts Mersenne numbers written 2^p-1 "
            "with p prime, e.g. 2^86243-1"
        )
    return Mersenne.from_exponent(int(m.group(1)))


def validate_base(number: Mersenne, base: int) -> None:
    """Check a Fermat base for this number; raise UsageError if it is unusable.

    Bases must be 3 <= a < min(N - 1, 2^32), coprime to N, and not +-2^k mod N: those lie in
    the known subgroup <-1, 2> of order 2p, where every Mersenne number passes. (For p = 3 that
    subgroup is all of (Z/7Z)*, so no base avoids it; there the rule is void and 7 is prime.)
    """
    N = int(number.N)
    if not 3 <= base < min(N - 1, 1 << 32):
        raise UsageError(f"base {base} out of range: need 3 <= base < min(N-1, 2^32)")
    neg = N - base
    if 2 * number.p < N - 1 and (base & (base - 1) == 0 or neg & (neg - 1) == 0):
        raise UsageError(f"base {base} is +-2^k mod N: every 2^p-1 passes for it")
    if gmpy2.gcd(base, number.N) != 1:
        raise UsageError(f"base {base} shares a factor with {number.text}")


def fermat_verdict(number: Mersenne, base: int, final: mpz) -> tuple[str, str]:
    """From x_T = base^(2^p) = base^(N+1), return (result, residue64) of the base-a Fermat test.

    residue64 is the low 64 bits of base^(N-1) mod N, as 16 hex digits; N is a base-a PRP iff
    base^(N-1) = 1.
    """
    b = mpz(base)
    fermat = number.mul(final, number.inverse(number.mul(b, b)))
    return ("probable-prime" if fermat == 1 else "composite"), f"{int(fermat) & (2**64 - 1):016x}"

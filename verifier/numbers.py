"""Number forms, their fast reduction, and the groups the squaring chains live in.

Forms (all odd moduli N > 3, arithmetic on gmpy2 ``mpz`` values kept in [0, N)):

* :class:`Mersenne` 2^p - 1 (p prime) and :class:`Fermat` 2^(2^m) + 1, and in general
  :class:`KTwoN` k*2^n + c (k odd, c = +-1). Reduction uses k*2^n = -c (mod N): write
  v = a*2^n + b, then k*v = k*b - c*a (mod N), and the division by the small k is made exact by
  adding a multiple of N. For k = 1 that is the familiar shift-and-add fold. Measured with gmpy2
  on 86,000-bit moduli, squaring included: 3.6-4.0x faster than ``v % N`` (bench/bench_forms.py).
* :class:`GenericModulus` any odd N (plain ``%``): for delay / time-lock computations.

Groups (what Gerbicz checks and Pietrzak proofs operate on): a form itself is the group of units
(Z/NZ)*; :class:`LucasTorus` is the norm-one group of Z_N[sqrt 3] used by the Lucas-Lehmer test.
Every group offers mul, square_n, pow, equality of elements, a fixed-width encoding, an element
check, and ``known_order_exponent``: the exponent of the subgroup of elements whose order anybody
knows (see spec/protocol.md, section 5).
"""

from __future__ import annotations

import math
import re
from typing import Any

import gmpy2
from gmpy2 import mpz

from .errors import UsageError

#: Largest exponent accepted anywhere (a 512 MiB residue). Checked before any big number is built.
MAX_EXPONENT = 1 << 32
MAX_K = 1 << 32
#: A generic modulus may not have prime factors below this (they would give elements of known
#: small order): checked by trial division.
GENERIC_SMALL_FACTOR_BOUND = 1 << 16
MIN_GENERIC_BITS = 64
MAX_GENERIC_BITS = 16384  # matches the 4096 hex digits parse_number accepts


class _Exponentiation:
    """Sliding-window exponentiation for any group with mul, square_n and identity."""

    def mul(self, a: Any, b: Any) -> Any:
        raise NotImplementedError

    def square_n(self, x: Any, n: int) -> Any:
        raise NotImplementedError

    @property
    def identity(self) -> Any:
        raise NotImplementedError

    def pow(self, x: Any, e: int) -> Any:
        """x^e for e >= 0: left-to-right sliding window (width 4, odd powers only). Costs
        e.bit_length() - 1 squarings plus about bits/5 + 8 multiplications."""
        if e < 0:
            raise ValueError("negative exponent")
        if e == 0:
            return self.identity
        x2 = self.mul(x, x)
        odd = [x]  # x, x^3, ..., x^15
        for _ in range(7):
            odd.append(self.mul(odd[-1], x2))
        bits = bin(e)[2:]
        r: Any = None
        i = 0
        while i < len(bits):
            if bits[i] == "0":
                r = self.mul(r, r) if r is not None else r
                i += 1
                continue
            j = min(i + 4, len(bits))
            while bits[j - 1] == "0":  # the window ends on a 1, so its value is odd
                j -= 1
            if r is not None:
                r = self.square_n(r, j - i)
            w = int(bits[i:j], 2)
            r = odd[w >> 1] if r is None else self.mul(r, odd[w >> 1])
            i = j
        return r


class Modulus(_Exponentiation):
    """Arithmetic modulo an odd N, and the group (Z/NZ)* for proofs. Subclasses speed up
    ``reduce`` for special forms."""

    kind = "modulus"

    def __init__(self, N: int | mpz) -> None:
        self.N = mpz(N)

    # -- identity -----------------------------------------------------------------------------
    @property
    def text(self) -> str:
        """Canonical spelling."""
        return "0x" + format(int(self.N), "x")

    def __repr__(self) -> str:
        return f"{type(self).__name__}({self.text})"

    def __eq__(self, other: object) -> bool:
        return isinstance(other, Modulus) and other.text == self.text

    def __hash__(self) -> int:
        return hash(self.text)

    @property
    def bits(self) -> int:
        return int(self.N.bit_length())

    @property
    def nbytes(self) -> int:
        """Length of a residue in a certificate (little-endian, fixed width)."""
        return (self.bits + 7) // 8

    element_bytes = nbytes

    @property
    def known_order_exponent(self) -> int:
        """Exponent of the subgroup of elements of publicly known order: here <-1>, so 2."""
        return 2

    def in_known_subgroup(self, x: int) -> bool:
        """Whether x (mod N) lies in the subgroup of publicly known order."""
        x %= int(self.N)
        return x in (1, int(self.N) - 1)

    # -- encoding -------------------------------------------------------------------------------
    def to_bytes(self, x: mpz) -> bytes:
        return int(x).to_bytes(self.nbytes, "little")

    def from_bytes(self, data: bytes) -> mpz:
        """Decode a fixed-width residue. The caller checks the range (see check_element)."""
        return mpz(int.from_bytes(data, "little"))

    def check_element(self, x: mpz) -> str | None:
        """None if x is a valid group element (a unit in [1, N-1]), else the reason."""
        if not 0 < x < self.N:
            return "is outside [1, N-1]"
        if gmpy2.gcd(x, self.N) != 1:
            return "is not a unit modulo N"
        return None

    # -- arithmetic -----------------------------------------------------------------------------
    @property
    def identity(self) -> mpz:
        return mpz(1)

    def reduce(self, v: mpz) -> mpz:
        """Reduce 0 <= v <= (N-1)^2 (a product of two reduced values) into [0, N)."""
        return v % self.N

    def mul(self, a: mpz, b: mpz) -> mpz:
        return self.reduce(a * b)

    def square_n(self, x: mpz, n: int) -> mpz:
        """x^(2^n) mod N. The hot loop of every run."""
        reduce = self.reduce
        for _ in range(n):
            x = reduce(x * x)
        return x

    def inverse(self, x: mpz) -> mpz:
        return gmpy2.invert(x, self.N)


class KTwoN(Modulus):
    """N = k*2^n + c with k odd, 1 <= k < 2^32, n >= 1, c = +1 or -1."""

    kind = "k2n"

    def __init__(self, k: int, n: int, c: int) -> None:
        if c not in (1, -1) or k < 1 or k % 2 == 0 or n < 1:
            raise ValueError("need odd k >= 1, n >= 1, c = +-1")
        self.k, self.n, self.c = k, n, c
        super().__init__((mpz(k) << n) + c)
        self._mask = (mpz(1) << n) - 1
        # j with (v + j*N) divisible by k is j = -v * N^-1 (mod k)
        self._n_inv_k = pow(int(self.N % k), -1, k) if k > 1 else 0

    @property
    def text(self) -> str:
        sign = "+" if self.c > 0 else "-"
        return f"{self.k}*2^{self.n}{sign}1" if self.k > 1 else f"2^{self.n}{sign}1"

    @property
    def known_order_exponent(self) -> int:
        """If k = j^e (j an integer) and m divides both e and n, then u = j^(e/m) * 2^(n/m)
        satisfies u^m = k*2^n = -c: a public element of order 2m (c = +1) or m (c = -1). With E the
        largest such e, every such element and -1 are killed by 2*gcd(E, n) (spec/protocol.md, 5.8)."""
        if self.k == 1:
            return 2 * self.n  # 2^n = -c: 2 itself has order 2n or n
        E = 1
        for e in range(31, 1, -1):
            if gmpy2.iroot(mpz(self.k), e)[1]:
                E = e
                break
        return 2 * math.gcd(E, self.n)

    def reduce(self, v: mpz) -> mpz:
        """Fold with k*2^n = -c (mod N); at most a few corrections for small k."""
        N, k = self.N, self.k
        a, b = v >> self.n, v & self._mask
        w = k * b - self.c * a
        if k > 1:
            w = (w + ((-(w % k) * self._n_inv_k) % k) * N) // k
        while w < 0:
            w += N
        while w >= N:
            w -= N
        return w

    def square_n(self, x: mpz, n: int) -> mpz:
        reduce = self.reduce
        for _ in range(n):
            x = reduce(x * x)
        return x


class Mersenne(KTwoN):
    """N = 2^p - 1 with p an odd prime. Construct through :func:`parse_number` or
    :meth:`from_exponent`, which validate p."""

    kind = "mersenne"

    def __init__(self, p: int) -> None:
        super().__init__(1, p, -1)

    @property
    def p(self) -> int:
        return self.n

    @classmethod
    def from_exponent(cls, p: int) -> Mersenne:
        """Validate p (prime, 3 <= p <= MAX_EXPONENT) and build the form."""
        if not 3 <= p <= MAX_EXPONENT:
            raise UsageError(f"exponent p={p} out of range: need 3 <= p <= 2^32")
        if not gmpy2.is_prime(p):
            raise UsageError(f"exponent p={p} is not prime, so 2^{p}-1 is trivially composite")
        return cls(p)

    @property
    def known_order_exponent(self) -> int:
        """-1 has order 2 and 2 has order p (2^p = 1 mod N): <-1, 2> is cyclic of order 2p."""
        return 2 * self.p

    def in_known_subgroup(self, x: int) -> bool:
        x %= int(self.N)
        y = int(self.N) - x
        return x & (x - 1) == 0 or y & (y - 1) == 0

    def reduce(self, v: mpz) -> mpz:
        """Shift-and-add fold: (v & N) + (v >> p) <= (N-1) + (N-2) for v <= (N-1)^2, then one
        conditional subtraction."""
        N = self.N
        v = (v & N) + (v >> self.n)
        if v >= N:
            v -= N
        return v

    def square_n(self, x: mpz, n: int) -> mpz:
        N, p = self.N, self.n
        for _ in range(n):
            x = x * x
            x = (x & N) + (x >> p)
            if x >= N:
                x -= N
        return x

    def reduce_any(self, v: mpz) -> mpz:
        """Reduce any 0 <= v (a few folds for v up to a small multiple of N^2)."""
        N, p = self.N, self.n
        while v > N:
            v = (v & N) + (v >> p)
        return v if v < N else v - N


class Fermat(KTwoN):
    """F_m = 2^(2^m) + 1."""

    kind = "fermat"

    def __init__(self, m: int) -> None:
        if not 0 <= m <= 32:
            raise UsageError(f"Fermat index m={m} out of range: need 0 <= m <= 32")
        self.m = m
        super().__init__(1, 1 << m, 1)

    @property
    def text(self) -> str:
        return f"2^(2^{self.m})+1"

    @property
    def known_order_exponent(self) -> int:
        """2^(2^m) = -1, so 2 has order 2^(m+1) and <2> contains -1. For m >= 2 also
        sqrt(2) = 2^(n/4) * (2^(n/2) - 1) is public, of order 2^(m+2); it generates a cyclic group
        containing <2>, so 4n = 2^(m+2) kills every element named here."""
        return 4 * self.n

    def in_known_subgroup(self, x: int) -> bool:
        x %= int(self.N)
        y = int(self.N) - x
        return x & (x - 1) == 0 or y & (y - 1) == 0


class GenericModulus(Modulus):
    """Any odd N of at least 64 bits without prime factors below 2^16 (spec/protocol.md, 7)."""

    kind = "generic"

    @classmethod
    def checked(cls, N: int) -> GenericModulus:
        if N % 2 == 0 or N.bit_length() < MIN_GENERIC_BITS:
            raise UsageError(f"a generic modulus must be odd and at least {MIN_GENERIC_BITS} bits")
        if N.bit_length() > MAX_GENERIC_BITS:
            raise UsageError(f"modulus too large: at most {MAX_GENERIC_BITS} bits")
        q = 3
        while q < GENERIC_SMALL_FACTOR_BOUND:
            if N % q == 0:
                raise UsageError(f"modulus has the small factor {q}: it would give elements of known "
                                 "small order")
            q = int(gmpy2.next_prime(q))
        if gmpy2.is_power(N):
            raise UsageError("modulus is a perfect power: its root gives away the group structure")
        if gmpy2.is_prime(N):
            raise UsageError("modulus is prime: its group order N-1 is public, so nothing is delayed "
                             "and proofs are forgeable")
        return cls(N)


class LucasTorus(_Exponentiation):
    """The norm-one elements a + b*sqrt(3) of Z_N[sqrt 3] (a^2 - 3b^2 = 1), N = 2^p - 1.

    Squaring uses the norm: (a + b sqrt 3)^2 = (2a^2 - 1) + 2ab sqrt 3, one squaring and one
    multiplication. The inverse of an element is its conjugate. Elements of publicly known order:
    +-1, so the known-order exponent is 2 (spec/protocol.md, section 8).
    """

    kind = "torus"

    def __init__(self, modulus: Mersenne) -> None:
        self.modulus = modulus
        self.N = modulus.N

    @property
    def element_bytes(self) -> int:
        return 2 * self.modulus.nbytes

    @property
    def known_order_exponent(self) -> int:
        return 2

    @property
    def identity(self) -> tuple[mpz, mpz]:
        return (mpz(1), mpz(0))

    def to_bytes(self, x: tuple[mpz, mpz]) -> bytes:
        return self.modulus.to_bytes(x[0]) + self.modulus.to_bytes(x[1])

    def from_bytes(self, data: bytes) -> tuple[mpz, mpz]:
        n = self.modulus.nbytes
        return (self.modulus.from_bytes(data[:n]), self.modulus.from_bytes(data[n:]))

    def check_element(self, x: tuple[mpz, mpz]) -> str | None:
        a, b = x
        N = self.N
        if not (0 <= a < N and 0 <= b < N):
            return "has a coordinate outside [0, N-1]"
        if (a * a - 3 * b * b - 1) % N != 0:
            return "is not of norm one (a^2 - 3b^2 != 1 mod N)"
        return None

    def mul(self, x: tuple[mpz, mpz], y: tuple[mpz, mpz]) -> tuple[mpz, mpz]:
        """(a1 + b1 r)(a2 + b2 r), r^2 = 3, with three multiplications (Karatsuba) and folds."""
        (a1, b1), (a2, b2) = x, y
        aa, bb = a1 * a2, b1 * b2
        cross = (a1 + b1) * (a2 + b2) - aa - bb  # a1*b2 + a2*b1 >= 0
        fold = self.modulus.reduce_any
        return (fold(aa + 3 * bb), fold(cross))

    def square_n(self, x: tuple[mpz, mpz], n: int) -> tuple[mpz, mpz]:
        r, N = self.modulus.reduce, self.N
        a, b = x
        for _ in range(n):
            a, b = r(a * a), r(a * b)
            a = a + a - 1  # 2a^2 - 1
            if a >= N:
                a -= N
            elif a < 0:
                a += N
            b = b + b
            if b >= N:
                b -= N
        return (a, b)


# -- parsing -------------------------------------------------------------------------------------
_MERSENNE = re.compile(r"^2\^([0-9]{1,12})-1$")
_K2N = re.compile(r"^(?:([0-9]{1,12})\*)?2\^([0-9]{1,12})([+-])1$")
_FERMAT = re.compile(r"^(?:2\^\(2\^([0-9]{1,3})\)\+1|F_?([0-9]{1,3}))$")
_HEX = re.compile(r"^0x[0-9a-fA-F]+$")

NUMBER_SYNTAX = ("2^p-1 (p prime), k*2^n+1 or k*2^n-1 (k odd), 2^(2^m)+1 or F_m (Fermat numbers), "
                 "or a generic odd modulus as 0x<hex>")


def parse_number(text: str) -> Modulus:
    """Parse a number in one of the accepted spellings (see NUMBER_SYNTAX).

    Raises UsageError with a message naming the syntax for anything else, and for numbers that are
    trivially composite or out of range.
    """
    t = re.sub(r"\s+", "", text)
    if len(t) > 4096 + 2:
        raise UsageError("number text too long")
    m = _FERMAT.match(t)
    if m:
        return Fermat(int(m.group(1) or m.group(2)))
    m = _MERSENNE.match(t)
    if m:
        return Mersenne.from_exponent(int(m.group(1)))
    m = _K2N.match(t)
    if m:
        k, n, c = int(m.group(1) or 1), int(m.group(2)), 1 if m.group(3) == "+" else -1
        if not 1 <= n <= MAX_EXPONENT or not 1 <= k < MAX_K:
            raise UsageError(f"{t}: need 1 <= k < 2^32 and 1 <= n <= 2^32")
        if k % 2 == 0:
            raise UsageError(f"{t}: k must be odd (write k*2^n with the powers of two moved into n)")
        if k == 1 and c == -1:
            return Mersenne.from_exponent(n)
        if k == 1 and c == 1:
            if n & (n - 1):
                raise UsageError(f"{t}: 2^n+1 with n not a power of two is trivially composite")
            return Fermat(n.bit_length() - 1)
        if n < 2:
            raise UsageError(f"{t}: too small")
        return KTwoN(k, n, c)
    if _HEX.match(t):
        return GenericModulus.checked(int(t, 16))
    raise UsageError(f"cannot read number {text!r}: accepted are {NUMBER_SYNTAX}")


def parse_modulus(text: str) -> GenericModulus:
    """A generic modulus given in decimal or 0x-hex (the --modulus option)."""
    t = text.strip()
    try:
        value = int(t, 16) if t.lower().startswith("0x") else int(t, 10)
    except ValueError:
        raise UsageError(f"cannot read modulus {text!r}: give it in decimal or as 0x<hex>") from None
    return GenericModulus.checked(value)

"""The tests chainproof certifies. Each is a squaring chain x_0 -> x_0^(2^T) in some group plus a
rule that turns the final element into a verdict (spec/protocol.md, sections 2 and 8).

| name | numbers | chain | verdict |
|---|---|---|---|
| fermat-prp | 2^p-1, k*2^n+-1, F_m | x_0 = a^k, T = n | probable-prime / composite |
| proth | k*2^n+1, k < 2^n | x_0 = a^k, T = n-1, Jacobi(a/N) = -1 | prime / composite (proved) |
| pepin | F_m = 2^(2^m)+1 | x_0 = 3, T = 2^m - 1 | prime / composite (proved) |
| lucas-lehmer | 2^p-1 | x_0 = 2 + sqrt 3 in the norm-one torus, T = p-2 | prime / composite (proved) |
| cofactor-prp | 2^p-1 with known factors F | as fermat-prp | Suyama: N/F probable-prime / composite |
| delay | any checked odd modulus | x_0 = x, T given | the value x^(2^T) mod N |
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import gmpy2
from gmpy2 import mpz

from .errors import UsageError
from .numbers import Fermat, GenericModulus, KTwoN, LucasTorus, Mersenne, Modulus

PRP_CAUTION = (
    "Caution: a Fermat PRP result is not a primality proof. 'probable-prime' means the number "
    "passed a Fermat test, which some composites also pass; 'composite' is definite."
)
PROOF_NOTE = (
    "{test} is deterministic: a verified certificate proves this verdict, given the soundness "
    "assumptions of the halving proof (spec/threat-model.md)."
)
DELAY_NOTE = "This certifies the value x^(2^T) mod N only; it says nothing about primality."
MIN_SQUARINGS = 2  # depth >= 1 needs 2^depth <= T


@dataclass(frozen=True)
class Verdict:
    result: str  # "probable-prime" | "composite" | "prime" | "computed"
    residue64: str  # 16 hex digits, see each method
    proved: bool  # True when the test is deterministic (the verdict is a proof)
    caution: str
    subject: str  # what the result is about (the number, or its cofactor)


def _hex64(x: int) -> str:
    return f"{int(x) & (2**64 - 1):016x}"


def _k_power(number: Modulus, base: int) -> mpz:
    """x_0 = a^k for N = k*2^n +- 1: then n squarings give a^(k*2^n) = a^(N -+ 1)."""
    assert isinstance(number, KTwoN)
    return number.pow(mpz(base), number.k)


class Method:
    name = ""
    title = ""

    def check(self, number: Modulus, base: int, factors: Sequence[int], squarings: int | None) -> None:
        """Raise UsageError if this test does not apply to (number, base, factors)."""
        raise NotImplementedError

    def group(self, number: Modulus) -> Any:
        return number

    def start(self, number: Modulus, base: int) -> Any:
        raise NotImplementedError

    def squarings(self, number: Modulus, given: int | None = None) -> int:
        raise NotImplementedError

    def verdict(self, number: Modulus, base: int, final: Any, factors: Sequence[int]) -> Verdict:
        raise NotImplementedError

    default_base = 3

    # -- shared checks ----------------------------------------------------------------------------
    def _check_base(self, number: Modulus, base: int, low: int = 3) -> None:
        N = int(number.N)
        if not low <= base < min(N - 1, 1 << 32):
            raise UsageError(f"base {base} out of range: need {low} <= base < min(N-1, 2^32)")
        if gmpy2.gcd(base, N) != 1:
            raise UsageError(f"base {base} shares a factor with {number.text}")
        # A base of publicly known order makes the test trivial (every such N passes), unless that
        # subgroup is the whole group (2^3-1 = 7, F_1 = 5), where no base avoids it.
        if number.known_order_exponent < N - 1 and number.in_known_subgroup(base):
            raise UsageError(f"base {base} is +-2^k mod N or +-1: every {number.text} passes for it")

    def _check_size(self, number: Modulus, squarings: int) -> None:
        if squarings < MIN_SQUARINGS:
            raise UsageError(f"{number.text} is too small to certify with {self.name} "
                             f"({squarings} squarings; at least {MIN_SQUARINGS} are needed)")

    def _no_factors(self, factors: Sequence[int]) -> None:
        if factors:
            raise UsageError(f"known factors only go with the cofactor-prp test, not {self.name}")

    def _check_fixed_base(self, number: Modulus, kind: type, kind_text: str, base: int,
                          factors: Sequence[int]) -> None:
        """For tests defined on one form with one fixed starting value (Pépin, Lucas-Lehmer)."""
        if not isinstance(number, kind):
            raise UsageError(f"{self.name} needs {kind_text}")
        if base != self.default_base:
            raise UsageError(f"{self.title} starts from base {self.default_base}")
        self._no_factors(factors)
        self._check_size(number, self.squarings(number))


class FermatPRP(Method):
    name, title = "fermat-prp", "Fermat PRP test"

    def check(self, number: Modulus, base: int, factors: Sequence[int], squarings: int | None) -> None:
        if not isinstance(number, KTwoN):
            raise UsageError(f"{self.name} needs 2^p-1, k*2^n+-1 or a Fermat number")
        self._no_factors(factors)
        self._check_base(number, base)
        self._check_size(number, self.squarings(number))

    def start(self, number: Modulus, base: int) -> mpz:
        return _k_power(number, base)

    def squarings(self, number: Modulus, given: int | None = None) -> int:
        assert isinstance(number, KTwoN)
        return number.n

    def fermat_residue(self, number: KTwoN, base: int, final: mpz) -> mpz:
        """a^(N-1) mod N from the final x_T = a^(k*2^n): that is a^(N-1) itself for c = +1, and
        a^(N+1) for c = -1, which is divided by a^2."""
        if number.c == 1:
            return final
        b = mpz(base)
        return number.mul(final, number.inverse(number.mul(b, b)))

    def verdict(self, number: Modulus, base: int, final: Any, factors: Sequence[int]) -> Verdict:
        assert isinstance(number, KTwoN)
        r = self.fermat_residue(number, base, final)
        return Verdict("probable-prime" if r == 1 else "composite", _hex64(r), False, PRP_CAUTION,
                       number.text)


class Proth(Method):
    name, title = "proth", "Proth's theorem"

    def check(self, number: Modulus, base: int, factors: Sequence[int], squarings: int | None) -> None:
        if not isinstance(number, KTwoN) or number.c != 1 or number.k >= (1 << min(number.n, 40)):
            raise UsageError(f"{self.name} needs N = k*2^n+1 with k < 2^n")
        self._no_factors(factors)
        self._check_base(number, base)
        if gmpy2.jacobi(base, number.N) != -1:
            raise UsageError(f"base {base} has Jacobi symbol {gmpy2.jacobi(base, number.N)} modulo "
                             f"{number.text}; Proth's test needs -1 (try --base auto)")
        self._check_size(number, self.squarings(number))

    def start(self, number: Modulus, base: int) -> mpz:
        return _k_power(number, base)

    def squarings(self, number: Modulus, given: int | None = None) -> int:
        assert isinstance(number, KTwoN)
        return number.n - 1

    def verdict(self, number: Modulus, base: int, final: Any, factors: Sequence[int]) -> Verdict:
        prime = final == number.N - 1  # a^((N-1)/2) = -1
        return Verdict("prime" if prime else "composite", _hex64(final), True,
                       PROOF_NOTE.format(test="Proth's test with Jacobi(a/N) = -1"), number.text)

    @staticmethod
    def find_base(number: Modulus) -> int:
        """Smallest base >= 3 with Jacobi(a/N) = -1 (and not of known order)."""
        if gmpy2.is_square(number.N):
            raise UsageError(f"{number.text} is a perfect square, so composite; Proth's test needs a "
                             "non-square")
        a = 3
        while gmpy2.jacobi(a, number.N) != -1 or number.in_known_subgroup(a):
            a += 1
            if a > 10**6:
                raise UsageError(f"no suitable Proth base below 10^6 for {number.text}")
        return a


class Pepin(Proth):
    name, title = "pepin", "Pépin's test"
    default_base = 3

    def check(self, number: Modulus, base: int, factors: Sequence[int], squarings: int | None) -> None:
        self._check_fixed_base(number, Fermat, "a Fermat number 2^(2^m)+1", base, factors)

    def verdict(self, number: Modulus, base: int, final: Any, factors: Sequence[int]) -> Verdict:
        prime = final == number.N - 1  # 3^((F_m-1)/2) = -1
        return Verdict("prime" if prime else "composite", _hex64(final), True,
                       PROOF_NOTE.format(test="Pépin's test"), number.text)


class LucasLehmer(Method):
    """s_0 = 4, s_(i+1) = s_i^2 - 2; 2^p-1 is prime iff s_(p-2) = 0. With w = 2 + sqrt 3 (norm 1),
    s_i = w^(2^i) + w^(-2^i) = 2 * a_i where w^(2^i) = a_i + b_i sqrt 3."""

    name, title = "lucas-lehmer", "Lucas-Lehmer test"
    default_base = 4

    def check(self, number: Modulus, base: int, factors: Sequence[int], squarings: int | None) -> None:
        self._check_fixed_base(number, Mersenne, "a Mersenne number 2^p-1", base, factors)

    def group(self, number: Modulus) -> LucasTorus:
        assert isinstance(number, Mersenne)
        return LucasTorus(number)

    def start(self, number: Modulus, base: int) -> tuple[mpz, mpz]:
        return (mpz(2), mpz(1))

    def squarings(self, number: Modulus, given: int | None = None) -> int:
        assert isinstance(number, Mersenne)
        return number.p - 2

    def verdict(self, number: Modulus, base: int, final: Any, factors: Sequence[int]) -> Verdict:
        s = (2 * final[0]) % number.N  # the Lucas-Lehmer residue s_(p-2)
        return Verdict("prime" if s == 0 else "composite", _hex64(s), True,
                       PROOF_NOTE.format(test="The Lucas-Lehmer test"), number.text)


class CofactorPRP(FermatPRP):
    """Suyama: with x_T = a^(N+1) mod N and N = F*C, C is a base-a PRP candidate iff
    x_T mod C = a^(F+1) mod C (then a^(F*(C-1)) = 1 mod C)."""

    name, title = "cofactor-prp", "Fermat PRP test of the cofactor (Suyama)"

    def check(self, number: Modulus, base: int, factors: Sequence[int], squarings: int | None) -> None:
        if not isinstance(number, Mersenne):
            raise UsageError(f"{self.name} needs a Mersenne number 2^p-1")
        if not factors:
            raise UsageError("cofactor-prp needs at least one known factor")
        self._check_base(number, base)
        self._check_size(number, self.squarings(number))
        self.cofactor(number, factors)

    @staticmethod
    def cofactor(number: Modulus, factors: Sequence[int]) -> int:
        N, F = int(number.N), 1
        for f in factors:
            if not 1 < f < N or N % f:
                raise UsageError(f"{f} is not a proper factor of {number.text}")
            F *= f
        if N % F:
            raise UsageError("the product of the known factors does not divide N (repeated factor?)")
        C = N // F
        if C == 1:
            raise UsageError("the known factors multiply to N: no cofactor left to test")
        return C

    def verdict(self, number: Modulus, base: int, final: Any, factors: Sequence[int]) -> Verdict:
        C = self.cofactor(number, factors)
        F = int(number.N) // C
        lhs = int(final) % C
        rhs = pow(base, F + 1, C)
        r = lhs * pow(rhs, -1, C) % C if gmpy2.gcd(rhs, C) == 1 else lhs
        subject = f"cofactor of {number.text} ({len(str(C))} digits)"
        return Verdict("probable-prime" if lhs == rhs else "composite", _hex64(r), False, PRP_CAUTION,
                       subject)


class Delay(Method):
    name, title = "delay", "delay computation x^(2^T) mod N"
    default_base = 3

    def check(self, number: Modulus, base: int, factors: Sequence[int], squarings: int | None) -> None:
        if not isinstance(number, GenericModulus):
            raise UsageError(f"{self.name} is for a generic modulus (--modulus)")
        self._no_factors(factors)
        self._check_base(number, base, low=2)
        if squarings is None:
            raise UsageError("a delay computation needs the number of squarings T (--squarings)")
        self._check_size(number, squarings)

    def start(self, number: Modulus, base: int) -> mpz:
        return mpz(base)

    def squarings(self, number: Modulus, given: int | None = None) -> int:
        if given is None:
            raise UsageError("a delay computation needs the number of squarings T (--squarings)")
        return given

    def verdict(self, number: Modulus, base: int, final: Any, factors: Sequence[int]) -> Verdict:
        return Verdict("computed", _hex64(final), True, DELAY_NOTE, number.text)


METHODS: dict[str, Method] = {m.name: m for m in
                              (FermatPRP(), Proth(), Pepin(), LucasLehmer(), CofactorPRP(), Delay())}


def method(name: str) -> Method:
    try:
        return METHODS[name]
    except KeyError:
        raise UsageError(f"unknown test {name!r}; known: {', '.join(METHODS)}") from None


def default_method(number: Modulus, factors: Sequence[int] = ()) -> Method:
    if factors:
        return METHODS["cofactor-prp"]
    if isinstance(number, Fermat):
        return METHODS["pepin"]
    if isinstance(number, GenericModulus):
        return METHODS["delay"]
    return METHODS["fermat-prp"]


def transcript_context(number_text: str, test: str, base: int, factors: Sequence[str] | None) -> tuple[str, ...]:
    """The certificate's descriptive fields as bound into the Fiat-Shamir seed."""
    return (number_text, test, str(base), *(factors or ()))

"""Mersenne arithmetic against Python's built-in pow (outside reference: CPython's int pow)."""

from __future__ import annotations

import pytest
import sympy
from gmpy2 import mpz
from hypothesis import given
from hypothesis import strategies as st

from verifier.errors import UsageError
from verifier.methods import FermatPRP
from verifier.numbers import Mersenne, parse_number


def validate_base(num: Mersenne, base: int) -> None:
    FermatPRP().check(num, base, (), None)

PRIMES = list(sympy.primerange(3, 3000))


@st.composite
def number_and_residue(draw: st.DrawFn) -> tuple[Mersenne, int]:
    p = draw(st.sampled_from(PRIMES))
    num = Mersenne(p)
    edge = [0, 1, 2, int(num.N) - 1, int(num.N) - 2, (1 << (p - 1)), (1 << (p - 1)) - 1]
    x = draw(st.one_of(st.sampled_from(edge), st.integers(0, int(num.N) - 1)))
    return num, x


@given(number_and_residue(), st.integers(0, 64))
def test_square_n_matches_builtin_pow_and_stays_reduced(case: tuple[Mersenne, int], n: int) -> None:
    num, x = case
    N = int(num.N)
    y = mpz(x)
    for _ in range(n):  # one squaring at a time so every intermediate value is range-checked
        y = num.square_n(y, 1)
        assert 0 <= y < num.N  # a single fold without the subtraction would creep up to N
    assert y == pow(x, 1 << n, N)  # reference: Python's built-in pow


@given(number_and_residue(), st.integers(0, 2**100))
def test_pow_matches_builtin_pow(case: tuple[Mersenne, int], e: int) -> None:
    num, x = case
    assert num.pow(mpz(x), e) == pow(x, e, int(num.N))  # reference: Python's built-in pow


@given(number_and_residue(), number_and_residue())
def test_mul_matches_builtin(a: tuple[Mersenne, int], b: tuple[Mersenne, int]) -> None:
    num, x = a
    y = b[1] % int(num.N)
    r = num.mul(mpz(x), mpz(y))
    assert 0 <= r < num.N and r == x * y % int(num.N)


def test_reduce_boundary_values() -> None:
    num = Mersenne(13)
    N = int(num.N)
    # (N-1)^2 is the largest product of two reduced values; N itself must reduce to 0.
    for v in (0, 1, N - 1, N, N + 1, 2 * N, 2 * N + 1, N * N - 2 * N, (N - 1) * (N - 1)):
        r = num.reduce(mpz(v))
        assert 0 <= r < N and r == v % N


@pytest.mark.parametrize("text", ["2^127-1", " 2 ^ 127 - 1 ", "2^3-1"])
def test_parse_accepts(text: str) -> None:
    assert parse_number(text).text == text.replace(" ", "")


@pytest.mark.parametrize(
    "text",
    ["2^128-1", "2^1-1", "2^2-1", "2^127+1", "4*2^127-1", "M127", "2**127-1", "170141183460469231731687303715884105727",
     "2^127-1x", "", "2^-127-1", "2^99999999999999-1"],
)
def test_parse_rejects(text: str) -> None:
    with pytest.raises(UsageError):
        parse_number(text)


@given(st.text(max_size=20))
def test_parse_never_crashes(text: str) -> None:
    try:
        num = parse_number(text)
    except UsageError:
        return
    assert sympy.isprime(num.p)  # reference: sympy primality of the exponent


@pytest.mark.parametrize("base", [0, 1, 2, 4, 8, 1 << 20, 2**32, -3])
def test_bad_bases(base: int) -> None:
    with pytest.raises(UsageError):
        validate_base(Mersenne(127), base)


def test_base_sharing_a_factor_is_refused() -> None:
    # 2^11 - 1 = 2047 = 23 * 89 (common practice; checked here by multiplication)
    assert 23 * 89 == 2**11 - 1
    with pytest.raises(UsageError):
        validate_base(Mersenne(11), 23)
    validate_base(Mersenne(11), 3)


def test_known_order_exponent_kills_the_known_subgroup() -> None:
    # -1 and 2 generate the subgroup every verifier knows; lam = 2p annihilates it.
    for p in (5, 31, 127):
        num = Mersenne(p)
        lam = num.known_order_exponent
        for g in (mpz(2), num.N - 1, num.N - 2, mpz(4)):
            assert num.pow(g, lam) == 1


def test_bases_in_the_known_subgroup_are_refused() -> None:
    # 2047 - 2 = 2045 = -2 mod 2047: every Mersenne number passes a Fermat test to base -2^k
    num = Mersenne(11)
    assert pow(2045, 2046, 2047) == 1  # reference: built-in pow; yet 2047 = 23 * 89
    with pytest.raises(UsageError, match="2\\^k"):
        validate_base(num, 2045)
    with pytest.raises(UsageError, match="2\\^k"):
        validate_base(num, 2047 - 64)
    validate_base(Mersenne(3), 3)  # p = 3: the subgroup is the whole group; allowed

"""Verdicts and residues of whole runs (worker -> certificate -> verifier) against outside sources."""

from __future__ import annotations

from pathlib import Path

import pytest
import sympy
from conftest import make_certificate
from hypothesis import given
from hypothesis import strategies as st

from verifier import VerificationPolicy, verify

# OEIS A000043, Mersenne prime exponents: the terms below 1300 (values from memory; each one is
# also cross-checked against sympy.isprime in test_a000043_agrees_with_sympy).
A000043_BELOW_1300 = [2, 3, 5, 7, 13, 17, 19, 31, 61, 89, 107, 127, 521, 607, 1279]

ACCEPT_UNSIGNED = VerificationPolicy(unsafe_accept_unsigned=True)


def test_a000043_agrees_with_sympy() -> None:
    expected = [p for p in sympy.primerange(2, 1300) if sympy.isprime(2**p - 1)]
    assert expected == A000043_BELOW_1300


def test_every_prime_exponent_below_1300(tmp_path: Path) -> None:
    """Certified verdict for every prime 3 <= p < 1300 matches OEIS A000043 and sympy.isprime."""
    seen_prp = []
    for i, p in enumerate(sympy.primerange(3, 1300)):
        depth = 1 + i % min(6, p.bit_length() - 1)  # spread depths 1..6 over the range
        _, cert = make_certificate(tmp_path, f"2^{p}-1", depth=depth, name=f"m{p}.cpc")
        result = verify(cert, ACCEPT_UNSIGNED)
        is_prime = sympy.isprime(2**p - 1)  # reference: sympy
        assert result.result == ("probable-prime" if is_prime else "composite"), p
        if result.result == "probable-prime":
            seen_prp.append(p)
    assert seen_prp == A000043_BELOW_1300[1:]  # reference: OEIS A000043 (p = 2 is out of scope)


@given(
    p=st.sampled_from(list(sympy.primerange(3, 2500))),
    depth=st.integers(1, 7),
    base=st.sampled_from([3, 5, 7, 10, 11]),
)
def test_residue64_matches_builtin_pow(tmp_path_factory: pytest.TempPathFactory, p: int, depth: int, base: int) -> None:
    """residue64 is the low 64 bits of base^(N-1) mod N (reference: Python's built-in pow)."""
    N = 2**p - 1
    if base >= N - 1 or (1 << depth) > p or sympy.gcd(base, N) != 1:
        return
    tmp = tmp_path_factory.mktemp("r")
    _, cert = make_certificate(tmp, f"2^{p}-1", depth=depth, base=base)
    result = verify(cert, ACCEPT_UNSIGNED)
    assert result.residue64 == f"{pow(base, N - 1, N) & (2**64 - 1):016x}"
    assert result.base == base


def test_m11_is_composite(tmp_path: Path) -> None:
    # 2^11 - 1 = 2047 = 23 * 89 (common practice), checked by multiplication here.
    assert 23 * 89 == 2**11 - 1
    _, cert = make_certificate(tmp_path, "2^11-1", depth=2)
    result = verify(cert, ACCEPT_UNSIGNED)
    assert result.result == "composite"
    assert result.residue64 == f"{pow(3, 2046, 2047):016x}"  # reference: built-in pow
    assert "not a primality proof" in result.caution

"""The adversarial prover (tools/adversary.py) against the verifier: lies about the final residue
by a factor of known order must be rejected, and the same lies must succeed against plain Pietrzak
challenges (which shows the test can fail)."""

from __future__ import annotations

import dataclasses

import pytest
from adversary import forge
from gmpy2 import mpz

from verifier import Rejected, VerificationPolicy, encode, verify
from verifier.codec import UnverifiedCertificate
from verifier.numbers import Mersenne

ACCEPT_UNSIGNED = VerificationPolicy(unsafe_accept_unsigned=True)


def accepted(cert: UnverifiedCertificate) -> bool:
    try:
        verify(cert, ACCEPT_UNSIGNED)
    except Rejected:
        return False
    return True


def test_lying_prover_is_rejected() -> None:
    """-y, y*2^j, -2^j*y, and a residue of another base, each ground over every known-order
    variant of every mu: at least 10^4 tries in all, none accepted."""
    total = accepted_count = 0
    for p in (31, 61, 89, 127):
        num = Mersenne(p)
        other_base = num.mul(num.square_n(mpz(5), p), num.inverse(num.square_n(mpz(3), p)))
        lies = [num.N - 1, mpz(2), mpz(4), num.N - 2, num.pow(mpz(2), p - 1), other_base]
        for g in lies:
            for depth in (2, 3, 4):
                cert, tries = forge(num, 3, depth, g)
                total += tries
                accepted_count += accepted(cert)
    assert accepted_count == 0
    assert total >= 10_000


def test_honest_claim_through_the_forger_is_accepted() -> None:
    """Control: with g = 1 the same code builds an accepted certificate, so the rejections above
    come from the lie, not from a broken forger."""
    cert, _ = forge(Mersenne(61), 3, 3, mpz(1))
    assert accepted(cert)


def test_plain_pietrzak_challenges_are_forgeable(monkeypatch: pytest.MonkeyPatch) -> None:
    """With lam = 1 the challenge is plain hash entropy (ordinary Pietrzak). The same forger then
    gets -y and y*2^j accepted: this is the attack the challenge derivation exists to stop."""
    monkeypatch.setattr(Mersenne, "known_order_exponent", property(lambda self: 1))
    num = Mersenne(61)
    wins = 0
    for g in (num.N - 1, mpz(2), mpz(8)):
        cert, _ = forge(num, 3, 3, g)
        wins += accepted(cert)
    assert wins == 3


def test_reused_proof_for_other_claims_is_rejected(tmp_path) -> None:  # type: ignore[no-untyped-def]
    """A valid proof moved to another base, exponent or depth does not verify."""
    from conftest import make_certificate

    _, cert = make_certificate(tmp_path, "2^127-1", depth=4)
    assert accepted(cert)
    assert not accepted(dataclasses.replace(cert, base=5))
    _, other = make_certificate(tmp_path, "2^127-1", depth=4, base=5, name="b5.cpc")
    assert not accepted(dataclasses.replace(cert, mu=other.mu))
    assert not accepted(dataclasses.replace(cert, final=other.final))
    assert not accepted(dataclasses.replace(cert, depth=3, mu=cert.mu[:3], checkpoints=cert.checkpoints[1::2]))
    assert encode(cert)  # the honest one still encodes

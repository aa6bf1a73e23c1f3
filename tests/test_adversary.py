"""An adversarial prover that did all the work and then lies about the result.

It claims y*g instead of the true final residue y, for g in the known subgroup <-1, 2>, and at
every halving it tries every mu' = mu*h with h in that subgroup, looking for one whose challenge
makes the error vanish. Against plain Pietrzak challenges (r uniform) this succeeds almost always;
against ours (r = 2^(T_i/2) mod 2p) it must never succeed (spec/protocol.md, section 5).
"""

from __future__ import annotations

import dataclasses
import hashlib

import pytest
from gmpy2 import mpz

from verifier import Rejected, VerificationPolicy, encode, verify
from verifier.codec import TEST_FERMAT, UnverifiedCertificate
from verifier.numbers import Mersenne
from verifier.proof import Challenges, Statement

ACCEPT_UNSIGNED = VerificationPolicy(unsafe_accept_unsigned=True)


def known_subgroup(num: Mersenne) -> list[mpz]:
    """All 2p elements of <-1, 2>: +-2^j."""
    powers = [num.pow(mpz(2), j) for j in range(num.p)]
    return powers + [num.N - g for g in powers]


def forge(num: Mersenne, base: int, depth: int, g: mpz) -> tuple[UnverifiedCertificate, int]:
    """Build a certificate claiming final = true_final * g. Returns it and how many candidate
    (mu, challenge) pairs were tried."""
    T = num.p
    head, seg = T % (1 << depth), T >> depth
    u = [num.square_n(mpz(base), head)]
    for _ in range(1 << depth):
        u.append(num.square_n(u[-1], seg))
    claim = num.mul(u[-1], g)
    digests = [hashlib.sha256(num.to_bytes(v)).digest() for v in u[1:]]
    digests[-1] = hashlib.sha256(num.to_bytes(claim)).digest()
    cands = known_subgroup(num)
    tries = 0
    mid = (1 << (depth - 1)) - 1
    x, y, t = u[0], claim, seg << depth
    mus: list[mpz] = []
    ch: Challenges | None = None
    for level in range(1, depth + 1):
        half = t // 2
        mu_true = num.square_n(x, half)
        best = None
        for h in cands:
            tries += 1
            mu = num.mul(mu_true, h)
            if level == 1:  # mu_1's hash is in the list, and the list feeds the first challenge
                digests[mid] = hashlib.sha256(num.to_bytes(mu)).digest()
                trial = Challenges(Statement(num, base, T, depth, claim, tuple(digests)))
            else:
                assert ch is not None
                trial = Challenges.__new__(Challenges)
                trial.__dict__.update(ch.__dict__)
            r = trial.next(mu)
            x2, y2 = num.mul(num.pow(x, r), mu), num.mul(num.pow(mu, r), y)
            if num.square_n(x2, half) == y2 or best is None:
                best = (mu, trial, x2, y2, list(digests))
                if num.square_n(x2, half) == y2:
                    break
        assert best is not None
        mu, ch, x, y, digests = best
        mus.append(mu)
        t = half
    cert = UnverifiedCertificate(
        number=num.text, test=TEST_FERMAT, base=base, squarings=T, depth=depth,
        final=num.to_bytes(claim), mu=tuple(num.to_bytes(m) for m in mus),
        checkpoints=tuple(digests),
    )
    return cert, tries


def accepted(cert: UnverifiedCertificate) -> bool:
    try:
        verify(cert, ACCEPT_UNSIGNED)
    except Rejected:
        return False
    return True


@pytest.mark.parametrize("p", [31, 61, 89, 127])
def test_lying_prover_is_rejected(p: int) -> None:
    num = Mersenne(p)
    lies = [num.N - 1, mpz(2), mpz(4), num.N - 2, num.pow(mpz(2), p - 1)]
    total = 0
    for g in lies:
        for depth in (2, 3, 4):
            cert, tries = forge(num, 3, depth, g)
            total += tries
            assert not accepted(cert), (p, int(g), depth)
    assert total >= len(lies) * 3 * 2 * p  # every candidate was tried at every level


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

"""An adversarial prover for testing verifiers: it did all the work, then lies about the result.

It claims y*g instead of the true final residue y, for g in the known subgroup <-1, 2> of
Z_N* (N = 2^p - 1), and at every halving tries every mu' = mu*h with h in that subgroup, looking
for one whose Fiat-Shamir challenge makes the error vanish. Against plain Pietrzak challenges this
succeeds almost always; against chainproof's it must never succeed (spec/protocol.md, section 5).
It holds every residue in memory, so it is for small p only.
"""

from __future__ import annotations

import hashlib

from gmpy2 import mpz

from verifier.codec import TEST_FERMAT, UnverifiedCertificate
from verifier.numbers import Mersenne
from verifier.proof import Challenges, Statement


def known_subgroup(num: Mersenne) -> list[mpz]:
    """All 2p elements of <-1, 2>: +-2^j."""
    powers = [num.pow(mpz(2), j) for j in range(num.p)]
    return powers + [num.N - g for g in powers]


def forge(
    num: Mersenne, base: int, depth: int, g: mpz, signer: bytes = b""
) -> tuple[UnverifiedCertificate, int]:
    """Build a certificate claiming final = true_final * g. Returns it and how many candidate
    (mu, challenge) pairs were tried. ``signer`` is the public key the certificate will be signed
    with (the transcript binds it); the caller signs."""
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
                trial = Challenges(Statement(num, base, T, depth, claim, tuple(digests), signer))
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

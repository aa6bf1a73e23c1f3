"""An adversarial prover for testing verifiers: it did all the work, then lies about the result.

It claims y*g instead of the true final element y, for g of publicly known order (by default the
subgroup <-1, 2> of (Z/NZ)* for N = 2^p - 1), and at every halving tries every mu' = mu*h with h
in a candidate set, looking for one whose Fiat-Shamir challenge makes the error vanish. Against
plain Pietrzak challenges this succeeds almost always; against chainproof's it must never succeed
(spec/protocol.md, section 5). It holds every residue in memory, so it is for small numbers only.
"""

from __future__ import annotations

import hashlib
from collections.abc import Sequence
from typing import Any

from gmpy2 import mpz

from verifier.codec import UnverifiedCertificate
from verifier.methods import FermatPRP, Method, transcript_context
from verifier.numbers import Modulus
from verifier.proof import Challenges, Statement


def known_subgroup(num: Modulus) -> list[mpz]:
    """Elements of <-1, 2>: +-2^j for j below the order of 2 (all 2p of them for 2^p - 1)."""
    powers, x = [], mpz(1)
    while True:
        powers.append(x)
        x = num.mul(x, mpz(2))
        if x == 1 or len(powers) > 4 * num.bits:
            break
    return powers + [num.N - g for g in powers]


def forge(
    num: Modulus, base: int, depth: int, g: Any, signer: bytes = b"", test: Method | None = None,
    candidates: Sequence[Any] | None = None,
) -> tuple[UnverifiedCertificate, int]:
    """Build a certificate of ``test`` (default fermat-prp) claiming final = true_final * g.
    Returns it and how many candidate (mu, challenge) pairs were tried. ``signer`` is the public
    key the certificate will be signed with (the transcript binds it); the caller signs.
    ``candidates`` are the mu multipliers to try (default: the known subgroup of residues)."""
    test = test or FermatPRP()
    group = test.group(num)
    T = test.squarings(num)
    head, seg = T % (1 << depth), T >> depth
    u = [group.square_n(test.start(num, base), head)]
    for _ in range(1 << depth):
        u.append(group.square_n(u[-1], seg))
    claim = group.mul(u[-1], g)
    digests = [hashlib.sha256(group.to_bytes(v)).digest() for v in u[1:]]
    digests[-1] = hashlib.sha256(group.to_bytes(claim)).digest()
    cands = list(candidates) if candidates is not None else known_subgroup(num)
    context = transcript_context(num.text, test.name, base, None)
    tries = 0
    mid = (1 << (depth - 1)) - 1
    x, y, t = u[0], claim, seg << depth
    mus: list[Any] = []
    ch: Challenges | None = None
    for level in range(1, depth + 1):
        half = t // 2
        mu_true = group.square_n(x, half)
        best = None
        for h in cands:
            tries += 1
            mu = group.mul(mu_true, h)
            if level == 1:  # mu_1's hash is in the list, and the list feeds the first challenge
                digests[mid] = hashlib.sha256(group.to_bytes(mu)).digest()
                trial = Challenges(Statement(group, test.start(num, base), T, depth, claim,
                                             tuple(digests), signer, context))
            else:
                assert ch is not None
                trial = Challenges.__new__(Challenges)
                trial.__dict__.update(ch.__dict__)
            r = trial.next(mu)
            x2, y2 = group.mul(group.pow(x, r), mu), group.mul(group.pow(mu, r), y)
            if group.square_n(x2, half) == y2 or best is None:
                best = (mu, trial, x2, y2, list(digests))
                if group.square_n(x2, half) == y2:
                    break
        assert best is not None
        mu, ch, x, y, digests = best
        mus.append(mu)
        t = half
    cert = UnverifiedCertificate(
        number=num.text, test=test.name, base=base, squarings=T, depth=depth,
        final=group.to_bytes(claim), mu=tuple(group.to_bytes(m) for m in mus),
        checkpoints=tuple(digests),
    )
    return cert, tries

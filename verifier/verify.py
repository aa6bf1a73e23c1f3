"""Certificate verification: the only road from an UnverifiedCertificate to a VerifiedResult.

Trust decisions live in a :class:`VerificationPolicy`; everything that can be wrong with a
certificate raises :class:`~verifier.errors.Rejected` with a one-line reason.
"""

from __future__ import annotations

import hashlib
import time
from collections.abc import Callable
from dataclasses import dataclass, field

from gmpy2 import mpz

from .codec import MAX_CERTIFICATE_BYTES, MAX_DEPTH, TEST_FERMAT, UnverifiedCertificate
from .errors import Rejected, UsageError
from .gerbicz import ChainStats, GerbiczChain, single_check_block
from .numbers import Mersenne, fermat_verdict, parse_number, validate_base
from .proof import Statement, reduce_claim, residue_digest
from .signing import fingerprint, signature_valid

PRP_CAUTION = (
    "Caution: a Fermat PRP result is not a primality proof. 'probable-prime' means the number "
    "passed a Fermat test, which some composites also pass; 'composite' is definite."
)

DIGEST_BYTES = 32


@dataclass(frozen=True)
class VerificationPolicy:
    """Who and what the verifier accepts.

    ``trusted_signers``: raw Ed25519 public keys; None accepts any valid signature. An empty set is
    refused (it would silently trust nobody or, worse, be read as "no restriction").
    ``unsafe_accept_unsigned``: accept certificates without a signature; off by default and named
    so that nobody switches it on by accident. ``min_depth``, ``max_certificate_bytes`` and
    ``max_verifier_squarings`` bound what a certificate may ask of the verifier.
    """

    trusted_signers: frozenset[bytes] | None = None
    unsafe_accept_unsigned: bool = False
    min_depth: int = 1
    max_certificate_bytes: int = MAX_CERTIFICATE_BYTES
    #: Bound on the verifier's work (head + final segment), so a shallow proof cannot make the
    #: verifier redo most of a run. 2^25 allows depth 3 for p near 1.4e8.
    max_verifier_squarings: int = 1 << 25

    def __post_init__(self) -> None:
        if self.trusted_signers is not None and not self.trusted_signers:
            raise ValueError("trusted_signers is empty: pass None to accept any valid signature")


@dataclass(frozen=True)
class VerifiedResult:
    """What a verified certificate establishes. Only :func:`verify` creates one."""

    number: str
    test: str
    base: int
    result: str  # "probable-prime" | "composite"
    residue64: str  # low 64 bits of base^(N-1) mod N, 16 hex digits
    claimed_squarings: int
    depth: int
    squarings: int  # every squaring the verifier did: head, halvings, final segment, its check
    seconds: float
    signer: str | None  # fingerprint, or None for an unsigned certificate accepted by policy
    final_digest: str  # SHA-256 of the final residue, hex
    caution: str = field(default=PRP_CAUTION)


def _check_signature(cert: UnverifiedCertificate, policy: VerificationPolicy) -> str | None:
    if cert.signer is None or cert.signature is None:
        if not policy.unsafe_accept_unsigned:
            raise Rejected("certificate is unsigned and the policy requires a signature")
        return None
    if not signature_valid(cert.signer, cert.signed_bytes(), cert.signature):
        raise Rejected("signature does not verify")
    if policy.trusted_signers is not None and cert.signer not in policy.trusted_signers:
        raise Rejected(f"signer {fingerprint(cert.signer)} is not a trusted key")
    return fingerprint(cert.signer)


def _residue(num: Mersenne, data: bytes, what: str) -> mpz:
    if len(data) != num.nbytes:
        raise Rejected(f"{what} is {len(data)} bytes, expected {num.nbytes}")
    x = num.from_bytes(data)
    if not 0 < x < num.N:
        raise Rejected(f"{what} is outside [1, N-1]")
    if not num.is_unit(x):
        raise Rejected(f"{what} is not a unit modulo N")
    return x


def statement_of(
    cert: UnverifiedCertificate, policy: VerificationPolicy
) -> tuple[Statement, list[mpz]]:
    """Check everything that needs no squaring; return the proof statement and decoded mu values.

    Raises Rejected for any structural problem.
    """
    if cert.test != TEST_FERMAT:
        raise Rejected(f"unknown test {cert.test!r}")
    try:
        num = parse_number(cert.number)
    except UsageError as exc:
        raise Rejected(str(exc)) from None
    if cert.number != num.text:
        raise Rejected(f"number not in canonical spelling (expected {num.text!r})")
    if cert.squarings != num.p:
        raise Rejected(f"squarings is {cert.squarings}, a Fermat test of {num.text} needs {num.p}")
    try:
        validate_base(num, cert.base)
    except UsageError as exc:
        raise Rejected(str(exc)) from None
    d = cert.depth
    if not 1 <= d <= MAX_DEPTH or (1 << d) > cert.squarings:
        raise Rejected(f"depth {d} impossible for {cert.squarings} squarings")
    if d < policy.min_depth:
        raise Rejected(f"depth {d} below the policy minimum {policy.min_depth}")
    if len(cert.mu) != d:
        raise Rejected(f"{len(cert.mu)} proof values for depth {d}")
    if len(cert.checkpoints) != 1 << d:
        raise Rejected(f"{len(cert.checkpoints)} checkpoint hashes, expected {1 << d}")
    if any(len(c) != DIGEST_BYTES for c in cert.checkpoints):
        raise Rejected("a checkpoint hash is not 32 bytes")
    final = _residue(num, cert.final, "final residue")
    mus = [_residue(num, m, f"proof value {i + 1}") for i, m in enumerate(cert.mu)]
    if cert.checkpoints[-1] != hashlib.sha256(cert.final).digest():
        raise Rejected("last checkpoint hash does not match the final residue")
    # mu_1 is itself a captured residue (the midpoint), so its hash must be in the list.
    if cert.checkpoints[(1 << (d - 1)) - 1] != hashlib.sha256(cert.mu[0]).digest():
        raise Rejected("midpoint checkpoint hash does not match the first proof value")
    st = Statement(num, cert.base, cert.squarings, d, final, cert.checkpoints, cert.signer or b"")
    if st.head + st.segment > policy.max_verifier_squarings:
        raise Rejected(
            f"checking needs {st.head + st.segment} squarings, above the policy limit "
            f"{policy.max_verifier_squarings} (a deeper proof is needed)"
        )
    return st, mus


def verify(
    cert: UnverifiedCertificate,
    policy: VerificationPolicy,
    *,
    clock: Callable[[], float] = time.perf_counter,
) -> VerifiedResult:
    """Verify a certificate under ``policy``. Raises Rejected with a reason; no partial results.

    Raises RunFailed (not Rejected) if the verifier's own final segment keeps failing its Gerbicz
    check: then this machine is faulty and says nothing about the certificate.
    """
    t0 = clock()
    signer = _check_signature(cert, policy)
    st, mus = statement_of(cert, policy)
    num = st.number
    x, y, s, squarings = reduce_claim(st, mus)
    stats = ChainStats(squarings=squarings)
    block, per_check = single_check_block(s)
    got = GerbiczChain(num, x, s, block, per_check, stats=stats).run()
    if got != y:
        raise Rejected("proof does not verify: the final segment does not match the claim")
    result, residue64 = fermat_verdict(num, cert.base, st.final)
    return VerifiedResult(
        number=num.text,
        test=cert.test,
        base=cert.base,
        result=result,
        residue64=residue64,
        claimed_squarings=cert.squarings,
        depth=st.depth,
        squarings=stats.squarings,
        seconds=clock() - t0,
        signer=signer,
        final_digest=residue_digest(num, st.final).hex(),
    )

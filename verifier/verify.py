"""Certificate verification: the only road from an UnverifiedCertificate to a VerifiedResult.

Trust decisions live in a :class:`VerificationPolicy`; everything that can be wrong with a
certificate raises :class:`~verifier.errors.Rejected` with a one-line reason.
"""

from __future__ import annotations

import hashlib
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from .codec import MAX_CERTIFICATE_BYTES, MAX_DEPTH, UnverifiedCertificate
from .errors import Rejected, UsageError, VerifyTimeout
from .gerbicz import ChainStats, GerbiczChain, single_check_block
from .methods import Method, method, transcript_context
from .numbers import Modulus, parse_number
from .proof import Statement, reduce_claim, residue_digest
from .signing import fingerprint, signature_valid

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
    result: str  # "probable-prime" | "composite" | "prime" | "computed"
    residue64: str  # 16 hex digits: low 64 bits of the test's residue (spec/protocol.md, 8)
    claimed_squarings: int
    depth: int
    squarings: int  # every squaring the verifier did: head, halvings, final segment, its check
    seconds: float
    signer: str | None  # fingerprint, or None for an unsigned certificate accepted by policy
    final_digest: str  # SHA-256 of the final residue, hex
    proved: bool  # the test is deterministic: the verdict is a proof (given a sound certificate)
    subject: str  # what the verdict is about: the number, or its cofactor
    caution: str
    known_factors: tuple[int, ...] = ()


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


def _element(group: Any, data: bytes, what: str) -> Any:
    if len(data) != group.element_bytes:
        raise Rejected(f"{what} is {len(data)} bytes, expected {group.element_bytes}")
    x = group.from_bytes(data)
    problem = group.check_element(x)
    if problem is not None:
        raise Rejected(f"{what} {problem}")
    return x


def _factors(cert: UnverifiedCertificate) -> tuple[int, ...]:
    if (cert.known_factors is not None) != (cert.test == "cofactor-prp"):
        raise Rejected("known_factors must be present exactly for the cofactor-prp test")
    out = []
    for text in cert.known_factors or ():
        if not text.isdigit() or not text.isascii() or text.startswith("0") or len(text) > 10_000:
            raise Rejected("a known factor is not a canonical decimal number")
        out.append(int(text))
    if out != sorted(set(out)):
        raise Rejected("known factors must be listed in increasing order without repeats")
    return tuple(out)


def statement_of(
    cert: UnverifiedCertificate, policy: VerificationPolicy
) -> tuple[Statement, list[Any], Method, Modulus, tuple[int, ...]]:
    """Check everything that needs no squaring; return the proof statement, the decoded mu
    values, the test, the number and the known factors.

    Raises Rejected for any structural problem.
    """
    try:
        test = method(cert.test)
    except UsageError as exc:
        raise Rejected(str(exc)) from None
    try:
        num = parse_number(cert.number)
    except UsageError as exc:
        raise Rejected(str(exc)) from None
    if cert.number != num.text:
        raise Rejected(f"number not in canonical spelling (expected {num.text!r})")
    factors = _factors(cert)
    try:
        test.check(num, cert.base, factors, cert.squarings)
        needed = test.squarings(num, cert.squarings)
    except UsageError as exc:
        raise Rejected(str(exc)) from None
    if cert.squarings != needed:
        raise Rejected(f"squarings is {cert.squarings}, {test.name} of {num.text} needs {needed}")
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
    group = test.group(num)
    final = _element(group, cert.final, "final residue")
    mus = [_element(group, m, f"proof value {i + 1}") for i, m in enumerate(cert.mu)]
    if cert.checkpoints[-1] != hashlib.sha256(cert.final).digest():
        raise Rejected("last checkpoint hash does not match the final residue")
    # mu_1 is itself a captured residue (the midpoint), so its hash must be in the list.
    if cert.checkpoints[(1 << (d - 1)) - 1] != hashlib.sha256(cert.mu[0]).digest():
        raise Rejected("midpoint checkpoint hash does not match the first proof value")
    st = Statement(group, test.start(num, cert.base), cert.squarings, d, final, cert.checkpoints,
                   cert.signer or b"",
                   transcript_context(cert.number, cert.test, cert.base, cert.known_factors))
    if st.head + st.segment > policy.max_verifier_squarings:
        raise Rejected(
            f"checking needs {st.head + st.segment} squarings, above the policy limit "
            f"{policy.max_verifier_squarings} (a deeper proof is needed)"
        )
    return st, mus, test, num, factors


def verify(
    cert: UnverifiedCertificate,
    policy: VerificationPolicy,
    *,
    clock: Callable[[], float] = time.perf_counter,
    deadline: float | None = None,
) -> VerifiedResult:
    """Verify a certificate under ``policy``. Raises Rejected with a reason; no partial results.

    Raises RunFailed (not Rejected) if the verifier's own final segment keeps failing its Gerbicz
    check: then this machine is faulty and says nothing about the certificate. Raises
    VerifyTimeout if ``clock()`` passes ``deadline`` (checked after the halvings and at every
    Gerbicz block of the final segment).
    """
    t0 = clock()

    def in_time(_step: int = 0) -> None:
        if deadline is not None and clock() > deadline:
            raise VerifyTimeout(f"verification did not finish within its time limit ({clock() - t0:.1f} s)")

    signer = _check_signature(cert, policy)
    st, mus, test, num, factors = statement_of(cert, policy)
    x, y, s, squarings = reduce_claim(st, mus)
    in_time()
    stats = ChainStats(squarings=squarings)
    block, per_check = single_check_block(s)  # the deadline is checked every block (~sqrt(s))
    got = GerbiczChain(st.group, x, s, block, per_check, stats=stats,
                       progress=in_time if deadline is not None else None).run()
    if got != y:
        raise Rejected("proof does not verify: the final segment does not match the claim")
    verdict = test.verdict(num, cert.base, st.final, factors)
    return VerifiedResult(
        number=num.text,
        test=cert.test,
        base=cert.base,
        result=verdict.result,
        residue64=verdict.residue64,
        proved=verdict.proved,
        subject=verdict.subject,
        caution=verdict.caution,
        known_factors=factors,
        claimed_squarings=cert.squarings,
        depth=st.depth,
        squarings=stats.squarings,
        seconds=clock() - t0,
        signer=signer,
        final_digest=residue_digest(st.group, st.final).hex(),
    )

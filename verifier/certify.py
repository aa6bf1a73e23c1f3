"""From captured residues to certificate bytes: proof, encoding, signature, self-check.

Shared by the worker's run engine and by the embedding recorder, so every certificate chainproof
writes is built and checked the same way.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import replace

from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from gmpy2 import mpz

from .codec import TEST_FERMAT, UnverifiedCertificate, decode_unverified, encode
from .errors import Rejected
from .numbers import Mersenne
from .proof import Statement, prove
from .signing import raw_public, sign
from .verify import VerificationPolicy, verify

#: The prover checks its own certificate with no limits on size or work (they are the verifier's
#: business) and without requiring a signature (it has just made it).
SELF_CHECK = VerificationPolicy(unsafe_accept_unsigned=True, max_verifier_squarings=1 << 62,
                                max_certificate_bytes=1 << 62)


class SelfCheckFailed(Exception):
    """The certificate just built does not verify: something outside the checked chain (proof
    building, a spool read, memory) went wrong. Carries the verifier's reason."""


def build_certificate(
    number: Mersenne,
    base: int,
    squarings: int,
    depth: int,
    final: mpz,
    digests: Sequence[bytes],
    capture: Callable[[int], mpz],
    key: Ed25519PrivateKey | None,
) -> bytes:
    """Prove, encode, sign (if ``key``) and verify a certificate of base^(2^squarings) = final.

    ``capture(j)`` returns u_j (1 <= j < 2^depth); ``digests`` are the SHA-256 of u_1..u_(2^depth).
    Raises SelfCheckFailed if the result does not verify.
    """
    signer = raw_public(key) if key is not None else b""
    st = Statement(number, base, squarings, depth, final, tuple(digests), signer)
    mus = prove(st, capture)
    cert = UnverifiedCertificate(
        number=number.text, test=TEST_FERMAT, base=base, squarings=squarings, depth=depth,
        final=number.to_bytes(final), mu=tuple(number.to_bytes(m) for m in mus),
        checkpoints=tuple(digests),
    )
    if key is not None:
        cert = replace(cert, signer=signer)
        cert = replace(cert, signature=sign(key, cert.signed_bytes()))
    data = encode(cert)
    try:  # the proof phase has no Gerbicz check: check the result before the residues go
        verify(decode_unverified(data, max_bytes=len(data)), SELF_CHECK)
    except Rejected as exc:
        raise SelfCheckFailed(exc.reason) from None
    return data

"""From captured residues to certificate bytes: proof, encoding, signature, self-check.

Shared by the worker's run engine and by the embedding recorder, so every certificate chainproof
writes is built and checked the same way.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import replace
from typing import Any

from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

from .codec import UnverifiedCertificate, decode_unverified, encode
from .errors import Rejected
from .methods import Method, transcript_context
from .numbers import Modulus
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
    method: Method,
    number: Modulus,
    base: int,
    squarings: int,
    depth: int,
    final: Any,
    digests: Sequence[bytes],
    capture: Callable[[int], Any],
    key: Ed25519PrivateKey | None,
    factors: Sequence[int] = (),
) -> bytes:
    """Prove, encode, sign (if ``key``) and verify a certificate of x_0^(2^squarings) = final for
    ``method`` on ``number``.

    ``capture(j)`` returns u_j (1 <= j < 2^depth); ``digests`` are the SHA-256 of u_1..u_(2^depth).
    Raises SelfCheckFailed if the result does not verify.
    """
    group = method.group(number)
    factor_text = tuple(str(f) for f in factors) if factors else None
    signer = raw_public(key) if key is not None else b""
    st = Statement(group, method.start(number, base), squarings, depth, final, tuple(digests), signer,
                   transcript_context(number.text, method.name, base, factor_text))
    mus = prove(st, capture)
    cert = UnverifiedCertificate(
        number=number.text, test=method.name, base=base, squarings=squarings, depth=depth,
        final=group.to_bytes(final), mu=tuple(group.to_bytes(m) for m in mus),
        checkpoints=tuple(digests), known_factors=factor_text,
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

"""The certificate file format, in one module (normative text: spec/format.md).

A certificate is ``MAGIC || VERSION || body`` where body is one msgpack map in canonical form:
string keys in sorted order, minimal-width integers, binary data as msgpack bin. Decoding is
bounded (limits below) and strict: the body must re-encode to exactly the same bytes, so every
certificate has exactly one encoding, and duplicate keys, trailing bytes or padding are rejected.

:func:`decode_unverified` returns an :class:`UnverifiedCertificate`. Nothing in it is trusted;
only :func:`verifier.verify.verify` turns one into a verified result.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Any

import msgpack

from .errors import Rejected

MAGIC = b"CHAINPRF"
VERSION = 1
HEADER = MAGIC + bytes([VERSION])

MAX_DEPTH = 24
MAX_CHECKPOINTS = 1 << MAX_DEPTH
#: Certificates larger than this are refused before parsing (a policy may lower it).
MAX_CERTIFICATE_BYTES = 1 << 30

_FIELDS: dict[str, type] = {
    "base": int,
    "checkpoints": list,
    "depth": int,
    "final": bytes,
    "mu": list,
    "number": str,
    "squarings": int,
    "test": str,
}
_SIGNATURE_FIELDS: dict[str, type] = {"signature": bytes, "signer": bytes}
#: Present only with the cofactor-prp test: the known factors of N, as decimal strings.
_OPTIONAL_FIELDS: dict[str, type] = {"known_factors": list}
MAX_NUMBER_TEXT = 1 << 20


@dataclass(frozen=True)
class UnverifiedCertificate:
    """A parsed certificate. Field types are checked; nothing else is."""

    number: str
    test: str
    base: int
    squarings: int
    depth: int
    final: bytes
    mu: tuple[bytes, ...]
    checkpoints: tuple[bytes, ...]
    signer: bytes | None = None
    signature: bytes | None = None
    known_factors: tuple[str, ...] | None = None

    def body(self, *, with_signature: bool = True) -> dict[str, Any]:
        m: dict[str, Any] = {
            "base": self.base,
            "checkpoints": list(self.checkpoints),
            "depth": self.depth,
            "final": self.final,
            "mu": list(self.mu),
            "number": self.number,
            "squarings": self.squarings,
            "test": self.test,
        }
        if self.known_factors is not None:
            m["known_factors"] = list(self.known_factors)
        if self.signer is not None:
            m["signer"] = self.signer
            if with_signature and self.signature is not None:
                m["signature"] = self.signature
        return m

    def signed_bytes(self) -> bytes:
        """What an Ed25519 signature covers: the header and every field but the signature
        itself (the signer's public key is included)."""
        return HEADER + _pack(self.body(with_signature=False))

    def unsigned(self) -> UnverifiedCertificate:
        return replace(self, signer=None, signature=None)


def _pack(m: dict[str, Any]) -> bytes:
    return msgpack.packb({k: m[k] for k in sorted(m)}, use_bin_type=True)


def encode(cert: UnverifiedCertificate) -> bytes:
    """Canonical bytes of a certificate (same content, same bytes)."""
    if (cert.signer is None) != (cert.signature is None):
        raise ValueError("signer and signature go together")
    return HEADER + _pack(cert.body())


def _no_duplicates(pairs: list[tuple[Any, Any]]) -> dict[Any, Any]:
    keys = [k for k, _ in pairs]
    if len(set(keys)) != len(keys):
        raise Rejected("duplicate key in certificate map")
    return dict(pairs)


def decode_unverified(data: bytes, *, max_bytes: int = MAX_CERTIFICATE_BYTES) -> UnverifiedCertificate:
    """Parse certificate bytes. Raises Rejected (with a one-line reason) for anything malformed.

    Memory stays proportional to ``len(data)``: msgpack's length limits are set so a short file
    cannot announce a large container.
    """
    if len(data) > max_bytes:
        raise Rejected(f"certificate is {len(data)} bytes, above the limit of {max_bytes}")
    if not data.startswith(MAGIC):
        raise Rejected("not a chainproof certificate (magic bytes missing)")
    if len(data) <= len(HEADER):
        raise Rejected("certificate truncated after the header")
    if data[len(MAGIC)] != VERSION:
        raise Rejected(f"unknown certificate format version {data[len(MAGIC)]} (this reads {VERSION})")
    body = data[len(HEADER):]
    try:
        obj = msgpack.unpackb(
            body,
            raw=False,
            use_list=True,
            strict_map_key=True,
            object_pairs_hook=_no_duplicates,
            max_str_len=min(len(body), MAX_NUMBER_TEXT),
            max_bin_len=len(body),
            max_array_len=min(len(body), MAX_CHECKPOINTS),
            max_map_len=len(_FIELDS) + len(_SIGNATURE_FIELDS) + len(_OPTIONAL_FIELDS),
            max_ext_len=0,
        )
    except Rejected:
        raise
    except msgpack.ExtraData:
        raise Rejected("trailing bytes after the certificate body") from None
    except Exception as exc:  # msgpack raises several types for malformed input
        raise Rejected(f"malformed certificate body ({type(exc).__name__})") from None
    if not isinstance(obj, dict):
        raise Rejected("certificate body is not a map")
    if not all(type(k) is str for k in obj):
        raise Rejected("certificate map keys must be strings")
    allowed = set(_FIELDS) | set(_SIGNATURE_FIELDS) | set(_OPTIONAL_FIELDS)
    unknown = sorted(set(obj) - allowed)
    if unknown:
        raise Rejected(f"unknown field {unknown[0]!r}")
    missing = sorted(set(_FIELDS) - set(obj))
    if missing:
        raise Rejected(f"missing field {missing[0]!r}")
    if ("signer" in obj) != ("signature" in obj):
        raise Rejected("signer and signature must both be present or both absent")
    for key, typ in (_FIELDS | _SIGNATURE_FIELDS | _OPTIONAL_FIELDS).items():
        if key in obj and (type(obj[key]) is not typ):
            raise Rejected(f"field {key!r} has the wrong type")
    for key in ("mu", "checkpoints"):
        if not all(type(v) is bytes for v in obj[key]):
            raise Rejected(f"field {key!r} must be a list of byte strings")
    if "known_factors" in obj and not all(type(v) is str for v in obj["known_factors"]):
        raise Rejected("field 'known_factors' must be a list of strings")
    cert = UnverifiedCertificate(
        number=obj["number"],
        test=obj["test"],
        base=obj["base"],
        squarings=obj["squarings"],
        depth=obj["depth"],
        final=obj["final"],
        mu=tuple(obj["mu"]),
        checkpoints=tuple(obj["checkpoints"]),
        signer=obj.get("signer"),
        signature=obj.get("signature"),
        known_factors=tuple(obj["known_factors"]) if "known_factors" in obj else None,
    )
    if encode(cert) != data:
        raise Rejected("certificate is not in canonical encoding")
    return cert

"""The malformed-certificate corpus (fixtures/malformed/) and the mutation sweep.

Both start from small honest certificates and break them in every way the format allows one to be
broken. Used by tools/make_fixtures.py (to write the corpus), by the tests (every case rejected)
and by tools/reliability_report.py (the counts in the README).
"""

from __future__ import annotations

import dataclasses
import itertools
from collections.abc import Callable, Iterator
from typing import Any

import msgpack

from verifier import Rejected, VerificationPolicy, decode_unverified, encode, verify
from verifier.codec import HEADER, MAGIC, UnverifiedCertificate

Signer = Callable[[UnverifiedCertificate], bytes]


def _pack(m: dict[str, Any]) -> bytes:
    return HEADER + msgpack.packb({k: m[k] for k in sorted(m)}, use_bin_type=True)


def _body(cert: UnverifiedCertificate) -> dict[str, Any]:
    return cert.body()


def corpus(
    signed: bytes, unsigned: bytes, other_signed: bytes, composite: bytes, resign: Signer
) -> Iterator[tuple[str, bytes, str, str]]:
    """Yield (name, data, policy, reason keyword). Policies as in fixtures/manifest.json.

    ``signed``/``unsigned``: honest certificates of one number; ``other_signed``: an honest signed
    certificate of another number; ``composite``: an unsigned certificate of a composite N;
    ``resign``: re-signs a changed certificate with the trusted key, so the change itself must be
    caught rather than the broken signature.
    """
    s = decode_unverified(signed)
    u = decode_unverified(unsigned)
    n = len(u.final)
    N = (1 << int(u.number[2:].split("-")[0])) - 1
    au = "accept-unsigned"

    for cut in range(len(signed)):
        yield f"truncated-{cut:04d}", signed[:cut], "default", ""

    wrong_values: list[Any] = [None, True, 1.5, "text", b"bytes", 7, -7, [1], {"a": 1}, 2**64 - 1]
    for field, value in _body(u).items():
        for bad in wrong_values:
            if type(bad) is type(value):
                continue
            yield f"type-{field}-{type(bad).__name__}", _pack({**_body(u), field: bad}), au, "type"
    for field in ("mu", "checkpoints"):
        yield f"type-{field}-element-int", _pack({**_body(u), field: [1] * len(_body(u)[field])}), au, "list"

    big = b"\xff\xff\xff\xff"
    yield "oversized-bin32", HEADER + b"\x81\xa5final\xc6" + big + b"\x00" * 64, au, "malformed"
    yield "oversized-str32", HEADER + b"\x81\xdb" + big + b"\x00" * 64, au, "malformed"
    yield "oversized-array32", HEADER + b"\x81\xa2mu\xdd" + big + b"\xc4\x00" * 32, au, "malformed"
    yield "oversized-map32", HEADER + b"\xdf" + big + b"\xa1a\x01" * 20, au, "malformed"
    yield "oversized-ext32", HEADER + b"\xc9" + big + b"\x01" + b"\x00" * 64, au, "malformed"
    yield "deep-nesting", HEADER + b"\x91" * 5000, au, ""

    def residue(v: int) -> bytes:
        return v.to_bytes(n, "little")

    for label, v in [("zero", 0), ("N", N), ("N-plus-1", N + 1), ("all-ones", 256**n - 1)]:
        yield f"final-{label}", encode(dataclasses.replace(u, final=residue(v))), au, "outside"
        mu = (residue(v), *u.mu[1:])
        yield f"mu-{label}", encode(dataclasses.replace(u, mu=mu)), au, "outside"
    # N-1 = -1 is a unit, so the codec accepts it; as a claim it is a lie the proof must catch
    yield "final-N-minus-1", resign(dataclasses.replace(s, final=residue(N - 1))), "default", "does not"
    yield "mu-N-minus-1", resign(dataclasses.replace(s, mu=(s.mu[0], residue(N - 1), *s.mu[2:]))), "default", "does not"
    yield "final-short", encode(dataclasses.replace(u, final=u.final[:-1])), au, "bytes, expected"
    yield "final-long", encode(dataclasses.replace(u, final=u.final + b"\x00")), au, "bytes, expected"
    c = decode_unverified(composite)
    factor = 23  # the composite fixture is 2^11 - 1 = 23 * 89
    nonunit = (factor * 3).to_bytes(len(c.final), "little")
    yield "final-non-unit", encode(dataclasses.replace(c, final=nonunit)), au, "not a unit"
    yield "mu-non-unit", encode(dataclasses.replace(c, mu=(nonunit, *c.mu[1:]))), au, "not a unit"

    yield "mu-too-few", resign(dataclasses.replace(s, mu=s.mu[:-1])), "default", "proof values"
    yield "mu-too-many", resign(dataclasses.replace(s, mu=(*s.mu, s.mu[-1]))), "default", "proof values"
    yield "mu-none", resign(dataclasses.replace(s, mu=())), "default", "proof values"
    for depth in (0, -1, 25, 64, 2**40):
        yield f"depth-{depth}", resign(dataclasses.replace(s, depth=depth)), "default", "depth"
    for t in (0, s.squarings - 1, s.squarings + 1, 2**63 - 1):
        yield f"squarings-{t}", resign(dataclasses.replace(s, squarings=t)), "default", "squarings"
    cps = s.checkpoints
    yield "checkpoints-too-few", resign(dataclasses.replace(s, checkpoints=cps[:-1])), "default", "checkpoint"
    yield "checkpoints-too-many", resign(dataclasses.replace(s, checkpoints=(*cps, cps[0]))), "default", "checkpoint"
    yield "checkpoint-short", resign(dataclasses.replace(s, checkpoints=(cps[0][:31], *cps[1:]))), "default", "32 bytes"
    for number in ("2^31-1 ", "2^032-1", "2^32-1", "2^4294967311-1", "M31", "2^" + "9" * 200 + "-1"):
        yield f"number-{number.strip()[:12]}", resign(dataclasses.replace(s, number=number)), "default", ""
    yield "test-unknown", resign(dataclasses.replace(s, test="lucas")), "default", "unknown test"
    for base in (0, 1, 2, 4, -3, 2**32, 2**63):
        yield f"base-{base}", resign(dataclasses.replace(s, base=base)), "default", "base"

    body = _body(u)
    packed = msgpack.packb(dict(sorted(body.items())), use_bin_type=True)
    yield "duplicate-key", HEADER + bytes([packed[0] + 1]) + packed[1:] + b"\xa4base\x03", au, "duplicate"
    unsorted = msgpack.packb(dict(sorted(body.items(), reverse=True)), use_bin_type=True)
    yield "unsorted-keys", HEADER + unsorted, au, "canonical"
    yield "non-minimal-int", HEADER + packed.replace(b"\xa4base\x03", b"\xa4base\xcd\x00\x03"), au, "canonical"
    yield "unknown-field", _pack({**body, "note": "hello"}), au, "unknown field"
    yield "non-string-key", HEADER + msgpack.packb({**body, 1: 2}, use_bin_type=True), au, ""
    yield "missing-field", _pack({k: v for k, v in body.items() if k != "depth"}), au, "missing"
    yield "body-not-map", HEADER + msgpack.packb([1, 2]), au, "not a map"
    yield "trailing-bytes", signed + b"\x00", "default", "trailing"
    yield "trailing-map", signed + msgpack.packb({"x": 1}), "default", "trailing"
    yield "unknown-version", MAGIC + b"\x02" + signed[len(HEADER):], "default", "version"
    yield "no-magic", b"\x00" * 8 + signed[8:], "default", "magic"
    yield "empty", b"", "default", "magic"

    sig_other = decode_unverified(other_signed).signature
    yield "signature-of-other-content", encode(dataclasses.replace(s, signature=sig_other)), "default", "signature"
    yield "signature-short", encode(dataclasses.replace(s, signature=(s.signature or b"")[:63])), "default", "signature"
    yield "signer-short", encode(dataclasses.replace(s, signer=(s.signer or b"")[:31])), "default", "signature"
    yield "signer-without-signature", _pack({**body, "signer": s.signer}), "default", "both"
    yield "untrusted-signer", other_signed, "trusted", "not a trusted key"
    yield "unsigned-under-default", unsigned, "default", "unsigned"


# -- mutation sweep ---------------------------------------------------------------------------
def leaf_mutations(
    cert: UnverifiedCertificate, other: UnverifiedCertificate
) -> Iterator[tuple[str, UnverifiedCertificate]]:
    """Every leaf value changed once: a bit flip (first, middle and last bit of byte strings),
    +1 and -1 (integers, and byte strings read as little-endian integers), every pair of mu swapped,
    and each mu replaced by the same-position mu of ``other`` (an honest certificate of the same
    number with another base or depth)."""

    def flips(b: bytes) -> Iterator[tuple[str, bytes]]:
        for bit in sorted({0, len(b) * 4, len(b) * 8 - 1}):
            yield f"bit{bit}", b[: bit // 8] + bytes([b[bit // 8] ^ (1 << (bit % 8))]) + b[bit // 8 + 1:]
        v = int.from_bytes(b, "little")
        for d in (1, -1):
            if 0 <= v + d < 256 ** len(b):
                yield f"{d:+d}", (v + d).to_bytes(len(b), "little")

    for field in ("base", "squarings", "depth"):
        v = getattr(cert, field)
        for d in (1, -1):
            yield f"{field}{d:+d}", dataclasses.replace(cert, **{field: v + d})
        yield f"{field}^1", dataclasses.replace(cert, **{field: v ^ 1})
    text = cert.number
    for i in range(len(text)):
        yield f"number[{i}]", dataclasses.replace(cert, number=text[:i] + chr(ord(text[i]) ^ 1) + text[i + 1:])
    yield "test[0]", dataclasses.replace(cert, test=chr(ord(cert.test[0]) ^ 1) + cert.test[1:])
    for label, b in flips(cert.final):
        yield f"final:{label}", dataclasses.replace(cert, final=b)
    for i, m in enumerate(cert.mu):
        for label, b in flips(m):
            yield f"mu[{i}]:{label}", dataclasses.replace(cert, mu=cert.mu[:i] + (b,) + cert.mu[i + 1:])
    for i, c in enumerate(cert.checkpoints):
        for label, b in flips(c):
            cps = cert.checkpoints[:i] + (b,) + cert.checkpoints[i + 1:]
            yield f"checkpoint[{i}]:{label}", dataclasses.replace(cert, checkpoints=cps)
    for i, j in itertools.combinations(range(len(cert.mu)), 2):
        mu = list(cert.mu)
        mu[i], mu[j] = mu[j], mu[i]
        yield f"swap mu[{i}],mu[{j}]", dataclasses.replace(cert, mu=tuple(mu))
    for i in range(min(len(cert.mu), len(other.mu))):
        if other.mu[i] != cert.mu[i]:
            yield f"mu[{i}] from other", dataclasses.replace(cert, mu=cert.mu[:i] + (other.mu[i],) + cert.mu[i + 1:])


def accepted(data: bytes, policy: VerificationPolicy) -> bool:
    try:
        verify(decode_unverified(data), policy)
    except Rejected:
        return False
    return True


def sweep(
    cert: UnverifiedCertificate, other: UnverifiedCertificate, policy: VerificationPolicy, resign: Signer | None
) -> tuple[int, list[str]]:
    """Apply every leaf mutation; return (how many tried, labels of those accepted)."""
    tried, passed = 0, []
    for label, changed in leaf_mutations(cert, other):
        tried += 1
        if accepted(resign(changed) if resign is not None else encode(changed), policy):
            passed.append(label)
    return tried, passed

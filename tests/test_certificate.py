"""The certificate codec and verifier against tampering: every change must be rejected."""

from __future__ import annotations

import dataclasses
import hashlib
from pathlib import Path

import msgpack
import pytest
from conftest import det_key, make_certificate
from hypothesis import given
from hypothesis import strategies as st
from malformed import accepted

from verifier import Rejected, VerificationPolicy, decode_unverified, encode, verify
from verifier.codec import HEADER, MAGIC
from verifier.signing import raw_public

ACCEPT_UNSIGNED = VerificationPolicy(unsafe_accept_unsigned=True)


@pytest.fixture(scope="module")
def small(tmp_path_factory: pytest.TempPathFactory) -> dict[str, bytes]:
    """A signed and an unsigned certificate of 2^61-1 at depth 3 (small enough to flip every bit)."""
    tmp = tmp_path_factory.mktemp("small")
    signed, _ = make_certificate(tmp, "2^61-1", depth=3, key=det_key(), name="s.cpc")
    unsigned, _ = make_certificate(tmp, "2^61-1", depth=3, name="u.cpc")
    return {"signed": signed, "unsigned": unsigned}


def test_honest_certificates_verify(small: dict[str, bytes]) -> None:
    assert accepted(small["signed"], VerificationPolicy())
    assert accepted(small["signed"], VerificationPolicy(trusted_signers=frozenset({raw_public(det_key())})))
    assert accepted(small["unsigned"], ACCEPT_UNSIGNED)


def test_encoding_is_canonical(small: dict[str, bytes]) -> None:
    for data in small.values():
        assert encode(decode_unverified(data)) == data


def test_policy_decisions(small: dict[str, bytes]) -> None:
    with pytest.raises(Rejected, match="unsigned"):
        verify(decode_unverified(small["unsigned"]), VerificationPolicy())
    other = frozenset({raw_public(det_key("someone else"))})
    with pytest.raises(Rejected, match="not a trusted key"):
        verify(decode_unverified(small["signed"]), VerificationPolicy(trusted_signers=other))
    with pytest.raises(ValueError):
        VerificationPolicy(trusted_signers=frozenset())
    with pytest.raises(Rejected, match="depth 3 below"):
        verify(decode_unverified(small["signed"]), VerificationPolicy(min_depth=4))


@pytest.mark.parametrize("kind", ["signed", "unsigned"])
def test_every_single_bit_flip_is_rejected(small: dict[str, bytes], kind: str) -> None:
    """Exhaustive: flip each bit of the file once. The unsigned certificate is checked under a
    policy that accepts unsigned ones, so only the mathematics and the codec stand in the way."""
    data = small[kind]
    policy = VerificationPolicy() if kind == "signed" else ACCEPT_UNSIGNED
    survivors = []
    for i in range(len(data) * 8):
        mutated = bytearray(data)
        mutated[i // 8] ^= 1 << (i % 8)
        if accepted(bytes(mutated), policy):
            survivors.append(i)
    assert survivors == []


def _field_changes(cert):  # type: ignore[no-untyped-def]
    """Single-field changes of a certificate (each stays well-typed so it reaches the verifier)."""
    def flip(b: bytes) -> bytes:
        return bytes([b[0] ^ 1]) + b[1:]

    mu, cps = list(cert.mu), list(cert.checkpoints)
    yield "number", dataclasses.replace(cert, number="2^67-1")
    yield "number spelling", dataclasses.replace(cert, number="2^061-1")
    yield "test", dataclasses.replace(cert, test="fermat")
    yield "base", dataclasses.replace(cert, base=cert.base + 2)
    yield "squarings+1", dataclasses.replace(cert, squarings=cert.squarings + 1)
    yield "squarings-1", dataclasses.replace(cert, squarings=cert.squarings - 1)
    yield "depth+1", dataclasses.replace(cert, depth=cert.depth + 1)
    yield "depth-1", dataclasses.replace(cert, depth=cert.depth - 1)
    yield "final", dataclasses.replace(cert, final=flip(cert.final))
    plus_one = (int.from_bytes(cert.final, "little") + 1).to_bytes(len(cert.final), "little")
    yield "final+1", dataclasses.replace(cert, final=plus_one)
    yield "mu swapped", dataclasses.replace(cert, mu=tuple([mu[1], mu[0], *mu[2:]]))
    yield "mu dropped", dataclasses.replace(cert, mu=tuple(mu[:-1]))
    yield "mu extra", dataclasses.replace(cert, mu=tuple([*mu, mu[-1]]))
    for i in range(len(mu)):
        yield f"mu[{i}]", dataclasses.replace(cert, mu=tuple(mu[:i] + [flip(mu[i])] + mu[i + 1:]))
    for i in range(len(cps)):
        yield f"checkpoint[{i}]", dataclasses.replace(cert, checkpoints=tuple(cps[:i] + [flip(cps[i])] + cps[i + 1:]))
    yield "checkpoints reversed", dataclasses.replace(cert, checkpoints=tuple(reversed(cps)))
    yield "checkpoints dropped", dataclasses.replace(cert, checkpoints=tuple(cps[:-1]))


@pytest.mark.parametrize("kind", ["signed", "unsigned"])
def test_every_single_field_change_is_rejected(small: dict[str, bytes], kind: str) -> None:
    cert = decode_unverified(small[kind])
    policy = VerificationPolicy() if kind == "signed" else ACCEPT_UNSIGNED
    key = det_key()
    for label, changed in _field_changes(cert):
        if kind == "signed":  # re-sign, so the mathematics has to catch it, not the signature
            changed = dataclasses.replace(changed, signature=None)
            changed = dataclasses.replace(changed, signature=key.sign(changed.signed_bytes()))
        assert not accepted(encode(changed), policy), label


@given(
    p=st.sampled_from([31, 61, 89, 107, 127, 521, 607, 1279, 1277, 2203, 2281]),
    depth=st.integers(1, 8),
    base=st.sampled_from([3, 5, 7]),
    signed=st.booleans(),
)
def test_honest_certificates_verify_for_random_shapes(
    tmp_path_factory: pytest.TempPathFactory, p: int, depth: int, base: int, signed: bool
) -> None:
    if (1 << depth) > p:
        return
    data, _ = make_certificate(tmp_path_factory.mktemp("h"), f"2^{p}-1", depth=depth, base=base,
                               key=det_key() if signed else None)
    result = verify(decode_unverified(data), VerificationPolicy(unsafe_accept_unsigned=not signed))
    assert result.depth == depth and result.claimed_squarings == p


def test_resigned_by_another_key_is_rejected(small: dict[str, bytes]) -> None:
    """Taking credit for someone else's run: the new signature is valid, but the proof's
    challenges are bound to the original signer, so even a policy trusting mallory rejects it."""
    cert = decode_unverified(small["signed"])
    mallory = det_key("mallory")
    other = dataclasses.replace(cert, signer=raw_public(mallory), signature=None)
    other = dataclasses.replace(other, signature=mallory.sign(other.signed_bytes()))
    trust_mallory = VerificationPolicy(trusted_signers=frozenset({raw_public(mallory)}))
    with pytest.raises(Rejected, match="proof does not verify"):
        verify(decode_unverified(encode(other)), trust_mallory)
    trusted = VerificationPolicy(trusted_signers=frozenset({raw_public(det_key())}))
    assert not accepted(encode(other), trusted)
    # stripping the signature fails the same way: the proof was bound to the signer
    assert not accepted(encode(cert.unsigned()), ACCEPT_UNSIGNED)


# -- codec structure ---------------------------------------------------------------------------
def _raw(small: dict[str, bytes]) -> dict:  # type: ignore[type-arg]
    return msgpack.unpackb(small["unsigned"][len(HEADER):], raw=False)


def _reject(data: bytes, match: str) -> None:
    with pytest.raises(Rejected, match=match):
        verify(decode_unverified(data), ACCEPT_UNSIGNED)


def test_structural_rejections(small: dict[str, bytes]) -> None:
    data = small["unsigned"]
    body = _raw(small)
    _reject(data + b"\x00", "trailing bytes")
    _reject(b"NOTACERT" + data[len(MAGIC):], "magic")
    _reject(MAGIC + b"\x02" + data[len(HEADER):], "version 2")
    _reject(data[: len(HEADER)], "truncated")
    _reject(data[:-5], "malformed")
    _reject(HEADER + msgpack.packb([1, 2, 3]), "not a map")
    _reject(HEADER + msgpack.packb({**body, "extra": 1}), "unknown field")
    del body["final"]
    _reject(HEADER + msgpack.packb(body, use_bin_type=True), "missing field")
    body = _raw(small)
    _reject(HEADER + msgpack.packb({**body, "depth": "3"}, use_bin_type=True), "wrong type")
    _reject(HEADER + msgpack.packb({**body, "depth": True}, use_bin_type=True), "wrong type")
    _reject(HEADER + msgpack.packb({**body, "mu": [1, 2, 3]}, use_bin_type=True), "list of byte strings")
    # unsorted keys: same content, other bytes
    _reject(HEADER + msgpack.packb(dict(reversed(list(body.items()))), use_bin_type=True), "canonical")
    # a non-minimal integer encoding (uint32 for the base)
    packed = msgpack.packb(body, use_bin_type=True)
    assert b"\xa4base\x03" in packed
    _reject(HEADER + packed.replace(b"\xa4base\x03", b"\xa4base\xce\x00\x00\x00\x03"), "canonical")
    # a duplicate key: the map header says one more entry, and "base" appears twice
    dup = bytes([packed[0] + 1]) + packed[1:] + b"\xa4base\x03"
    _reject(HEADER + dup, "duplicate key")


def test_residue_range_and_units(small: dict[str, bytes]) -> None:
    cert = decode_unverified(small["unsigned"])
    n = len(cert.final)
    N = 2**61 - 1
    for value, reason in [(0, "outside"), (N, "outside"), (N + 5, "outside"), (2**64 - 1, "outside")]:
        bad = dataclasses.replace(cert, final=value.to_bytes(n, "little"))
        _reject(encode(bad), reason)
    _reject(encode(dataclasses.replace(cert, final=cert.final + b"\x00")), "bytes, expected")
    bad_mu = dataclasses.replace(cert, mu=(b"\x00" * n, *cert.mu[1:]))
    _reject(encode(bad_mu), "proof value 1")


def test_non_unit_residue_rejected(tmp_path: Path) -> None:
    # 2^11 - 1 = 23 * 89 (common practice): a residue divisible by 23 is not a unit.
    _, cert = make_certificate(tmp_path, "2^11-1", depth=2)
    bad = dataclasses.replace(cert, mu=((23 * 5).to_bytes(2, "little"), *cert.mu[1:]))
    _reject(encode(bad), "not a unit")


def test_decoder_memory_is_bounded() -> None:
    """A 100-byte file announcing huge containers must not allocate them."""
    import tracemalloc

    bombs = [
        HEADER + b"\xdd\xff\xff\xff\xff" + b"\x00" * 90,  # array32 of 4G entries
        HEADER + b"\xdf\xff\xff\xff\xff" + b"\x00" * 90,  # map32 of 4G entries
        HEADER + b"\xc6\xff\xff\xff\xff" + b"\x00" * 90,  # bin32 of 4 GiB
        HEADER + b"\xdb\xff\xff\xff\xff" + b"\x00" * 90,  # str32 of 4 GiB
        HEADER + b"\x81\xa2mu\xdd\x7f\xff\xff\xff" + b"\xc0" * 80,
    ]
    tracemalloc.start()
    for data in bombs:
        with pytest.raises(Rejected):
            decode_unverified(data)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    assert peak < 4 * 2**20


def test_checkpoint_hashes_bind_final_and_midpoint(small: dict[str, bytes]) -> None:
    cert = decode_unverified(small["unsigned"])
    assert cert.checkpoints[-1] == hashlib.sha256(cert.final).digest()
    assert cert.checkpoints[(1 << (cert.depth - 1)) - 1] == hashlib.sha256(cert.mu[0]).digest()


def test_non_string_keys_rejected(small: dict[str, bytes]) -> None:
    body = _raw(small)
    mixed = {**body, b"bin-key": 1, "zzz": 2}
    packed = msgpack.packb(mixed, use_bin_type=True)
    _reject(HEADER + packed, "keys must be strings")


def test_verifier_work_is_bounded_by_policy(small: dict[str, bytes]) -> None:
    cert = decode_unverified(small["signed"])  # 2^61-1 at depth 3: 5 head + 7 segment squarings
    with pytest.raises(Rejected, match="policy limit"):
        verify(cert, VerificationPolicy(max_verifier_squarings=11))
    verify(cert, VerificationPolicy(max_verifier_squarings=12))

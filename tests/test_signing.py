"""Signing wrapper: RFC 8032 test vector, key files, fingerprints."""

from __future__ import annotations

import os
import stat
from pathlib import Path

import pytest
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

from verifier.errors import UsageError
from verifier.signing import (
    fingerprint,
    generate_keypair,
    load_private_key,
    load_public_key,
    raw_public,
    sign,
    signature_valid,
)


def test_rfc8032_test_vector_1() -> None:
    """RFC 8032, section 7.1, TEST 1 (empty message); hex values from memory."""
    secret = bytes.fromhex("9d61b19deffd5a60ba844af492ec2cc44449c5697b326919703bac031cae7f60")
    public = bytes.fromhex("d75a980182b10ab7d54bfed3c964073a0ee172f3daa62325af021a68f707511a")
    signature = bytes.fromhex(
        "e5564300c360ac729086e2cc806e828a84877f1eb8e5d974d873e065224901555fb8821590a33bacc61e39701cf9b46bd25bf5f0595bbe24655141438e7a100b"
    )
    key = Ed25519PrivateKey.from_private_bytes(secret)
    assert raw_public(key) == public
    assert sign(key, b"") == signature
    assert signature_valid(public, b"", signature)
    assert not signature_valid(public, b"x", signature)
    assert not signature_valid(public, b"", signature[:-1] + bytes([signature[-1] ^ 1]))
    assert not signature_valid(public[:31], b"", signature)


def test_key_files_round_trip(tmp_path: Path) -> None:
    key_path = tmp_path / "w.key"
    pub_path, fp = generate_keypair(key_path)
    assert stat.S_IMODE(key_path.stat().st_mode) == 0o600
    key = load_private_key(key_path)
    assert load_public_key(pub_path) == raw_public(key)
    assert fp == fingerprint(raw_public(key)) and len(fp) == len("ed25519:") + 32


@pytest.mark.parametrize("mode", [0o640, 0o604, 0o660, 0o644])
def test_group_or_world_access_refused(tmp_path: Path, mode: int) -> None:
    key_path = tmp_path / "w.key"
    generate_keypair(key_path)
    os.chmod(key_path, mode)
    with pytest.raises(UsageError, match="chmod 600"):
        load_private_key(key_path)


def test_passphrase(tmp_path: Path) -> None:
    key_path = tmp_path / "p.key"
    generate_keypair(key_path, b"s3cret")
    with pytest.raises(UsageError, match="passphrase"):
        load_private_key(key_path)
    with pytest.raises(UsageError):
        load_private_key(key_path, b"wrong")
    assert isinstance(load_private_key(key_path, b"s3cret"), Ed25519PrivateKey)


def test_bad_public_key_files(tmp_path: Path) -> None:
    junk = tmp_path / "junk.pub"
    junk.write_text("not a key")
    with pytest.raises(UsageError):
        load_public_key(junk)
    with pytest.raises(UsageError):
        load_public_key(tmp_path / "missing.pub")

"""Mutation sweep (tools/malformed.py): every leaf of a valid certificate changed once; none may
be accepted. Signed certificates are re-signed after each change so that the mathematics, not the
signature, has to catch it; unsigned ones run under a policy that accepts unsigned certificates."""

from __future__ import annotations

import dataclasses
from pathlib import Path

import pytest
from conftest import det_key, make_certificate
from malformed import sweep

from verifier import VerificationPolicy, encode
from verifier.codec import UnverifiedCertificate
from verifier.signing import raw_public


def resign(cert: UnverifiedCertificate) -> bytes:
    key = det_key()
    cert = dataclasses.replace(cert, signer=raw_public(key), signature=None)
    return encode(dataclasses.replace(cert, signature=key.sign(cert.signed_bytes())))


@pytest.mark.parametrize("number, depth", [("2^127-1", 4), ("2^521-1", 6), ("2^89-1", 1)])
def test_no_leaf_mutation_is_accepted(tmp_path: Path, number: str, depth: int) -> None:
    _, signed = make_certificate(tmp_path, number, depth=depth, key=det_key(), name="s.cpc")
    _, other = make_certificate(tmp_path, number, depth=depth, base=5, key=det_key(), name="o.cpc")
    tried, accepted = sweep(signed, other, VerificationPolicy(), resign)
    assert tried > 20 and accepted == []
    _, unsigned = make_certificate(tmp_path, number, depth=depth, name="u.cpc")
    _, other_u = make_certificate(tmp_path, number, depth=depth, base=5, name="ou.cpc")
    tried, accepted = sweep(unsigned, other_u, VerificationPolicy(unsafe_accept_unsigned=True), None)
    assert tried > 20 and accepted == []

"""Shared helpers: honest certificates made through the real run engine."""

from __future__ import annotations

import hashlib
import sys
from pathlib import Path

import pytest
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from hypothesis import HealthCheck, settings

from verifier import Run, RunConfig, decode_unverified, parse_number
from verifier.codec import UnverifiedCertificate

# tools/ holds the fixture generator and the adversarial prover that tests share with it
sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tools"))

settings.register_profile(
    "ci", max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow]
)
# tools/ holds the fixture generator and the adversarial prover that tests share with it
sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tools"))

settings.register_profile("dev", max_examples=15, deadline=None)
settings.load_profile("ci")


def det_key(label: str = "tests") -> Ed25519PrivateKey:
    """A deterministic Ed25519 key, so signed certificates are reproducible."""
    seed = hashlib.sha256(b"chainproof test key: " + label.encode()).digest()
    return Ed25519PrivateKey.from_private_bytes(seed)


def make_certificate(
    tmp: Path,
    number: str,
    *,
    depth: int = 3,
    base: int = 3,
    key: Ed25519PrivateKey | None = None,
    name: str = "c.cpc",
) -> tuple[bytes, UnverifiedCertificate]:
    out = tmp / name
    Run(RunConfig(parse_number(number), base=base, depth=depth), out, key=key).run()
    data = out.read_bytes()
    return data, decode_unverified(data)


@pytest.fixture
def signer() -> Ed25519PrivateKey:
    return det_key()

"""Write the deterministic test-vector certificates in fixtures/ (valid and invalid).

    python tools/make_fixtures.py [OUTDIR]      # default: fixtures/ beside this folder

Everything is reproducible: runs are deterministic, the signing keys derive from fixed seeds, and
Ed25519 signatures are deterministic (RFC 8032). tests/test_fixtures.py regenerates the set and
compares it byte for byte with the committed files, then checks every expected outcome.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import sys
import tempfile
from pathlib import Path
from typing import Any

from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from gmpy2 import mpz

sys.path.insert(0, str(Path(__file__).resolve().parent))
sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from adversary import forge  # noqa: E402
from malformed import corpus  # noqa: E402

from verifier import Run, RunConfig, decode_unverified, encode, parse_number  # noqa: E402
from verifier.codec import HEADER, MAGIC, UnverifiedCertificate  # noqa: E402
from verifier.numbers import Mersenne, parse_modulus  # noqa: E402
from verifier.signing import raw_public  # noqa: E402


def fixture_key(label: str) -> Ed25519PrivateKey:
    return Ed25519PrivateKey.from_private_bytes(
        hashlib.sha256(b"chainproof fixture key: " + label.encode()).digest()
    )


SIGNER = fixture_key("Maple Street Squaring Circle")
STRANGER = fixture_key("a stranger")


def signed(cert: UnverifiedCertificate, key: Ed25519PrivateKey = SIGNER) -> bytes:
    cert = dataclasses.replace(cert, signer=raw_public(key), signature=None)
    return encode(dataclasses.replace(cert, signature=key.sign(cert.signed_bytes())))


def run(number: str, depth: int, base: int = 3, key: Ed25519PrivateKey | None = SIGNER,
        **config: object) -> UnverifiedCertificate:
    """An honest run; the proof is bound to ``key`` (None: unsigned). The result is returned
    without its signature; :func:`signed` adds it."""
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp) / "c.cpc"
        num = parse_modulus(number) if number.isdigit() else parse_number(number)
        Run(RunConfig(num, base=base, depth=depth, **config), out, key=key).run()  # type: ignore[arg-type]
        return decode_unverified(out.read_bytes()).unsigned()


def build() -> dict[str, tuple[bytes, dict[str, Any]]]:
    """name -> (bytes, expectation). Policies: 'default' (any valid signature, unsigned refused),
    'trusted' (only fixture-signer.pub), 'accept-unsigned'."""
    m127, m521, m11 = run("2^127-1", 4), run("2^521-1", 5, key=None), run("2^11-1", 2)
    m89b5 = run("2^89-1", 3, base=5)
    ok = {"expect": "verified"}
    files: dict[str, tuple[bytes, dict[str, Any]]] = {
        "valid/m127-signed.cpc": (signed(m127), {**ok, "policy": "trusted", "result": "probable-prime"}),
        "valid/m521-unsigned.cpc": (encode(m521), {**ok, "policy": "accept-unsigned",
                                                   "result": "probable-prime"}),
        "valid/m11-composite.cpc": (signed(m11), {**ok, "policy": "trusted", "result": "composite"}),
        "valid/m89-base5.cpc": (signed(m89b5), {**ok, "policy": "default", "result": "probable-prime"}),
        "valid/m127-lucas-lehmer.cpc": (signed(run("2^127-1", 4, base=4, test="lucas-lehmer")),
                                        {**ok, "policy": "trusted", "result": "prime"}),
        "valid/f5-pepin.cpc": (signed(run("2^(2^5)+1", 4)), {**ok, "policy": "trusted", "result": "composite"}),
        "valid/3x2e66p1-proth.cpc": (signed(run("3*2^66+1", 4, base=5, test="proth")),
                                     {**ok, "policy": "trusted", "result": "prime"}),
        "valid/m29-cofactor.cpc": (signed(run("2^29-1", 2, known_factors=(233, 1103))),
                                   {**ok, "policy": "trusted", "result": "probable-prime"}),
        "valid/delay-192bit.cpc": (signed(run(str((2**89 - 1) * (2**107 - 1)), 4, test="delay",
                                              delay_squarings=1000)),
                                   {**ok, "policy": "trusted", "result": "computed"}),
    }

    def bad(name: str, data: bytes, reason: str, policy: str = "default") -> None:
        files[f"invalid/{name}"] = (data, {"expect": "rejected", "policy": policy, "reason": reason})

    num = Mersenne(127)
    neg, _ = forge(num, 3, 4, num.N - 1, raw_public(SIGNER))
    two, _ = forge(num, 3, 4, mpz(2), raw_public(SIGNER))
    bad("m127-negated-final.cpc", signed(neg), "proof does not verify")
    bad("m127-final-times-two.cpc", signed(two), "proof does not verify")
    good = signed(m127)
    flipped = bytearray(good)
    flipped[len(HEADER) + 40] ^= 0x01
    bad("m127-bit-flip.cpc", bytes(flipped), "")
    mu = list(m127.mu)
    bad("m127-mu-swapped.cpc", signed(dataclasses.replace(m127, mu=(mu[1], mu[0], *mu[2:]))),
        "does not")
    bad("m127-wrong-squarings.cpc", signed(dataclasses.replace(m127, squarings=126)), "squarings")
    bad("m127-trailing-bytes.cpc", good + b"\x00", "trailing bytes")
    bad("m127-unknown-version.cpc", MAGIC + b"\x07" + good[len(HEADER):], "version")
    bad("m127-truncated.cpc", good[: len(good) // 2], "malformed")
    bad("m127-untrusted-signer.cpc", signed(m127, STRANGER), "not a trusted key", "trusted")
    # re-signing someone else's certificate: the signature is valid, the proof is bound to the
    # original signer, so the mathematics rejects it even when the new signer is trusted
    bad("m127-resigned-by-stranger.cpc", signed(m127, STRANGER), "proof does not verify")
    bad("m521-unsigned-under-default.cpc", encode(m521), "unsigned")
    other = signed(m11)
    cert = decode_unverified(good)
    wrong_sig = dataclasses.replace(cert, signature=decode_unverified(other).signature)
    bad("m127-signature-of-other-content.cpc", encode(wrong_sig), "signature does not verify")
    small_signed, small_unsigned = signed(run("2^31-1", 2)), encode(run("2^31-1", 2, key=None))
    stranger = signed(run("2^61-1", 2, key=STRANGER), STRANGER)
    for name, data, policy, reason in corpus(small_signed, small_unsigned, stranger, encode(m11_unsigned()),
                                             signed):
        files[f"malformed/{name}.cpc"] = (data, {"expect": "rejected", "policy": policy, "reason": reason})
    return files


def m11_unsigned() -> UnverifiedCertificate:
    return run("2^11-1", 2, key=None)


def write(outdir: Path) -> None:
    files = build()
    manifest = {}
    for name, (data, expect) in sorted(files.items()):
        path = outdir / name
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(data)
        manifest[name] = {"sha256": hashlib.sha256(data).hexdigest(), **expect}
    pub = SIGNER.public_key().public_bytes(
        serialization.Encoding.PEM, serialization.PublicFormat.SubjectPublicKeyInfo
    )
    (outdir / "fixture-signer.pub").write_bytes(pub)
    (outdir / "manifest.json").write_text(json.dumps(manifest, indent=1, sort_keys=True) + "\n")


if __name__ == "__main__":
    write(Path(sys.argv[1]) if len(sys.argv) > 1 else Path(__file__).resolve().parent.parent / "fixtures")

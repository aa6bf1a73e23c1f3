"""Test vectors: fixtures/ is reproduced byte for byte by tools/make_fixtures.py, and every file
gets the outcome its manifest states (through the real command line, exit codes included)."""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import make_fixtures
import pytest

from verifier.cli import main

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
MANIFEST = json.loads((FIXTURES / "manifest.json").read_text())


def test_fixtures_are_reproduced_byte_for_byte(tmp_path: Path) -> None:
    make_fixtures.write(tmp_path)
    produced = sorted(p.relative_to(tmp_path) for p in tmp_path.rglob("*") if p.is_file())
    committed = sorted(p.relative_to(FIXTURES) for p in FIXTURES.rglob("*") if p.is_file())
    assert produced == committed
    for rel in produced:
        assert (tmp_path / rel).read_bytes() == (FIXTURES / rel).read_bytes(), rel


@pytest.mark.parametrize("name", sorted(MANIFEST))
def test_fixture_outcome(name: str, capsys: pytest.CaptureFixture[str]) -> None:
    entry = MANIFEST[name]
    path = FIXTURES / name
    assert hashlib.sha256(path.read_bytes()).hexdigest() == entry["sha256"]
    args = ["check", str(path), "--json"]
    if entry["policy"] == "trusted":
        args += ["--trusted-key", str(FIXTURES / "fixture-signer.pub")]
    elif entry["policy"] == "accept-unsigned":
        args += ["--accept-unsigned"]
    code = main(args)
    captured = capsys.readouterr()
    out = json.loads(captured.out)
    assert captured.err == ""
    if entry["expect"] == "verified":
        assert code == 0 and out["verified"] is True and out["result"] == entry["result"]
    else:
        assert code == 1 and out["verified"] is False
        assert entry["reason"] in out["reason"]
        # human output: exactly one line naming the reason, nothing on stderr
        assert main([a for a in args if a != "--json"]) == 1
        captured = capsys.readouterr()
        assert captured.out.count("\n") == 1 and captured.out.startswith("REJECTED")
        assert out["reason"] in captured.out and captured.err == ""


def test_rejecting_the_malformed_corpus_needs_little_memory() -> None:
    """Peak Python memory while decoding and verifying each malformed file (tracemalloc)."""
    import tracemalloc

    from verifier import Rejected, VerificationPolicy, decode_unverified, verify
    from verifier.signing import load_public_key

    policies = {
        "default": VerificationPolicy(),
        "accept-unsigned": VerificationPolicy(unsafe_accept_unsigned=True),
        "trusted": VerificationPolicy(
            trusted_signers=frozenset({load_public_key(FIXTURES / "fixture-signer.pub")})
        ),
    }
    worst = 0
    for name, entry in MANIFEST.items():
        if not name.startswith("malformed/"):
            continue
        data = (FIXTURES / name).read_bytes()
        tracemalloc.start()
        with pytest.raises(Rejected):
            verify(decode_unverified(data), policies[entry["policy"]])
        worst = max(worst, tracemalloc.get_traced_memory()[1] - len(data))
        tracemalloc.stop()
    assert worst < 2 * 2**20, worst

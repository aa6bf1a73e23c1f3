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
    out = json.loads(capsys.readouterr().out)
    if entry["expect"] == "verified":
        assert code == 0 and out["verified"] is True and out["result"] == entry["result"]
    else:
        assert code == 1 and out["verified"] is False
        assert entry["reason"] in out["reason"]

"""Fuzzing the certificate reader and verifier: only "verified" or Rejected may come out.

Two fuzzers, both seeded with the fixtures: hypothesis (mutations of fixture bytes, random bytes)
and a bounded atheris run (coverage-guided; tools/fuzz_certificate.py runs longer campaigns)."""

from __future__ import annotations

import importlib.util
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from verifier import Rejected, VerificationPolicy, decode_unverified, verify

ROOT = Path(__file__).resolve().parent.parent
SEEDS = sorted((ROOT / "fixtures").rglob("*.cpc"))
SEED_BYTES = [p.read_bytes() for p in SEEDS if p.stat().st_size < 4096]
POLICY = VerificationPolicy(unsafe_accept_unsigned=True, max_verifier_squarings=50_000)


def outcome(data: bytes) -> str:
    try:
        verify(decode_unverified(data), POLICY)
    except Rejected as exc:
        assert exc.reason and "\n" not in exc.reason
        return "rejected"
    return "verified"


@st.composite
def mutated(draw: st.DrawFn) -> bytes:
    data = bytearray(draw(st.sampled_from(SEED_BYTES)))
    for _ in range(draw(st.integers(1, 8))):
        op = draw(st.sampled_from(["flip", "set", "insert", "delete", "truncate"]))
        i = draw(st.integers(0, max(0, len(data) - 1)))
        if op == "flip" and data:
            data[i] ^= 1 << draw(st.integers(0, 7))
        elif op == "set" and data:
            data[i] = draw(st.sampled_from([0x00, 0xFF, 0xC0, 0xC2, 0xC3, 0xCC, 0xCD, 0xCE, 0xCF, 0xD3,
                                            0xDC, 0xDD, 0xDE, 0xDF, 0xC4, 0xC5, 0xC6, 0x7F, 0x80, 0x90]))
        elif op == "insert":
            data[i:i] = draw(st.binary(min_size=1, max_size=8))
        elif op == "delete" and data:
            del data[i:i + draw(st.integers(1, 8))]
        elif op == "truncate":
            del data[i:]
    return bytes(data)


@settings(max_examples=400, deadline=None)
@given(mutated())
def test_mutated_fixtures_only_verify_or_reject(data: bytes) -> None:
    outcome(data)


@settings(max_examples=200, deadline=None)
@given(st.binary(max_size=600))
def test_random_bytes_are_rejected(data: bytes) -> None:
    assert outcome(data) == "rejected"


@pytest.mark.skipif(importlib.util.find_spec("atheris") is None, reason="atheris not installed")
def test_bounded_atheris_run(tmp_path: Path) -> None:
    corpus = tmp_path / "corpus"
    corpus.mkdir()
    for p in SEEDS:
        shutil.copy(p, corpus / f"{p.parent.name}-{p.name}")
    proc = subprocess.run(
        [sys.executable, str(ROOT / "tools" / "fuzz_certificate.py"), str(corpus), "-runs=30000",
         f"-artifact_prefix={tmp_path}/"],
        capture_output=True, text=True, timeout=600,
    )
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert "Done 30000 runs" in proc.stderr

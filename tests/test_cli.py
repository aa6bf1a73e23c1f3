"""The command line, end to end: outputs, JSON fields and exit codes."""

from __future__ import annotations

import json
import os
import stat
import subprocess
import sys
from pathlib import Path

import pytest

from verifier.cli import main


def run_cli(capsys: pytest.CaptureFixture[str], *args: str) -> tuple[int, dict]:  # type: ignore[type-arg]
    code = main([*args, "--json"])
    out = capsys.readouterr().out.strip().splitlines()
    assert len(out) == 1, out  # --json prints exactly one object
    return code, json.loads(out[0])


@pytest.fixture
def keys(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> Path:
    key = tmp_path / "worker.key"
    code, obj = run_cli(capsys, "keygen", "-o", str(key))
    assert code == 0 and obj["fingerprint"].startswith("ed25519:")
    return key


def test_keygen_writes_private_0600_and_public_beside(keys: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert stat.S_IMODE(keys.stat().st_mode) == 0o600
    assert keys.with_name("worker.key.pub").read_bytes().startswith(b"-----BEGIN PUBLIC KEY-----")
    code, obj = run_cli(capsys, "keygen", "-o", str(keys))
    assert code == 2 and "already exists" in obj["error"]


def test_prove_check_inspect(tmp_path: Path, keys: Path, capsys: pytest.CaptureFixture[str]) -> None:
    cert = tmp_path / "m521.cpc"
    code, obj = run_cli(capsys, "prove", "2^521-1", "-o", str(cert), "--key", str(keys), "--depth", "5")
    assert code == 0
    for field in ("seconds", "squarings", "depth", "gerbicz_checks", "errors_recovered",
                  "certificate", "certificate_bytes"):
        assert field in obj
    assert obj["certificate_bytes"] == cert.stat().st_size and obj["depth"] == 5

    code, obj = run_cli(capsys, "check", str(cert), "--trusted-key", str(keys) + ".pub")
    assert code == 0
    assert obj["verified"] is True and obj["number"] == "2^521-1"
    assert obj["result"] == "probable-prime" and obj["depth"] == 5
    assert obj["residue64"] == f"{pow(3, 2**521 - 2, 2**521 - 1) & (2**64 - 1):016x}"  # built-in pow
    assert obj["squarings"] > 0 and obj["claimed_squarings"] == 521 and obj["signer"].startswith("ed25519:")
    assert "not a primality proof" in obj["caution"]
    assert isinstance(obj["seconds"], float)

    code, obj = run_cli(capsys, "inspect", str(cert))
    assert code == 0 and obj["verified"] is False and obj["claimed_result"] == "probable-prime"


def test_human_output_shows_caution_and_unsigned(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    cert = tmp_path / "m89.cpc"
    assert main(["prove", "2^89-1", "-o", str(cert), "--depth", "3"]) == 0
    out = capsys.readouterr().out
    assert "UNSIGNED" in out and "not a primality proof" in out
    assert main(["check", str(cert)]) == 1
    assert "unsigned" in capsys.readouterr().out
    assert main(["check", str(cert), "--accept-unsigned"]) == 0
    out = capsys.readouterr().out
    assert "VERIFIED" in out and "UNSIGNED" in out and "not a primality proof" in out


def test_untrusted_signer_rejected(tmp_path: Path, keys: Path, capsys: pytest.CaptureFixture[str]) -> None:
    cert = tmp_path / "m127.cpc"
    assert main(["prove", "2^127-1", "-o", str(cert), "--key", str(keys), "--depth", "4"]) == 0
    other = tmp_path / "other.key"
    assert main(["keygen", "-o", str(other)]) == 0
    capsys.readouterr()
    code, obj = run_cli(capsys, "check", str(cert), "--trusted-key", str(other) + ".pub")
    assert code == 1 and "not a trusted key" in obj["reason"]


@pytest.mark.parametrize(
    "args, code",
    [
        (["prove", "2^128-1"], 2),
        (["prove", "3*2^5-1"], 2),
        (["prove", "2^127-1", "--depth", "9"], 2),
        (["prove", "2^127-1", "--base", "2"], 2),
        (["check", "/nonexistent/file.cpc"], 2),
        (["inspect", "/nonexistent/file.cpc"], 2),
        (["check", "x.cpc", "--trusted-key", "/nonexistent.pub"], 2),
    ],
)
def test_usage_errors_exit_2(args: list[str], code: int, capsys: pytest.CaptureFixture[str]) -> None:
    got, obj = run_cli(capsys, *args)
    assert got == code and obj["error"]


def test_garbage_file_is_rejected_not_crashed(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    junk = tmp_path / "junk.cpc"
    junk.write_bytes(os.urandom(100))
    code, obj = run_cli(capsys, "check", str(junk))
    assert code == 1 and obj["verified"] is False and "magic" in obj["reason"]
    code, obj = run_cli(capsys, "inspect", str(junk))
    assert code == 1


def test_unsafe_key_permissions_refused(tmp_path: Path, keys: Path, capsys: pytest.CaptureFixture[str]) -> None:
    os.chmod(keys, 0o644)
    code, obj = run_cli(capsys, "prove", "2^89-1", "-o", str(tmp_path / "a.cpc"), "--key", str(keys))
    assert code == 2 and "chmod 600" in obj["error"]


def test_passphrase_protected_key(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                  monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("CP_PASS", "correct horse")
    key = tmp_path / "p.key"
    assert main(["keygen", "-o", str(key), "--passphrase-env", "CP_PASS"]) == 0
    assert b"ENCRYPTED" in key.read_bytes()
    capsys.readouterr()
    code, obj = run_cli(capsys, "prove", "2^89-1", "-o", str(tmp_path / "n.cpc"), "--key", str(key))
    assert code == 2 and "passphrase" in obj["error"]
    code, obj = run_cli(capsys, "prove", "2^89-1", "-o", str(tmp_path / "y.cpc"), "--key", str(key),
                        "--passphrase-env", "CP_PASS", "--depth", "3")
    assert code == 0 and obj["signer"].startswith("ed25519:")


def test_python_dash_m_and_quiet_without_tty(tmp_path: Path) -> None:
    proc = subprocess.run(
        [sys.executable, "-m", "verifier", "prove", "2^607-1", "-o", str(tmp_path / "q.cpc")],
        capture_output=True, text=True, check=True,
    )
    assert proc.stderr == ""  # no progress bar when stderr is not a terminal
    assert "probable-prime" in proc.stdout


def test_max_squarings_option(capsys: pytest.CaptureFixture[str]) -> None:
    fixture = Path(__file__).resolve().parent.parent / "fixtures" / "valid" / "m127-signed.cpc"
    code, obj = run_cli(capsys, "check", str(fixture), "--max-squarings", "10")
    assert code == 1 and "policy limit" in obj["reason"]


def test_broken_pipe_is_quiet(tmp_path: Path) -> None:
    fixture = Path(__file__).resolve().parent.parent / "fixtures" / "valid" / "m127-signed.cpc"
    proc = subprocess.run(f"{sys.executable} -m verifier check {fixture} | head -c 1", shell=True,
                          capture_output=True, text=True)
    assert "Traceback" not in proc.stderr

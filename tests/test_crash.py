"""kill -9 of the real `chainproof prove` at random moments, then resume: every finished
certificate is bit-identical to a clean run's, and after every kill the state on disk is sound."""

from __future__ import annotations

import hashlib
import os
import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from verifier import RunConfig, VerificationPolicy, decode_unverified, parse_number, verify
from verifier.engine import Run

NUMBER, DEPTH = "2^21701-1", 6
KILLS = 20


def assert_state_sound(out: Path) -> None:
    """Every checkpoint file decodes (checksum, fields) and the spool holds every record the
    newest one counts as committed, each with a matching SHA-256."""
    cfg = RunConfig(parse_number(NUMBER), depth=DEPTH)
    probe = Run(cfg, out)
    committed = None
    for name in (".state", ".state.prev"):
        path = out.with_name(out.name + name)
        if path.exists():
            obj = probe._decode_state(path.read_bytes())  # raises if damaged
            committed = obj["committed"] if committed is None else committed
    if committed:
        rec = cfg.number.nbytes + 32
        data = out.with_name(out.name + ".spool").read_bytes()
        assert len(data) >= committed * rec
        for j in range(committed):
            r = data[j * rec:(j + 1) * rec]
            assert hashlib.sha256(r[:-32]).digest() == r[-32:], j


@pytest.mark.skipif(sys.platform == "win32", reason="POSIX signals")
def test_kill_9_at_random_moments_then_resume(tmp_path: Path) -> None:
    key = tmp_path / "k.key"
    subprocess.run([sys.executable, "-m", "verifier", "keygen", "-o", str(key)], check=True,
                   capture_output=True)
    cmd = [sys.executable, "-m", "verifier", "prove", NUMBER, "--depth", str(DEPTH), "--key", str(key),
           "--checkpoint-every", "0", "--json"]
    subprocess.run([*cmd, "-o", str(tmp_path / "clean.cpc")], check=True, capture_output=True)
    clean = (tmp_path / "clean.cpc").read_bytes()
    rng = random.Random(2026)
    kills = finished = attempt = 0
    out = tmp_path / "run0.cpc"
    while kills < KILLS:
        attempt += 1
        assert attempt < 200, "the command never got killed"
        proc = subprocess.Popen([*cmd, "-o", str(out)], stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        time.sleep(rng.uniform(0.25, 1.2))
        if proc.poll() is None:
            os.kill(proc.pid, signal.SIGKILL)
            kills += 1
        proc.wait()
        assert_state_sound(out)
        if out.exists() and not out.with_name(out.name + ".state").exists():
            assert out.read_bytes() == clean  # finished: bit-identical to the clean run
            finished += 1
            out = tmp_path / f"run{finished}.cpc"
    subprocess.run([*cmd, "-o", str(out)], check=True, capture_output=True)
    assert out.read_bytes() == clean
    assert verify(decode_unverified(clean), VerificationPolicy()).result == "probable-prime"
    assert kills >= KILLS and finished >= 1

"""Embedding: the spool folder written by a foreign program, `chainproof assemble`, and the
Recorder fed by a host loop (bad input of every kind gets a clear error, never a certificate)."""

from __future__ import annotations

import hashlib
import json
import os
import subprocess
import sys
from pathlib import Path

import pytest
from conftest import det_key

from verifier import Rejected, StorageError, VerificationPolicy, decode_unverified, parse_number, verify
from verifier.cli import main
from verifier.recorder import Recorder, SpoolError

ROOT = Path(__file__).resolve().parent.parent
ACCEPT_UNSIGNED = VerificationPolicy(unsafe_accept_unsigned=True)


def write_spool_by_hand(folder: Path, p: int, depth: int, base: int = 3, byte_order: str = "big",
                        values: dict[int, int] | None = None) -> dict[int, Path]:
    """A spool written the way a program in another language would: built-in pow, json and
    hashlib only; nothing from chainproof is used here."""
    N = (1 << p) - 1
    n = (p + 7) // 8
    folder.mkdir(parents=True, exist_ok=True)
    manifest = {"format": "chainproof-spool", "version": 1, "number": f"2^{p}-1", "test": "fermat-prp", "base": base,
                "squarings": p, "depth": depth, "byte_order": byte_order, "residue_bytes": n}
    (folder / "manifest.json").write_text(json.dumps(manifest))
    h, s = p % (1 << depth), p >> depth
    files = {}
    for j in range(1, (1 << depth) + 1):
        step = h + j * s
        x = pow(base, 1 << step, N)  # base^(2^step) mod N, by Python's built-in pow
        if values and step in values:
            x = values[step]
        data = x.to_bytes(n, byte_order)
        files[step] = folder / f"step-{step}.res"
        files[step].write_bytes(data + hashlib.sha256(data).digest())
    return files


def run_assemble(capsys: pytest.CaptureFixture[str], spool: Path, out: Path, *extra: str) -> tuple[int, dict]:  # type: ignore[type-arg]
    code = main(["assemble", str(spool), "-o", str(out), "--json", *extra])
    return code, json.loads(capsys.readouterr().out.strip().splitlines()[-1])


def test_foreign_spool_assembles_and_verifies(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    write_spool_by_hand(tmp_path / "sp", 1279, 5)
    key = tmp_path / "k.key"
    assert main(["keygen", "-o", str(key)]) == 0
    capsys.readouterr()
    code, obj = run_assemble(capsys, tmp_path / "sp", tmp_path / "c.cpc", "--key", str(key))
    assert code == 0 and obj["result"] == "probable-prime" and obj["depth"] == 5
    result = verify(decode_unverified((tmp_path / "c.cpc").read_bytes()), VerificationPolicy())
    assert result.result == "probable-prime"  # 2^1279-1 is prime (OEIS A000043, from memory)


def test_assemble_errors_name_the_file(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    p, depth, n = 521, 4, 66
    N = (1 << p) - 1
    cases = {}

    def fresh(name: str, **kw) -> tuple[Path, dict[int, Path]]:  # type: ignore[no-untyped-def]
        folder = tmp_path / name
        return folder, write_spool_by_hand(folder, p, depth, **kw)

    folder, files = fresh("missing")
    victim = sorted(files)[3]
    files[victim].unlink()
    cases["missing"] = (folder, f"step-{victim}.res: missing")
    folder, files = fresh("short")
    f = files[sorted(files)[2]]
    f.write_bytes(f.read_bytes()[:-1])
    cases["short"] = (folder, f"{f.name}: {n + 31} bytes")
    folder, files = fresh("corrupt")
    f = files[sorted(files)[5]]
    raw = bytearray(f.read_bytes())
    raw[7] ^= 1
    f.write_bytes(bytes(raw))
    cases["corrupt"] = (folder, f"{f.name}: checksum mismatch")
    step = sorted(files)[1]
    folder, _ = fresh("range", values={step: N + 3})
    cases["range"] = (folder, f"step-{step}.res: residue is outside")
    folder, _ = fresh("zero", values={step: 0})
    cases["zero"] = (folder, f"step-{step}.res: residue is outside")
    folder, files = fresh("extra")
    (folder / "step-5.res").write_bytes(b"x")
    cases["extra"] = (folder, "step-5.res: step 5 is not one the proof needs")
    folder, files = fresh("duplicate")
    first = sorted(files)[0]
    (folder / f"step-0{first}.res").write_bytes(files[first].read_bytes())
    cases["duplicate"] = (folder, f"step-0{first}.res: unexpected file")
    folder, _ = fresh("wrong-value", values={step: 5})
    cases["wrong-value"] = (folder, "do not form the squaring chain")
    folder, _ = fresh("stray")
    (folder / "notes.txt").write_text("hi")
    cases["stray"] = (folder, "notes.txt: unexpected file")
    for label, (folder, reason) in cases.items():
        out = tmp_path / f"{label}.cpc"
        code, obj = run_assemble(capsys, folder, out)
        assert code == 1 and reason in obj["reason"], (label, obj)
        assert not out.exists() and not out.with_name(out.name + ".tmp").exists()


def test_lying_manifests(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    for label, change, reason in [
        ("T", {"squarings": 520}, "squarings 520, but fermat-prp of 2^521-1 needs 521"),
        ("depth", {"depth": 11}, "depth 11 impossible"),
        ("bytes", {"residue_bytes": 65}, "residue_bytes 65"),
        ("order", {"byte_order": "middle"}, "byte_order"),
        ("number", {"number": "2^522-1"}, "not prime"),
        ("base", {"base": 2}, "base 2"),
        ("format", {"format": "other"}, "not a chainproof-spool"),
        ("version", {"version": 9}, "unknown version"),
        ("field", {"comment": "x"}, "fields must be exactly"),
    ]:
        folder = tmp_path / label
        write_spool_by_hand(folder, 521, 4)
        manifest = json.loads((folder / "manifest.json").read_text())
        (folder / "manifest.json").write_text(json.dumps({**manifest, **change}))
        code, obj = run_assemble(capsys, folder, tmp_path / f"{label}.cpc")
        assert code == 1 and reason in obj["reason"], (label, obj)
    # a manifest that lies about depth while the files fit another depth: named stray step files
    folder = tmp_path / "depth-lie"
    write_spool_by_hand(folder, 521, 4)
    manifest = json.loads((folder / "manifest.json").read_text())
    (folder / "manifest.json").write_text(json.dumps({**manifest, "depth": 3}))
    code, obj = run_assemble(capsys, folder, tmp_path / "dl.cpc")
    assert code == 1 and "not one the proof needs" in obj["reason"]


def test_spool_of_another_number_is_refused(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """Residue files of 2^607-1's spool put under a manifest for 2^601-1 (both 76 bytes)."""
    src, dst = tmp_path / "a", tmp_path / "b"
    write_spool_by_hand(src, 607, 3)
    write_spool_by_hand(dst, 601, 3)
    a_files = sorted(src.glob("step-*.res"), key=lambda f: int(f.stem[5:]))
    b_files = sorted(dst.glob("step-*.res"), key=lambda f: int(f.stem[5:]))
    for a, b in zip(a_files, b_files, strict=True):
        b.write_bytes(a.read_bytes())
    code, obj = run_assemble(capsys, dst, tmp_path / "x.cpc")
    assert code == 1 and ("do not form" in obj["reason"] or "outside" in obj["reason"])


# -- the Recorder -------------------------------------------------------------------------------
def host_loop(rec: Recorder, N: int, stop_after: int | None = None) -> None:
    step, x = rec.resume_point()
    x = int(x)
    while rec.next_step is not None:
        target = rec.next_step
        if stop_after is not None and target > stop_after:
            return
        for _ in range(target - step):
            x = x * x % N
        step = target
        rec.feed(step, x)


def test_recorder_end_to_end_with_restart(tmp_path: Path) -> None:
    num = parse_number("2^2203-1")
    N = int(num.N)
    rec = Recorder.create(tmp_path / "sp", num, depth=6, check_every=8)
    host_loop(rec, N, stop_after=1200)  # the host "crashes" here
    fed = rec.fed
    assert 0 < fed < 64
    rec2 = Recorder.open(tmp_path / "sp", check_every=8)  # a new process reopens the spool
    assert rec2.fed == fed and rec2.next_step == rec.next_step
    host_loop(rec2, N)
    rec2.finish(tmp_path / "c.cpc", key=det_key())
    result = verify(decode_unverified((tmp_path / "c.cpc").read_bytes()), VerificationPolicy())
    assert result.result == "probable-prime"  # 2^2203-1 (OEIS A000043, from memory)
    assert result.residue64 == f"{pow(3, N - 1, N) & (2**64 - 1):016x}"  # built-in pow


def test_recorder_refuses_bad_feeds(tmp_path: Path) -> None:
    num = parse_number("2^521-1")
    N = int(num.N)
    rec = Recorder.create(tmp_path / "sp", num, depth=4)
    want = rec.next_step
    assert want is not None
    h, s = 521 % 16, 521 >> 4
    assert rec.wanted_steps == [h + j * s for j in range(1, 17)] and want == h + s
    good = pow(3, 1 << want, N)
    for step, value, reason in [
        (want + 1, good, "not asked for"),
        (want - 1, good, "not asked for"),
        (want, -good, "negative"),
        (want, good + N, "not reduced"),
        (want, 0, "outside \\[1, N-1\\]"),
        (want, good.to_bytes(66, "little")[:-1], "65 bytes"),
        (want, True, "must be int"),
        (want, 3.0, "must be int"),
    ]:
        with pytest.raises(SpoolError, match=reason):
            rec.feed(step, value)  # type: ignore[arg-type]
    rec.feed(want, good.to_bytes(66, "little"))
    assert rec.fed == 1
    with pytest.raises(SpoolError, match="incomplete"):
        rec.finish(tmp_path / "c.cpc")
    with pytest.raises(SpoolError, match="another run"):
        Recorder.create(tmp_path / "sp", num, depth=5)


def test_recorder_check_catches_a_lying_host(tmp_path: Path) -> None:
    num = parse_number("2^1279-1")
    N = int(num.N)
    rec = Recorder.create(tmp_path / "sp", num, depth=5, check_every=4)
    step, x = rec.resume_point()
    x = int(x)
    fed_bad = False
    with pytest.raises(SpoolError, match="not consistent"):
        while rec.next_step is not None:
            target = rec.next_step
            for _ in range(target - step):
                x = x * x % N
            step = target
            if rec.fed == 5 and not fed_bad:
                x ^= 1 << 9  # the host's hardware flips a bit
                fed_bad = True
            rec.feed(step, x)
    assert rec.fed == 4  # rolled back to the last checked capture
    assert rec.resume_point()[0] == rec.plan.step(4)
    host_loop(rec, N)  # the host resumes from there
    rec.finish(tmp_path / "c.cpc")
    assert verify(decode_unverified((tmp_path / "c.cpc").read_bytes()), ACCEPT_UNSIGNED).result == "probable-prime"


def test_recorder_without_check_still_never_certifies_wrong_data(tmp_path: Path) -> None:
    num = parse_number("2^607-1")
    N = int(num.N)
    rec = Recorder.create(tmp_path / "sp", num, depth=3)
    step, x = rec.resume_point()
    x = int(x)
    while rec.next_step is not None:
        target = rec.next_step
        for _ in range(target - step):
            x = x * x % N
        step = target
        rec.feed(step, x if rec.fed != 2 else (x * 5) % N)
    with pytest.raises(SpoolError, match="do not form"):
        rec.finish(tmp_path / "c.cpc")
    assert not (tmp_path / "c.cpc").exists()


def test_recorder_disk_full(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    import verifier.recorder as recorder

    num = parse_number("2^521-1")
    rec = Recorder.create(tmp_path / "sp", num, depth=4)
    host_loop(rec, int(num.N), stop_after=200)
    before = sorted(os.listdir(tmp_path / "sp"))

    def full(path: Path, data: bytes) -> None:
        raise OSError(28, "No space left on device", str(path))

    monkeypatch.setattr(recorder, "atomic_write", full)
    with pytest.raises(StorageError, match="No space left"):
        host_loop(rec, int(num.N))
    assert sorted(os.listdir(tmp_path / "sp")) == before  # nothing half-written
    monkeypatch.undo()
    rec = Recorder.open(tmp_path / "sp")
    host_loop(rec, int(num.N))
    rec.finish(tmp_path / "c.cpc")


def test_example_foreign_loop_runs(tmp_path: Path) -> None:
    """examples/foreign_loop.py: crash half way, rerun, certificate verifies."""
    script = ROOT / "examples" / "foreign_loop.py"
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    args = [sys.executable, str(script), "2203", "--out", "f.cpc", "--spool", "sp"]
    first = subprocess.run([*args, "--stop-after", "900"], cwd=tmp_path, env=env, capture_output=True, text=True)
    assert first.returncode == 3 and "simulated crash" in first.stdout
    second = subprocess.run(args, cwd=tmp_path, env=env, capture_output=True, text=True)
    assert second.returncode == 0, second.stderr
    result = verify(decode_unverified((tmp_path / "f.cpc").read_bytes()), ACCEPT_UNSIGNED)
    assert result.number == "2^2203-1" and result.result == "probable-prime"
    with pytest.raises(Rejected):
        verify(decode_unverified((tmp_path / "f.cpc").read_bytes()), VerificationPolicy())


def test_lucas_lehmer_spool_by_hand(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """A Lucas-Lehmer spool written without chainproof: elements a + b sqrt 3 of Z_N[sqrt 3],
    squared by the ring's definition (a, b)^2 = (a^2 + 3b^2, 2ab), stored as a then b."""
    p, depth = 607, 4
    N, n = (1 << p) - 1, (p + 7) // 8
    T = p - 2
    folder = tmp_path / "ll"
    folder.mkdir()
    manifest = {"format": "chainproof-spool", "version": 1, "number": f"2^{p}-1", "test": "lucas-lehmer",
                "base": 4, "squarings": T, "depth": depth, "byte_order": "little", "residue_bytes": 2 * n}
    (folder / "manifest.json").write_text(json.dumps(manifest))
    h, s = T % (1 << depth), T >> depth
    a, b, k = 2, 1, 0  # 2 + sqrt 3: s_0 = 2a = 4
    for j in range(1, (1 << depth) + 1):
        while k < h + j * s:
            a, b, k = (a * a + 3 * b * b) % N, (2 * a * b) % N, k + 1
        data = a.to_bytes(n, "little") + b.to_bytes(n, "little")
        (folder / f"step-{k}.res").write_bytes(data + hashlib.sha256(data).digest())
    assert (2 * a) % N == 0  # s_(p-2) = 0: 2^607-1 is prime (OEIS A000043, from memory)
    code, obj = run_assemble(capsys, folder, tmp_path / "ll.cpc")
    assert code == 0 and obj["result"] == "prime"
    result = verify(decode_unverified((tmp_path / "ll.cpc").read_bytes()), ACCEPT_UNSIGNED)
    assert result.test == "lucas-lehmer" and result.proved


def test_recorder_for_proth_and_torus(tmp_path: Path) -> None:
    num = parse_number("3*2^189+1")  # a prime (OEIS A002253, from memory; sympy agrees below)
    import sympy

    assert sympy.isprime(3 * 2**189 + 1)
    N = int(num.N)
    rec = Recorder.create(tmp_path / "proth", num, base=5, depth=3, test="proth", check_every=2)
    step, x = rec.resume_point()
    x = int(x)
    while rec.next_step is not None:
        target = rec.next_step
        x = pow(x, 1 << (target - step), N)  # the host's arithmetic: built-in pow
        step = target
        rec.feed(step, x)
    data = rec.finish(tmp_path / "proth.cpc")
    assert verify(decode_unverified(data), ACCEPT_UNSIGNED).result == "prime"

    mers = parse_number("2^521-1")
    M = int(mers.N)
    rec = Recorder.create(tmp_path / "ll", mers, depth=3, test="lucas-lehmer")
    step, (a, b) = rec.resume_point()
    a, b = int(a), int(b)
    with pytest.raises(SpoolError, match="coordinate"):
        rec.feed(rec.next_step, 5)  # type: ignore[arg-type]
    while rec.next_step is not None:
        target = rec.next_step
        for _ in range(target - step):
            a, b = (a * a + 3 * b * b) % M, (2 * a * b) % M
        step = target
        rec.feed(step, (a, b))
    assert verify(decode_unverified(rec.finish(tmp_path / "ll.cpc")), ACCEPT_UNSIGNED).result == "prime"
    with pytest.raises(SpoolError, match="norm"):
        Recorder.create(tmp_path / "ll2", mers, depth=3, test="lucas-lehmer").feed(
            rec.plan.step(1), (5, 7))

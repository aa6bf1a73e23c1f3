"""Coordinator operations: batch audit (local processes and Dask), the ledger (SQLite and a real
PostgreSQL server when CHAINPROOF_TEST_POSTGRES names one), comparing runs, delegated checks."""

from __future__ import annotations

import dataclasses
import json
import os
import shutil
import sqlite3
from pathlib import Path

import pytest
from conftest import det_key, make_certificate

import verifier.audit as audit
from verifier import Run, RunConfig, StorageError, VerificationPolicy, decode_unverified, encode, parse_number
from verifier.audit import AuditSettings, run_audit
from verifier.cli import main
from verifier.delegate import SecretStore, offload, settle, work
from verifier.ledger import Ledger, Outcome, compare_checkpoints

ROOT = Path(__file__).resolve().parent.parent
FIXTURES = ROOT / "fixtures"
ACCEPT_UNSIGNED = VerificationPolicy(unsafe_accept_unsigned=True)
POSTGRES = os.environ.get("CHAINPROOF_TEST_POSTGRES")


@pytest.fixture
def batch(tmp_path: Path) -> Path:
    """Valid fixtures, an invalid one in a sub-folder, a duplicate file and a corrupt file."""
    folder = tmp_path / "batch"
    (folder / "sub").mkdir(parents=True)
    for f in (FIXTURES / "valid").glob("*.cpc"):
        shutil.copy(f, folder / f.name)
    shutil.copy(FIXTURES / "invalid" / "m127-negated-final.cpc", folder / "sub" / "forged.cpc")
    shutil.copy(FIXTURES / "valid" / "m127-signed.cpc", folder / "sub" / "copy.cpc")
    (folder / "sub" / "garbage.cpc").write_bytes(b"\x00" * 40)
    (folder / "notes.txt").write_text("not a certificate; not picked up")
    return folder


def cli(capsys: pytest.CaptureFixture[str], *args: str) -> tuple[int, list[dict]]:  # type: ignore[type-arg]
    code = main([*args, "--json"])
    lines = [json.loads(line) for line in capsys.readouterr().out.strip().splitlines() if line]
    return code, lines


def test_audit_batch_with_ledger_and_report(batch: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    db, report = tmp_path / "ledger.db", tmp_path / "report.jsonl"
    code, lines = cli(capsys, "audit", str(batch), "--jobs", "2", "--ledger", str(db), "--report", str(report),
                      "--accept-unsigned")
    per_cert = [x for x in lines if x["event"] == "certificate"]
    summary = lines[-1]
    n_valid = len(list((FIXTURES / "valid").glob("*.cpc")))
    assert code == 1  # some rejected
    assert summary["certificates"] == n_valid + 3 == len(per_cert)
    assert summary["verified"] == n_valid + 1 and summary["rejected"] == 2  # the copy verifies too
    assert len(report.read_text().splitlines()) == n_valid + 3
    rows = Ledger(str(db)).rows()
    assert len(rows) == n_valid + 2  # the duplicate is one certificate (same SHA-256)
    verified = {r["certificate_sha256"] for r in rows if r["outcome"] == "verified"}
    assert len(verified) == n_valid
    # re-auditing is idempotent: same rows, same first-seen times
    first_seen = {r["certificate_sha256"]: r["first_seen"] for r in rows}
    cli(capsys, "audit", str(batch), "--jobs", "2", "--ledger", str(db), "--accept-unsigned")
    again = Ledger(str(db)).rows()
    assert len(again) == len(rows) and {r["certificate_sha256"]: r["first_seen"] for r in again} == first_seen
    code, shown = cli(capsys, "ledger", "show", "--ledger", str(db))
    assert code == 0 and len(shown[0]["certificates"]) == len(rows) and shown[0]["conflicts"] == []


def test_audit_all_verified_exit_0_and_usage_errors(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    shutil.copy(FIXTURES / "valid" / "m127-signed.cpc", tmp_path / "a.cpc")
    code, _ = cli(capsys, "audit", str(tmp_path / "a.cpc"), "--jobs", "1")
    assert code == 0
    code, out = cli(capsys, "audit", str(tmp_path / "missing"))
    assert code == 2
    empty = tmp_path / "empty"
    empty.mkdir()
    code, out = cli(capsys, "audit", str(empty))
    assert code == 2 and "no certificates" in out[-1]["error"]


def test_crashing_and_slow_certificates_do_not_stop_the_batch(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    folder = tmp_path / "b"
    folder.mkdir()
    for name in ("m127-signed.cpc", "m89-base5.cpc", "m11-composite.cpc"):
        shutil.copy(FIXTURES / "valid" / name, folder / name)
    # a certificate whose check takes ~10^4 squarings of 21,701 bits: depth 1
    Run(RunConfig(parse_number("2^21701-1"), depth=1), folder / "slow.cpc", key=det_key()).run()
    monkeypatch.setattr(audit, "audit_one", _crashing_audit_one)  # inherited by forked workers
    outcomes = run_audit([folder], AuditSettings(VerificationPolicy(), timeout=0.05), jobs=2)
    by_name = {Path(o.path).name: o for o in outcomes}
    assert by_name["m89-base5.cpc"].outcome == "crashed"
    assert by_name["slow.cpc"].outcome == "timeout"
    assert by_name["m127-signed.cpc"].outcome == "verified" and by_name["m11-composite.cpc"].outcome == "verified"


_REAL_AUDIT_ONE = audit.audit_one


def _crashing_audit_one(path: str, settings: AuditSettings) -> Outcome:
    """audit_one, except that the worker process dies on one file (as on a segfault)."""
    if path.endswith("m89-base5.cpc"):
        os._exit(3)
    return _REAL_AUDIT_ONE(path, settings)


def test_interrupt_leaves_the_ledger_consistent(batch: Path, tmp_path: Path) -> None:
    ledger = Ledger(str(tmp_path / "l.db"))
    seen: list[str] = []

    def record(o: Outcome, done: int, total: int) -> None:
        ledger.record(o)
        seen.append(o.certificate_sha256)
        if done == 3:
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        run_audit([batch], AuditSettings(ACCEPT_UNSIGNED), jobs=2, on_outcome=record)
    rows = ledger.rows()
    assert [r["certificate_sha256"] for r in rows] == list(dict.fromkeys(seen))
    assert all(r["outcome"] in ("verified", "rejected") for r in rows)


def test_locked_or_unreachable_ledger(batch: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    db = tmp_path / "locked.db"
    Ledger(str(db))  # create the table
    holder = sqlite3.connect(db, timeout=0.1)
    holder.execute("BEGIN EXCLUSIVE")  # another process holds the write lock
    try:
        code, lines = cli(capsys, "audit", str(batch), "--ledger", str(db), "--jobs", "2", "--accept-unsigned")
    finally:
        holder.rollback()
        holder.close()
    assert code == 2  # the audit finished, but recording failed
    assert lines[-1]["certificates"] >= 10
    assert Ledger(str(db)).rows() == []  # nothing recorded, in particular nothing as verified
    code, lines = cli(capsys, "audit", str(batch), "--ledger", "postgresql+psycopg://nobody@127.0.0.1:9/none",
                      "--jobs", "2", "--accept-unsigned")
    assert code == 2 and lines[-1]["certificates"] >= 10


def _ledger_roundtrip(url: str) -> None:
    ledger = Ledger(url, version="test")
    base = dict(number="2^127-1", test="fermat-prp", base=3, result="probable-prime", residue64="0" * 16,
                signer=None, depth=4, checkpoints=b"\x01" * 512)
    a = Outcome("a" * 64, "a.cpc", "verified", final_sha256="f1" * 32, **base)  # type: ignore[arg-type]
    b = Outcome("b" * 64, "b.cpc", "verified", final_sha256="f2" * 32, **base)  # type: ignore[arg-type]
    c = Outcome("c" * 64, "c.cpc", "rejected", "proof does not verify")
    for o in (a, b, c, a):
        ledger.record(o)
    rows = ledger.rows()
    assert len(rows) == 3 and rows[0]["verified_at"] is not None and rows[2]["verified_at"] is None
    conflicts = ledger.conflicts()
    assert [(x["path"], y["path"]) for x, y in conflicts] == [("a.cpc", "b.cpc")]
    ledger.record(dataclasses.replace(b, outcome="rejected", reason="re-checked", final_sha256=None))
    assert ledger.conflicts() == []  # only verified rows can conflict
    ledger.close()


def test_ledger_sqlite(tmp_path: Path) -> None:
    _ledger_roundtrip(str(tmp_path / "x.db"))


@pytest.mark.skipif(not POSTGRES, reason="set CHAINPROOF_TEST_POSTGRES to a PostgreSQL URL (.ci/run does)")
def test_ledger_postgresql(batch: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """Against a real PostgreSQL server (.ci/run starts one)."""
    from sqlalchemy import create_engine, text

    assert POSTGRES is not None
    with create_engine(POSTGRES).begin() as conn:
        conn.execute(text("DROP TABLE IF EXISTS chainproof_verifications"))
    _ledger_roundtrip(POSTGRES)
    with create_engine(POSTGRES).begin() as conn:
        conn.execute(text("DROP TABLE chainproof_verifications"))
    code, lines = cli(capsys, "audit", str(batch), "--ledger", POSTGRES, "--jobs", "2", "--accept-unsigned")
    assert code == 1 and len(Ledger(POSTGRES).rows()) == lines[-1]["certificates"] - 1


def test_compare_names_the_first_differing_checkpoint(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    data, cert = make_certificate(tmp_path, "2^1279-1", depth=5)
    (tmp_path / "a.cpc").write_bytes(data)
    code, out = cli(capsys, "compare", str(tmp_path / "a.cpc"), str(tmp_path / "c.cpc"))
    assert code == 0 and out[0]["first_difference"] is None
    # a run that went wrong between checkpoints 11 and 12: hashes 12.. differ
    cps = list(cert.checkpoints)
    for j in range(11, len(cps)):
        cps[j] = bytes(32)
    (tmp_path / "b.cpc").write_bytes(encode(dataclasses.replace(cert, checkpoints=tuple(cps))))
    code, out = cli(capsys, "compare", str(tmp_path / "a.cpc"), str(tmp_path / "b.cpc"))
    h, s = 1279 % 32, 1279 >> 5
    assert code == 1 and out[0]["agree_up_to"] == 11 and out[0]["first_difference"] == 12
    assert out[0]["step_differs"] == h + 12 * s and out[0]["segment_squarings"] == s
    d = compare_checkpoints(cert.checkpoints, cps, 1279, 5)
    assert (d.agree_up_to, d.step_agreed) == (11, h + 11 * s)


def test_delegated_verification(tmp_path: Path) -> None:
    store = SecretStore(tmp_path / "secrets")
    data, cert = make_certificate(tmp_path, "2^2203-1", depth=3, key=det_key())
    off = offload(cert, "d" * 64, "c.cpc", VerificationPolicy())
    task = json.dumps(off.task)
    # blinded: neither the claim's residues nor the reduced claim appear in the task
    for value in (cert.final, *cert.mu):
        assert value.hex() not in task
    store.put(off.secret)
    assert oct((tmp_path / "secrets" / f"{off.task['task_id']}.json").stat().st_mode & 0o777) == "0o600"
    answer, stats = work(task)
    assert stats.squarings >= 2203 >> 3 and stats.checks >= 1  # the helper's run is Gerbicz-checked
    assert settle(json.dumps(answer), store).outcome == "verified"
    with pytest.raises(Exception, match="no task"):
        settle(json.dumps(answer), store)  # an answer settles its task once
    # a forged answer, and an honest answer copied onto another task of the same certificate
    off2, off3 = (offload(cert, "d" * 64, "c.cpc", VerificationPolicy()) for _ in range(2))
    store.put(off2.secret)
    store.put(off3.secret)
    forged = {**answer, "task_id": off2.task["task_id"], "digest": "0" * 64}
    assert settle(json.dumps(forged), store).outcome == "rejected"
    real3, _ = work(json.dumps(off3.task))
    copied = {**real3, "task_id": off2.task["task_id"]}
    store.put(offload(cert, "d" * 64, "c.cpc", VerificationPolicy()).secret)
    with pytest.raises(Exception, match="no task"):
        settle(json.dumps(copied), store)  # off2 was consumed by the forged answer
    assert settle(json.dumps(real3), store).outcome == "verified"
    # a wrong certificate (forged -y) passes the cheap checks but not the delegated segment
    bad = decode_unverified((FIXTURES / "invalid" / "m127-negated-final.cpc").read_bytes())
    off4 = offload(bad, "e" * 64, "bad.cpc", VerificationPolicy())
    store.put(off4.secret)
    assert settle(json.dumps(work(json.dumps(off4.task))[0]), store).outcome == "rejected"


def test_delegation_command_line(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    cert = tmp_path / "m.cpc"
    shutil.copy(FIXTURES / "valid" / "m127-lucas-lehmer.cpc", cert)
    secrets = str(tmp_path / "s")
    code, out = cli(capsys, "offload", str(cert), "-o", str(tmp_path / "t.json"), "--secrets", secrets)
    assert code == 0 and out[0]["offloaded"]
    code, out = cli(capsys, "work", str(tmp_path / "t.json"), "-o", str(tmp_path / "a.json"))
    assert code == 0
    ledger = str(tmp_path / "l.db")
    code, out = cli(capsys, "settle", str(tmp_path / "a.json"), "--secrets", secrets, "--ledger", ledger)
    assert code == 0 and out[0]["verified"] and out[0]["result"] == "prime"
    assert Ledger(str(tmp_path / "l.db")).rows()[0]["outcome"] == "verified"
    code, out = cli(capsys, "settle", str(tmp_path / "a.json"), "--secrets", secrets)
    assert code == 2 and "no task" in out[0]["error"]


def test_dask_local_cluster(batch: Path) -> None:
    """The same audit through Dask's executor interface on a LocalCluster of two workers."""
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as cluster:
        outcomes = run_audit([batch], AuditSettings(ACCEPT_UNSIGNED), dask_address=cluster.scheduler_address)
    local = run_audit([batch], AuditSettings(ACCEPT_UNSIGNED), jobs=2)
    key = lambda o: (o.path, o.outcome, o.result, o.residue64)  # noqa: E731
    assert sorted(map(key, outcomes)) == sorted(map(key, local))
    assert sum(o.outcome == "verified" for o in outcomes) >= 10


def test_unreadable_ledger_url_is_a_storage_error(tmp_path: Path) -> None:
    with pytest.raises(StorageError):
        Ledger("postgresql+psycopg://nobody@127.0.0.1:9/none", timeout=1)

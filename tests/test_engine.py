"""The run engine: Gerbicz recovery, crash-safe state, resume, damaged state."""

from __future__ import annotations

import random
from pathlib import Path

import pytest
from conftest import det_key
from gmpy2 import mpz

from verifier import Run, RunConfig, RunFailed, UsageError
from verifier.gerbicz import GerbiczChain
from verifier.numbers import Mersenne, parse_number


class Crash(Exception):
    """Stands in for a power cut: raised from inside the run."""


def config(p: int = 1279, depth: int = 5) -> RunConfig:
    return RunConfig(parse_number(f"2^{p}-1"), depth=depth, block=16, blocks_per_check=4)


def clean_run(tmp: Path, cfg: RunConfig, name: str = "clean.cpc") -> bytes:
    Run(cfg, tmp / name, key=det_key()).run()
    return (tmp / name).read_bytes()


def flipper(steps: set[int], bit: int = 5):  # type: ignore[no-untyped-def]
    """A transient fault: flip one bit of the residue the first time each step is reached."""
    pending = set(steps)

    def fault(step: int, x: mpz) -> mpz:
        if step in pending:
            pending.discard(step)
            return x ^ (1 << bit)
        return x

    return fault


@pytest.mark.parametrize("n,L,B", [(1, 1, 1), (7, 2, 3), (100, 10, 3), (1000, 16, 4), (1279, 33, 33)])
def test_chain_matches_builtin_pow(n: int, L: int, B: int) -> None:
    num = Mersenne(127)
    got = GerbiczChain(num, mpz(3), n, L, B).run()
    assert got == pow(3, 1 << n, int(num.N))  # reference: Python's built-in pow


def test_faults_are_detected_and_rolled_back(tmp_path: Path) -> None:
    cfg = config()
    clean = clean_run(tmp_path, cfg)
    L, B = cfg.block, cfg.blocks_per_check
    # inside a block, at a block end, right before a check (and so before a checkpoint), at a
    # check, on a capture step (39 * k), and in the tail after the last full block
    steps = [5, L, L * B - 1, L * B, 3 * L * B + 7, 39 * 3, cfg.squarings - 3]
    for i, step in enumerate(steps):
        out = tmp_path / f"faulty{i}.cpc"
        report = Run(cfg, out, key=det_key(), fault=flipper({step}), fault_steps=[step],
                     checkpoint_seconds=0).run()
        assert report.errors_recovered == 1, step  # detected
        assert out.read_bytes() == clean, step  # and the certificate is the clean one, bit for bit
        assert report.squarings > cfg.squarings  # the recovery's cost is counted


def test_several_faults_in_one_run(tmp_path: Path) -> None:
    cfg = config()
    clean = clean_run(tmp_path, cfg)
    L, B = cfg.block, cfg.blocks_per_check
    steps = {k * L * B + 11 for k in range(cfg.squarings // (L * B))}  # one per check window
    out = tmp_path / "many.cpc"
    report = Run(cfg, out, key=det_key(), fault=flipper(steps), fault_steps=steps).run()
    assert report.errors_recovered == len(steps) >= 15
    assert out.read_bytes() == clean


def test_persistent_faults_stop_the_run(tmp_path: Path) -> None:
    cfg = config()

    def broken(step: int, x: mpz) -> mpz:
        return x ^ 1  # a machine that is wrong at every stop

    with pytest.raises(RunFailed, match="in a row"):
        Run(cfg, tmp_path / "x.cpc", fault=broken, max_failures=5).run()


def crash_at(step: int):  # type: ignore[no-untyped-def]
    def fault(s: int, x: mpz) -> mpz:
        if s == step:
            raise Crash(step)
        return x

    return fault


def test_crash_and_resume_is_bit_identical(tmp_path: Path) -> None:
    cfg = config()
    clean = clean_run(tmp_path, cfg)
    rng = random.Random(1)
    out = tmp_path / "r.cpc"
    crash_steps = sorted(rng.sample(range(1, cfg.squarings), 6))
    for step in crash_steps:
        with pytest.raises(Crash):
            Run(cfg, out, key=det_key(), fault=crash_at(step), fault_steps=[step],
                checkpoint_seconds=0).run()
        assert not out.exists()
    report = Run(cfg, out, key=det_key(), checkpoint_seconds=0).run()
    assert report.resumed_at is not None and report.resumed_at > 0
    assert out.read_bytes() == clean
    for leftover in (".spool", ".state", ".state.prev"):
        assert not out.with_name(out.name + leftover).exists()


def test_damaged_newest_checkpoint_falls_back_to_older(tmp_path: Path) -> None:
    cfg = config()
    clean = clean_run(tmp_path, cfg)
    out = tmp_path / "d.cpc"
    with pytest.raises(Crash):
        Run(cfg, out, key=det_key(), fault=crash_at(1000), fault_steps=[1000], checkpoint_seconds=0).run()
    state = out.with_name(out.name + ".state")
    raw = bytearray(state.read_bytes())
    raw[len(raw) // 2] ^= 0x40
    state.write_bytes(bytes(raw))
    warnings: list[str] = []
    report = Run(cfg, out, key=det_key(), warn=warnings.append).run()
    assert any("unusable" in w for w in warnings) and any("older checkpoint" in w for w in warnings)
    assert out.read_bytes() == clean
    assert report.resumed_at is not None


def test_state_of_another_run_is_refused(tmp_path: Path) -> None:
    out = tmp_path / "o.cpc"
    with pytest.raises(Crash):
        Run(config(), out, fault=crash_at(500), fault_steps=[500], checkpoint_seconds=0).run()
    with pytest.raises(UsageError, match="different run"):
        Run(config(depth=4), out).run()


def test_existing_output_is_not_overwritten(tmp_path: Path) -> None:
    out = tmp_path / "e.cpc"
    out.write_bytes(b"precious")
    with pytest.raises(UsageError, match="already exists"):
        Run(config(), out).run()
    assert out.read_bytes() == b"precious"


def test_rollback_discards_uncovered_captures(tmp_path: Path) -> None:
    """After a failed check the spool holds only captures a passed check covers."""
    cfg = config(p=1279, depth=5)  # captures at 31 + 39j; checks every 64 steps
    out = tmp_path / "s.cpc"
    spool = out.with_name(out.name + ".spool")
    seen: list[int] = []

    def fault(step: int, x: mpz) -> mpz:
        if step == 230:
            seen.append(step)
            if len(seen) == 1:
                return x ^ 2  # after the capture at 226; the check at 256 fails
            # second visit, after the rollback to step 192: captures 70..187 remain, 226 is gone
            assert spool.stat().st_size == 4 * (cfg.number.nbytes + 32)
        return x

    report = Run(cfg, out, fault=fault, fault_steps=[230]).run()
    assert report.errors_recovered == 1 and len(seen) == 2


def test_memory_is_independent_of_depth(tmp_path: Path) -> None:
    """Captured residues live on disk: the engine's peak Python memory barely moves with depth."""
    import tracemalloc

    num = parse_number("2^21701-1")
    peaks, sizes = [], []
    for depth in (2, 9):
        tracemalloc.start()
        report = Run(RunConfig(num, depth=depth), tmp_path / f"m{depth}.cpc").run()
        peaks.append(tracemalloc.get_traced_memory()[1])
        tracemalloc.stop()
        sizes.append(report.certificate_bytes)
    residue = num.nbytes
    # 2^9 = 512 residues would be 1.4 MB. Allowed growth: one partial product per proof level, and
    # copies of the (larger) certificate while it is encoded, self-checked and written.
    assert peaks[1] - peaks[0] < 8 * residue + 8 * (sizes[1] - sizes[0]), (peaks, sizes)
    assert peaks[1] - peaks[0] < 512 * residue / 4


def test_damaged_newest_state_does_not_replace_the_good_older_one(tmp_path: Path) -> None:
    cfg = config()  # checks every 64 steps
    out = tmp_path / "g.cpc"
    with pytest.raises(Crash):
        Run(cfg, out, fault=crash_at(700), fault_steps=[700], checkpoint_seconds=0).run()
    state, prev = out.with_name(out.name + ".state"), out.with_name(out.name + ".state.prev")
    state.write_bytes(b"garbage")
    resume_step = Run(cfg, out)._decode_state(prev.read_bytes())["step"]
    # resume from the older generation, save exactly once (next check), then crash
    crash = resume_step + 64 + 1
    with pytest.raises(Crash):
        Run(cfg, out, fault=crash_at(crash), fault_steps=[crash], checkpoint_seconds=0).run()
    assert Run(cfg, out)._decode_state(prev.read_bytes())["step"] == resume_step  # still good
    assert Run(cfg, out)._decode_state(state.read_bytes())["step"] == resume_step + 64


def test_state_with_valid_checksum_but_wrong_fields_is_unusable(tmp_path: Path) -> None:
    import hashlib

    import msgpack

    from verifier.engine import STATE_MAGIC, STATE_VERSION

    cfg = config()
    out = tmp_path / "w.cpc"
    header = STATE_MAGIC + bytes([STATE_VERSION])
    body = msgpack.packb({**cfg.identity(), "step": 5})  # x, d, committed missing
    out.with_name(out.name + ".state").write_bytes(header + body + hashlib.sha256(header + body).digest())
    out.with_name(out.name + ".spool").write_bytes(b"")
    warnings: list[str] = []
    Run(cfg, out, warn=warnings.append).run()  # starts over instead of crashing
    assert any("unusable" in w for w in warnings)


def test_self_check_failure_keeps_the_run_state(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """A fault in proof building (outside the Gerbicz check) is caught before the spool goes."""
    import verifier.certify as certify

    cfg = config()
    out = tmp_path / "p.cpc"
    real_prove = certify.prove
    monkeypatch.setattr(certify, "prove", lambda st, cap: [m ^ 4 for m in real_prove(st, cap)])
    with pytest.raises(RunFailed, match="self-check"):
        Run(cfg, out, key=det_key()).run()
    assert not out.exists() and out.with_name(out.name + ".state").exists()
    monkeypatch.setattr(certify, "prove", real_prove)
    Run(cfg, out, key=det_key()).run()  # rerun rebuilds the proof from the kept spool
    assert out.read_bytes() == clean_run(tmp_path, cfg)

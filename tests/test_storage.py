"""A full disk while the worker writes its spool, checkpoints or certificate: a clear error, the
previous state intact, and a resumed run that gives the same certificate once space returns."""

from __future__ import annotations

import builtins
import errno
import shutil
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest
from conftest import det_key

import verifier.engine as engine
from verifier import Run, RunConfig, StorageError, parse_number


class Disk:
    """A write budget shared by every file the engine opens: past it, writes fail with ENOSPC."""

    def __init__(self, budget: float) -> None:
        self.budget, self.written = budget, 0

    def open(self, file: Any, mode: str = "r", *args: Any, **kwargs: Any) -> Any:
        return _Metered(builtins.open(file, mode, *args, **kwargs), self, str(file))


class _Metered:
    def __init__(self, fh: Any, disk: Disk, name: str) -> None:
        self._fh, self._disk, self._name = fh, disk, name

    def write(self, data: bytes) -> int:
        if self._disk.written + len(data) > self._disk.budget:
            raise OSError(errno.ENOSPC, "No space left on device", self._name)
        self._disk.written += len(data)
        return int(self._fh.write(data))

    def __getattr__(self, name: str) -> Any:
        return getattr(self._fh, name)

    def __enter__(self) -> _Metered:
        return self

    def __exit__(self, *exc: object) -> None:
        self._fh.close()


def config() -> RunConfig:
    return RunConfig(parse_number("2^1279-1"), depth=5, block=16, blocks_per_check=4)


def test_disk_full_at_many_points_then_resume(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    cfg = config()
    Run(cfg, tmp_path / "clean.cpc", key=det_key()).run()
    clean = (tmp_path / "clean.cpc").read_bytes()
    meter = Disk(float("inf"))
    monkeypatch.setattr(engine, "open", meter.open, raising=False)
    Run(cfg, tmp_path / "count.cpc", key=det_key(), checkpoint_seconds=0).run()
    total = meter.written
    failures = 0
    for i, fraction in enumerate((0.02, 0.1, 0.33, 0.5, 0.77, 0.95, 0.995)):
        out = tmp_path / f"full{i}.cpc"
        monkeypatch.setattr(engine, "open", Disk(total * fraction).open, raising=False)
        with pytest.raises(StorageError, match="No space left on device"):
            Run(cfg, out, key=det_key(), checkpoint_seconds=0).run()
        failures += 1
        assert not out.exists()
        assert not any(p.name.endswith(".tmp") for p in tmp_path.iterdir())  # no half-written temp
        state = out.with_name(out.name + ".state")
        if state.exists():  # whatever state is on disk is a good one
            Run(cfg, out)._decode_state(state.read_bytes())
        monkeypatch.setattr(engine, "open", builtins.open, raising=False)  # space returns
        Run(cfg, out, key=det_key(), checkpoint_seconds=0).run()
        assert out.read_bytes() == clean
    assert failures == 7


def _can_mount() -> bool:
    if sys.platform != "linux" or shutil.which("mount") is None:
        return False
    probe = Path("/tmp/chainproof-mount-probe")
    probe.mkdir(exist_ok=True)
    ok = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=64k", "tmpfs", str(probe)],
                        capture_output=True).returncode == 0
    if ok:
        subprocess.run(["umount", str(probe)], check=True)
    return ok


@pytest.mark.skipif(not _can_mount(), reason="needs permission to mount a tmpfs")
def test_real_full_tmpfs_through_the_command(tmp_path: Path) -> None:
    """The real command on a 48 KiB tmpfs (certificate ~59 KB): exit 2 and a clear message; after
    the filesystem grows, the same command finishes with the certificate a clean run gives."""
    key = tmp_path / "k.key"
    subprocess.run([sys.executable, "-m", "verifier", "keygen", "-o", str(key)], check=True,
                   capture_output=True)
    cmd = [sys.executable, "-m", "verifier", "prove", "2^9941-1", "--depth", "8", "--key", str(key),
           "--checkpoint-every", "0"]
    subprocess.run([*cmd, "-o", str(tmp_path / "clean.cpc")], check=True, capture_output=True)
    small = tmp_path / "small"
    small.mkdir()
    subprocess.run(["mount", "-t", "tmpfs", "-o", "size=48k", "tmpfs", str(small)], check=True)
    try:
        proc = subprocess.run([*cmd, "-o", str(small / "m.cpc")], capture_output=True, text=True)
        assert proc.returncode == 2, proc.stderr
        assert "No space left on device" in proc.stderr and "Traceback" not in proc.stderr
        subprocess.run(["mount", "-o", "remount,size=4m", str(small)], check=True)
        proc = subprocess.run([*cmd, "-o", str(small / "m.cpc")], capture_output=True, text=True)
        assert proc.returncode == 0, proc.stderr
        assert (small / "m.cpc").read_bytes() == (tmp_path / "clean.cpc").read_bytes()
    finally:
        subprocess.run(["umount", str(small)], check=False)

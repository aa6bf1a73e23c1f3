"""The worker's run engine: a Gerbicz-checked squaring run (any test in methods.py) with crash-safe
state, residue capture on disk, and certificate output.

Files beside the certificate ``OUT`` while a run is in progress:

* ``OUT.spool``: captured residues u_1..u_(2^depth), fixed-size records (residue || SHA-256).
* ``OUT.state`` and ``OUT.state.prev``: the two newest checkpoints (spec/format.md, "Run state").

Only states covered by a passed Gerbicz check are written. A checkpoint records how many spool
records a passed check covers; records beyond that are void and truncated on resume or rollback.
Memory: the chain holds a few residues; building the proof holds at most ``depth`` more.
"""

from __future__ import annotations

import hashlib
import os
import time
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, BinaryIO

import msgpack
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

from .certify import SelfCheckFailed, build_certificate
from .codec import MAX_DEPTH
from .errors import RunFailed, StorageError, UsageError
from .gerbicz import (
    DEFAULT_MAX_CONSECUTIVE_FAILURES,
    CaptureGrid,
    ChainState,
    ChainStats,
    Fault,
    GerbiczChain,
    default_block,
)
from .methods import Method, Verdict, default_method, method
from .numbers import Modulus

STATE_MAGIC = b"CHAINSTA"
STATE_VERSION = 1
DIGEST = 32


def write_temp(path: Path, data: bytes) -> Path:
    """Write ``data`` durably to ``path.tmp`` and return that path; on failure remove it."""
    tmp = path.with_name(path.name + ".tmp")
    try:
        with open(tmp, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return tmp


def atomic_write(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` so that a crash or a full disk leaves the old or the new file."""
    os.replace(write_temp(path, data), path)
    _fsync_dir(path.parent)


def _fsync_dir(folder: Path) -> None:
    fd = os.open(folder, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


@dataclass(frozen=True)
class RunConfig:
    """What to run: ``test`` (methods.py; default: the number's usual test) of ``number`` with
    ``base``, and a proof of ``depth``. ``known_factors`` go with cofactor-prp, ``delay_squarings``
    (T) with delay."""

    number: Modulus
    base: int = 3
    depth: int = 8
    block: int = 0  # Gerbicz block length L; 0 picks default_block
    blocks_per_check: int = 0  # B; 0 picks default_block
    test: str = ""
    known_factors: tuple[int, ...] = ()
    delay_squarings: int | None = None

    def __post_init__(self) -> None:
        m = method(self.test) if self.test else default_method(self.number, self.known_factors)
        object.__setattr__(self, "test", m.name)
        object.__setattr__(self, "known_factors", tuple(sorted(set(self.known_factors))))
        m.check(self.number, self.base, self.known_factors, self.delay_squarings)
        if not 1 <= self.depth <= MAX_DEPTH or (1 << self.depth) > self.squarings:
            raise UsageError(f"depth {self.depth} impossible: need 1 <= depth <= "
                             f"{min(MAX_DEPTH, self.squarings.bit_length() - 1)}")
        L, B = default_block(self.squarings)
        object.__setattr__(self, "block", self.block or L)
        object.__setattr__(self, "blocks_per_check", self.blocks_per_check or B)
        if self.block < 1 or self.blocks_per_check < 1:
            raise UsageError("Gerbicz block sizes must be positive")

    @property
    def method(self) -> Method:
        return method(self.test)

    @property
    def group(self) -> Any:
        return self.method.group(self.number)

    @property
    def squarings(self) -> int:
        return self.method.squarings(self.number, self.delay_squarings)

    def grid(self, extra: Iterable[int] = ()) -> CaptureGrid:
        T, d = self.squarings, self.depth
        return CaptureGrid(T % (1 << d), T >> d, 1 << d, extra)

    def identity(self) -> dict[str, Any]:
        return {
            "number": self.number.text,
            "test": self.test,
            "known_factors": [str(f) for f in self.known_factors],
            "squarings": self.squarings,
            "base": self.base,
            "depth": self.depth,
            "block": self.block,
            "blocks_per_check": self.blocks_per_check,
        }


@dataclass
class RunReport:
    certificate: Path
    certificate_bytes: int
    seconds: float
    squarings: int  # squarings done in this invocation, check work included
    depth: int
    gerbicz_checks: int
    errors_recovered: int
    resumed_at: int | None  # step a resumed run started from, or None for a fresh run
    result: str
    residue64: str
    verdict: Verdict
    warnings: list[str] = field(default_factory=list)


class Spool:
    """Fixed-size records (residue || SHA-256(residue)) for u_1..u_n, record j at (j-1)*size."""

    def __init__(self, path: Path, group: Any, fresh: bool) -> None:
        self.path, self.group = path, group
        self.size = group.element_bytes + DIGEST
        self.fh: BinaryIO = open(path, "w+b" if fresh else "r+b")  # noqa: SIM115 closed in close()

    def write(self, j: int, x: Any) -> None:
        data = self.group.to_bytes(x)
        self.fh.seek((j - 1) * self.size)
        self.fh.write(data + hashlib.sha256(data).digest())

    def read_record(self, j: int) -> tuple[bytes, bytes]:
        self.fh.seek((j - 1) * self.size)
        rec = self.fh.read(self.size)
        data, digest = rec[: -DIGEST], rec[-DIGEST:]
        if len(rec) != self.size or hashlib.sha256(data).digest() != digest:
            raise RunFailed(f"spool record {j} in {self.path} is damaged; restart the run")
        return data, digest

    def read(self, j: int) -> Any:
        return self.group.from_bytes(self.read_record(j)[0])

    def keep(self, count: int) -> None:
        """Drop every record after the first ``count``."""
        self.fh.flush()
        self.fh.truncate(count * self.size)

    def sync(self) -> None:
        self.fh.flush()
        os.fsync(self.fh.fileno())

    def close(self) -> None:
        self.fh.close()


class Run:
    """One run of ``config`` (its test, number and proof depth) writing its certificate to ``out``.

    ``clock`` and ``fault`` are injectable for tests; ``progress(step, total)`` is called at block
    ends; ``warn(message)`` receives recoverable problems (such as a damaged newest checkpoint).
    """

    def __init__(
        self,
        config: RunConfig,
        out: Path,
        *,
        key: Ed25519PrivateKey | None = None,
        checkpoint_seconds: float = 60.0,
        clock: Callable[[], float] = time.monotonic,
        fault: Fault | None = None,
        fault_steps: Iterable[int] = (),
        progress: Callable[[int, int], None] | None = None,
        warn: Callable[[str], None] | None = None,
        max_failures: int = DEFAULT_MAX_CONSECUTIVE_FAILURES,
    ) -> None:
        self.config, self.out, self.key = config, out, key
        self.checkpoint_seconds, self.clock = checkpoint_seconds, clock
        self.fault, self.fault_steps = fault, tuple(fault_steps)
        self.progress, self.max_failures = progress, max_failures
        self.warnings: list[str] = []
        self._warn_cb = warn
        self._state_damaged = False  # the newest state file failed to load; do not rotate it
        self.spool_path = out.with_name(out.name + ".spool")
        self.state_path = out.with_name(out.name + ".state")
        self.prev_path = out.with_name(out.name + ".state.prev")

    def _warn(self, message: str) -> None:
        self.warnings.append(message)
        if self._warn_cb is not None:
            self._warn_cb(message)

    # -- checkpoints -----------------------------------------------------------------------
    def _encode_state(self, state: ChainState, committed: int) -> bytes:
        num = self.config.group
        body = msgpack.packb(
            {
                **self.config.identity(),
                "step": state.step,
                "x": num.to_bytes(state.x),
                "d": num.to_bytes(state.d),
                "committed": committed,
            },
            use_bin_type=True,
        )
        header = STATE_MAGIC + bytes([STATE_VERSION])
        return header + body + hashlib.sha256(header + body).digest()

    def _decode_state(self, data: bytes) -> dict[str, Any]:
        """Parse a checkpoint; raise ValueError if it is damaged or not ours."""
        header = STATE_MAGIC + bytes([STATE_VERSION])
        if not data.startswith(header) or len(data) < len(header) + DIGEST:
            raise ValueError("not a chainproof run state")
        if hashlib.sha256(data[:-DIGEST]).digest() != data[-DIGEST:]:
            raise ValueError("checksum mismatch")
        obj = msgpack.unpackb(data[len(header):-DIGEST], raw=False)
        expected = {**self.config.identity(), "step": 0, "x": b"", "d": b"", "committed": 0}
        if not isinstance(obj, dict) or set(obj) != set(expected):
            raise ValueError("malformed")
        if any(type(obj[k]) is not type(v) for k, v in expected.items() if k not in self.config.identity()):
            raise ValueError("malformed")
        return obj

    def _write_state(self, state: ChainState, committed: int) -> None:
        self.spool.sync()
        tmp = write_temp(self.state_path, self._encode_state(state, committed))
        if self._state_damaged:  # keep the good older generation; drop the damaged newest
            self.state_path.unlink(missing_ok=True)
            self._state_damaged = False
        elif self.state_path.exists():
            os.replace(self.state_path, self.prev_path)
        os.replace(tmp, self.state_path)
        _fsync_dir(self.state_path.parent)
        self._last_save = self.clock()

    def _load_state(self) -> dict[str, Any] | None:
        for path in (self.state_path, self.prev_path):
            if not path.exists():
                continue
            try:
                obj = self._decode_state(path.read_bytes())
            except (ValueError, msgpack.UnpackException, OSError) as exc:
                self._warn(f"checkpoint {path} is unusable ({exc}); trying the older one")
                self._state_damaged = path == self.state_path
                continue
            ident = {k: obj.get(k) for k in self.config.identity()}
            if ident != self.config.identity():
                raise UsageError(
                    f"{path} belongs to a different run ({ident}); remove the .state, .state.prev "
                    "and .spool files beside the output to start over"
                )
            if path == self.prev_path and self.state_path.exists():
                self._warn(f"resuming from the older checkpoint {path}")
            return obj
        return None

    # -- the run ----------------------------------------------------------------------------
    def run(self) -> RunReport:
        """Run (or resume) to the end and write the certificate.

        Raises UsageError if the output exists without run state, RunFailed if the hardware keeps
        failing the Gerbicz check or the spool is damaged, StorageError if a file cannot be
        written (the state on disk stays consistent; the same call resumes).
        """
        try:
            return self._run()
        except OSError as exc:
            where = f" {exc.filename}" if exc.filename else ""
            raise StorageError(
                f"file error{where}: {exc.strerror or exc}; the last checkpoint is intact, run the "
                "same command again once this is fixed"
            ) from None

    def _run(self) -> RunReport:
        cfg, num = self.config, self.config.group
        t0 = self.clock()
        saved = self._load_state()
        if saved is None and self.out.exists():
            raise UsageError(f"{self.out} already exists; choose another output name")
        grid = cfg.grid(self.fault_steps)
        stats = ChainStats()
        state: ChainState | None = None
        if saved is not None:
            state = ChainState(saved["step"], num.from_bytes(saved["x"]), num.from_bytes(saved["d"]))
        if saved is not None and not self.spool_path.exists():
            raise RunFailed(f"{self.spool_path} is missing; remove the .state files to start over")
        self.spool = Spool(self.spool_path, num, fresh=saved is None)
        try:
            committed = saved["committed"] if saved else 0
            self.spool.keep(committed)
            for j in range(1, committed + 1):
                self.spool.read_record(j)
            self._last_save = self.clock()

            def on_stop(step: int, x: Any) -> None:
                j = grid.index(step)
                assert j is not None
                self.spool.write(j, x)

            def on_commit(st: ChainState) -> None:
                if st.step == cfg.squarings or self.clock() - self._last_save >= self.checkpoint_seconds:
                    self._write_state(st, grid.covered(st.step))

            def on_rollback(st: ChainState) -> None:
                self.spool.keep(grid.covered(st.step))

            report_progress = self.progress

            def on_block(step: int) -> None:
                if report_progress is not None:
                    report_progress(step, cfg.squarings)

            chain = GerbiczChain(
                num, cfg.method.start(cfg.number, cfg.base), cfg.squarings, cfg.block,
                cfg.blocks_per_check,
                grid=grid, on_stop=on_stop, on_commit=on_commit, on_rollback=on_rollback,
                fault=self.fault, max_failures=self.max_failures, stats=stats,
                progress=on_block if report_progress is not None else None,
            )
            if state is None or state.step < cfg.squarings:
                final = chain.run(state)
            else:
                final = state.x
            digests = tuple(self.spool.read_record(j)[1] for j in range(1, grid.count + 1))
            try:
                data = build_certificate(cfg.method, cfg.number, cfg.base, cfg.squarings, cfg.depth,
                                         final, digests, self.spool.read, self.key, cfg.known_factors)
            except SelfCheckFailed as exc:
                raise RunFailed(
                    f"self-check of the new certificate failed ({exc}); the run state is kept and the "
                    "same command rebuilds the proof from it. If that fails again, remove the .state, "
                    ".state.prev and .spool files to start over"
                ) from None
        finally:
            self.spool.close()
        atomic_write(self.out, data)
        # State files first (the older one first): a kill in between leaves the final state with its
        # spool, or a spool without state (overwritten by the next fresh run), never a state that
        # points at a missing spool.
        for path in (self.prev_path, self.state_path, self.spool_path):
            path.unlink(missing_ok=True)
        verdict = cfg.method.verdict(cfg.number, cfg.base, final, cfg.known_factors)
        return RunReport(
            certificate=self.out,
            certificate_bytes=len(data),
            seconds=self.clock() - t0,
            squarings=stats.squarings,
            depth=cfg.depth,
            gerbicz_checks=stats.checks,
            errors_recovered=stats.recoveries,
            resumed_at=state.step if state is not None else None,
            result=verdict.result,
            residue64=verdict.residue64,
            verdict=verdict,
            warnings=self.warnings,
        )

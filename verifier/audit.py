"""Batch audit: verify many certificates in parallel, through a standard executor.

Local runs use ``concurrent.futures.ProcessPoolExecutor``; ``--dask`` uses a Dask distributed
``Client`` (the same futures interface). One certificate per task; each task reads its file,
verifies it with a deadline, and returns an :class:`~verifier.ledger.Outcome`. A task that
crashes its worker process or runs out of time is reported as such and the batch goes on.
"""

from __future__ import annotations

import hashlib
import multiprocessing
import os
import time
from collections.abc import Callable, Iterable, Iterator, Sequence
from concurrent.futures import Future, ProcessPoolExecutor, as_completed
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from .codec import decode_unverified
from .errors import Rejected, RunFailed, VerifyTimeout
from .ledger import Outcome
from .verify import VerificationPolicy, verify

CERTIFICATE_SUFFIX = ".cpc"


@dataclass(frozen=True)
class AuditSettings:
    """What every task needs: the verification policy and a time limit per certificate."""

    policy: VerificationPolicy
    timeout: float | None = None


def find_certificates(paths: Iterable[str | Path]) -> list[Path]:
    """Files named directly, and every ``*.cpc`` below named folders (recursively), each once.
    Raises FileNotFoundError for a path that does not exist."""
    found: dict[Path, None] = {}
    for p in map(Path, paths):
        if p.is_dir():
            for f in sorted(p.rglob(f"*{CERTIFICATE_SUFFIX}")):
                if f.is_file():
                    found.setdefault(f.resolve(), None)
        elif p.exists():
            found.setdefault(p.resolve(), None)
        else:
            raise FileNotFoundError(str(p))
    return list(found)


def audit_one(path: str, settings: AuditSettings) -> Outcome:
    """Verify one certificate file (runs inside a worker). Never raises for a bad certificate:
    every problem becomes an outcome with a reason."""
    t0 = time.monotonic()
    try:
        data = Path(path).read_bytes()
    except OSError as exc:
        return Outcome("", path, "rejected", f"unreadable: {exc.strerror}")
    digest = hashlib.sha256(data).hexdigest()
    deadline = None if settings.timeout is None else time.monotonic() + settings.timeout
    try:
        cert = decode_unverified(data, max_bytes=settings.policy.max_certificate_bytes)
        r = verify(cert, settings.policy, clock=time.monotonic, deadline=deadline)
    except Rejected as exc:
        return Outcome(digest, path, "rejected", exc.reason, seconds=time.monotonic() - t0)
    except VerifyTimeout as exc:
        return Outcome(digest, path, "timeout", str(exc), seconds=time.monotonic() - t0)
    except RunFailed as exc:
        return Outcome(digest, path, "crashed", f"verifier machine fault: {exc}",
                       seconds=time.monotonic() - t0)
    return Outcome(
        certificate_sha256=digest, path=path, outcome="verified", number=r.number, test=r.test,
        base=r.base, known_factors=r.known_factors, result=r.result, proved=r.proved,
        residue64=r.residue64, final_sha256=r.final_digest, signer=r.signer, depth=r.depth,
        checkpoints=b"".join(cert.checkpoints), seconds=r.seconds, squarings=r.squarings,
    )


def _crashed(path: str, digest: str, why: str) -> Outcome:
    return Outcome(digest, path, "crashed", why)


def _local(paths: Sequence[str], settings: AuditSettings, jobs: int) -> Iterator[Outcome]:
    """ProcessPoolExecutor; if a worker dies the pool breaks: the unfinished certificates are then
    retried one per fresh single-worker pool, so the one that kills its worker is identified."""
    ctx = multiprocessing.get_context("fork" if os.name == "posix" else "spawn")
    done: set[str] = set()
    broken = False
    with ProcessPoolExecutor(max_workers=jobs, mp_context=ctx) as ex:
        futures: dict[Future[Outcome], str] = {ex.submit(audit_one, p, settings): p for p in paths}
        try:
            for fut in as_completed(futures):
                try:
                    out = fut.result()
                except BrokenProcessPool:
                    broken = True
                    continue
                done.add(futures[fut])
                yield out
        except BaseException:
            ex.shutdown(wait=False, cancel_futures=True)
            raise
    if broken:
        for p in paths:
            if p in done:
                continue
            with ProcessPoolExecutor(max_workers=1, mp_context=ctx) as one:
                try:
                    yield one.submit(audit_one, p, settings).result()
                except BrokenProcessPool:
                    yield _crashed(p, _digest(p), "the verifier process died on this certificate")


def _digest(path: str) -> str:
    try:
        return hashlib.sha256(Path(path).read_bytes()).hexdigest()
    except OSError:
        return ""


def _dask(paths: Sequence[str], settings: AuditSettings, address: str) -> Iterator[Outcome]:
    from distributed import Client
    from distributed import as_completed as dask_completed
    from distributed.client import FutureCancelledError

    with Client(address, timeout="10s") as client:
        futures = client.map(audit_one, list(paths), settings=settings, pure=False)
        where = {f.key: p for f, p in zip(futures, paths, strict=True)}
        for fut in dask_completed(futures):
            try:
                yield fut.result()
            except (FutureCancelledError, Exception) as exc:  # KilledWorker and friends
                p = where[fut.key]
                yield _crashed(p, _digest(p), f"worker failed: {type(exc).__name__}: {exc}")


def run_audit(
    paths: Sequence[str | Path],
    settings: AuditSettings,
    *,
    jobs: int = 0,
    dask_address: str | None = None,
    on_outcome: Callable[[Outcome, int, int], None] | None = None,
) -> list[Outcome]:
    """Audit ``paths`` (files and folders). Identical files are verified once and reported for
    every path. ``on_outcome(outcome, done, total)`` is called as results arrive (the caller
    records them, e.g. in a ledger). Returns the outcomes in completion order."""
    files = [str(p) for p in find_certificates(paths)]
    by_digest: dict[str, list[str]] = {}
    for f in files:
        by_digest.setdefault(_digest(f) or f, []).append(f)
    firsts = [group[0] for group in by_digest.values()]
    twins = {group[0]: group[1:] for group in by_digest.values() if len(group) > 1}
    if dask_address:
        stream = _dask(firsts, settings, dask_address)
    else:
        stream = _local(firsts, settings, jobs or os.cpu_count() or 1)
    results: list[Outcome] = []
    for out in stream:
        for o in [out, *(_twin(out, t) for t in twins.get(out.path, []))]:
            results.append(o)
            if on_outcome is not None:
                on_outcome(o, len(results), len(files))
    return results


def _twin(o: Outcome, path: str) -> Outcome:
    d: dict[str, Any] = dict(o.__dict__)
    d["path"] = path
    return Outcome(**d)

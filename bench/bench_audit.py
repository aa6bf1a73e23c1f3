"""Batch audit: 2 local worker processes against 1 (goal >= 1.7x), and Dask's LocalCluster.

    python bench/bench_audit.py [--exponent 44497] [--count 12] [--depth 2]

Builds COUNT distinct certificates of one number (one run; each certificate signed by its own key,
which the transcript binds, so proofs differ), then times `run_audit` with --jobs 1 and 2, and
on a 2-worker Dask LocalCluster if dask is installed. Prints a table.
"""

from __future__ import annotations

import argparse
import hashlib
import sys
import tempfile
import time
from pathlib import Path

from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from gmpy2 import mpz

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from verifier import VerificationPolicy  # noqa: E402
from verifier.audit import AuditSettings, run_audit  # noqa: E402
from verifier.certify import build_certificate  # noqa: E402
from verifier.methods import FermatPRP  # noqa: E402
from verifier.numbers import Mersenne  # noqa: E402


def make_batch(folder: Path, p: int, count: int, depth: int) -> None:
    num, test = Mersenne.from_exponent(p), FermatPRP()
    h, s = p % (1 << depth), p >> depth
    u = [num.square_n(test.start(num, 3), h)]
    for _ in range(1 << depth):
        u.append(num.square_n(u[-1], s))
    digests = [hashlib.sha256(num.to_bytes(x)).digest() for x in u[1:]]
    for i in range(count):
        key = Ed25519PrivateKey.from_private_bytes(hashlib.sha256(f"bench key {i}".encode()).digest())
        data = build_certificate(test, num, 3, p, depth, mpz(u[-1]), digests, lambda j: u[j], key)
        (folder / f"c{i:03d}.cpc").write_bytes(data)


def timed(label: str, fn) -> float:  # type: ignore[no-untyped-def]
    t = time.perf_counter()
    outcomes = fn()
    dt = time.perf_counter() - t
    assert all(o.outcome == "verified" for o in outcomes), label
    return dt


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--exponent", type=int, default=44497)
    ap.add_argument("--count", type=int, default=12)
    ap.add_argument("--depth", type=int, default=2)
    args = ap.parse_args()
    settings = AuditSettings(VerificationPolicy())
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        print(f"[bench] building {args.count} certificates of 2^{args.exponent}-1", file=sys.stderr)
        make_batch(folder, args.exponent, args.count, args.depth)
        one = min(timed("1", lambda: run_audit([folder], settings, jobs=1)) for _ in range(2))
        two = min(timed("2", lambda: run_audit([folder], settings, jobs=2)) for _ in range(2))
        rows = [("1 local process", one, 1.0), ("2 local processes", two, one / two)]
        try:
            from distributed import LocalCluster

            with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as c:
                dask = min(timed("dask", lambda: run_audit([folder], settings, dask_address=c.scheduler_address))
                           for _ in range(2))
            rows.append(("Dask LocalCluster, 2 workers", dask, one / dask))
        except ImportError:
            pass
    print(f"batch: {args.count} certificates of 2^{args.exponent}-1 at depth {args.depth}")
    print(f"{'executor':<30} {'seconds':>8} {'speed-up vs 1':>14}")
    for label, secs, ratio in rows:
        print(f"{label:<30} {secs:>8.2f} {ratio:>13.2f}x")
    print("goal: 2 local processes >= 1.7x")
    return 0


if __name__ == "__main__":
    sys.exit(main())

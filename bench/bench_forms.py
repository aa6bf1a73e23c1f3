"""Reduction modulo special forms: the fold in verifier/numbers.py against plain ``%``.

    python bench/bench_forms.py [--bits 86000] [--reps 300]

For k*2^n+-1 (k = 1, 3, 27) and Fermat-style 2^n+1, times `square then reduce` both ways on the
same values, checks they agree, and prints a table. numbers.py keeps whichever is faster (the fold).
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

from gmpy2 import mpz

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from verifier.numbers import KTwoN, Mersenne  # noqa: E402


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--bits", type=int, default=86000)
    ap.add_argument("--reps", type=int, default=300)
    args = ap.parse_args()
    n = args.bits
    forms = [("2^p-1 (Mersenne fold)", Mersenne(86243) if n == 86000 else Mersenne(n)),
             ("3*2^n+1", KTwoN(3, n, 1)), ("3*2^n-1", KTwoN(3, n, -1)), ("27*2^n+1", KTwoN(27, n, 1)),
             ("2^n+1 (k = 1)", KTwoN(1, n, 1))]
    print(f"{'form':<24} {'% N (us)':>10} {'fold (us)':>10} {'speed-up':>9}")
    for label, num in forms:
        N = num.N
        x0 = mpz(7) ** (n // 3) % N
        best_mod = best_fold = float("inf")
        for _ in range(3):
            t = time.perf_counter()
            x = x0
            for _ in range(args.reps):
                x = x * x % N
            best_mod = min(best_mod, (time.perf_counter() - t) / args.reps)
            t = time.perf_counter()
            y = x0
            for _ in range(args.reps):
                y = num.reduce(y * y)
            best_fold = min(best_fold, (time.perf_counter() - t) / args.reps)
            if x != y:
                print(f"MISMATCH for {label}", file=sys.stderr)
                return 1
        print(f"{label:<24} {best_mod * 1e6:>10.1f} {best_fold * 1e6:>10.1f} {best_mod / best_fold:>8.2f}x")
    return 0


if __name__ == "__main__":
    sys.exit(main())

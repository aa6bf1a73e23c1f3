"""Prover extra (building the proof) against run length and depth, measured.

    python bench/bench_prover.py [--exponents 21701,44497,110503] [--json FILE]

For each exponent, runs the real worker (Run) at the planner's recommended depth, at two depths
around it and at depth 8, and splits the time into the checked chain, proof building
(verifier.certify.prove) and the rest (spool, self-check, certificate). Prints a table.
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from phase_timer import phase_timer  # noqa: E402

from verifier.engine import Run, RunConfig  # noqa: E402
from verifier.numbers import Mersenne  # noqa: E402
from verifier.planner import plan  # noqa: E402


def timed_run(number: Mersenne, depth: int, tmp: Path) -> dict[str, float]:
    with phase_timer() as spent:
        t0 = time.perf_counter()
        Run(RunConfig(number, depth=depth), tmp / f"m{number.p}-{depth}.cpc").run()
        total = time.perf_counter() - t0
    return {"total": total, **spent, "rest": total - spent["chain"] - spent["prove"]}


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--exponents", default="21701,44497,110503")
    ap.add_argument("--json", metavar="FILE")
    args = ap.parse_args()
    rows = []
    with tempfile.TemporaryDirectory() as tmpname:
        for p in (int(e) for e in args.exponents.split(",")):
            number = Mersenne.from_exponent(p)
            pl = plan(number)
            rec = pl.recommended.depth
            for depth in sorted({rec - 1, rec, rec + 1, 8}):
                if depth < 1:
                    continue
                print(f"[bench] p={p} depth={depth}", file=sys.stderr, flush=True)
                t = timed_run(number, depth, Path(tmpname))
                model = next(o for o in pl.options if o.depth == depth).prover_extra_fraction
                rows.append({"p": p, "depth": depth, "recommended": depth == rec, **t,
                             "prove_share": t["prove"] / t["chain"], "model_share": model})
    print(f"{'T = p':>8} {'depth':>6} {'chain s':>9} {'proof s':>9} {'proof/chain':>12} {'model':>8} "
          f"{'rest s':>8}")
    for r in rows:
        mark = "*" if r["recommended"] else " "
        print(f"{r['p']:>8} {r['depth']:>5}{mark} {r['chain']:>9.2f} {r['prove']:>9.3f} "
              f"{r['prove_share']:>12.2%} {r['model_share']:>8.2%} {r['rest']:>8.2f}")
    print("* the planner's recommended depth; 'rest' is spool writes, the self-check and the certificate")
    if args.json:
        Path(args.json).write_text(json.dumps(rows, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())

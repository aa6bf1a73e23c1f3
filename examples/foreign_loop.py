"""A squaring loop that is not chainproof's, with a certificate attached through the Recorder.

    python examples/foreign_loop.py [EXPONENT] [--out CERT] [--spool DIR] [--stop-after STEPS]

The loop below stands in for a search program's own optimised arithmetic: it uses nothing but
Python's built-in integers and pow(), and only talks to chainproof through the Recorder (which
steps it wants, and the residues at those steps). Run it with --stop-after to simulate a crash,
then run it again with the same --spool: it picks up where the spool ends.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from verifier import parse_number
from verifier.recorder import Recorder


def host_square(x: int, n: int, modulus: int) -> int:
    """The host's arithmetic: n modular squarings with built-in pow (no chainproof code)."""
    for _ in range(n):
        x = pow(x, 2, modulus)
    return x


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("exponent", nargs="?", type=int, default=4423)
    ap.add_argument("--out", default="foreign.cpc")
    ap.add_argument("--spool", default="foreign-spool")
    ap.add_argument("--depth", type=int, default=6)
    ap.add_argument("--stop-after", type=int, default=None, help="simulate a crash after this many steps")
    args = ap.parse_args(argv)

    number = parse_number(f"2^{args.exponent}-1")
    modulus, base = (1 << args.exponent) - 1, 3
    spool = Path(args.spool)
    if (spool / "manifest.json").exists():
        rec = Recorder.open(spool, check_every=16)
    else:
        rec = Recorder.create(spool, number, base=base, depth=args.depth, check_every=16)
    step, x = rec.resume_point()
    x = int(x)
    done = 0
    while rec.next_step is not None:
        target = rec.next_step
        if args.stop_after is not None and done + (target - step) > args.stop_after:
            print(f"host: stopping at step {step} (simulated crash)")
            return 3
        x = host_square(x, target - step, modulus)
        done += target - step
        step = target
        rec.feed(step, x)
    rec.finish(Path(args.out))
    print(f"host: certificate written to {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())

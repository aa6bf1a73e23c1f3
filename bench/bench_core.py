#!/usr/bin/env python3
"""Core benchmark of chainproof: what the Gerbicz check, the proof and the verifier cost.

Usage::

    python bench/bench_core.py [--exponent P | --quick] [--depth D] [--repeat K] [--json FILE]

Measures, on N = 2^p - 1 (default p = 86243, ``--quick`` uses p = 9941):

1. the Gerbicz-checked chain (``GerbiczChain``, ``default_block(p)``, no captures) against a bare
   gmpy2 square-and-fold loop over the same p squarings;
2. a complete ``Run(RunConfig(number, depth=D), out).run()`` (spool writes, proof, certificate)
   against ``gmpy2.powmod(3, N-1, N)``, with the time split into the chain phase and the rest;
3. ``verify(decode_unverified(bytes), ...)`` against the full run, and the verifier's squarings;
4. the certificate size;
5. the peak RSS of the full run (measured per child process with ``os.wait4``), next to the
   residue size and the peak RSS of bare ``python + import gmpy2`` / ``import verifier`` children.

Timings are the minimum over ``--repeat`` runs (default 2). Goals are reported, never enforced:
the exit status is 0 whenever the results are correct, 1 if a correctness check fails (wrong
residue, wrong verdict, rejected certificate), 2 for bad arguments.

The full runs execute in child processes (this file re-invoked with a private ``--child`` flag)
so that their peak RSS is not mixed with the parent's. To split a full run into its chain phase
and the rest, the child wraps ``verifier.engine.GerbiczChain.run`` and ``verifier.certify.prove``
with timers before starting the run; library code is not changed.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

DEFAULT_EXPONENT = 86243
QUICK_EXPONENT = 9941
DEFAULT_DEPTH = 8
MASK64 = (1 << 64) - 1


def log(msg: str) -> None:
    print(f"[bench] {msg}", file=sys.stderr, flush=True)


# ------------------------------------------------------------------------------------------------
# Child processes (full run, import baselines). Each prints one JSON object on stdout.
# ------------------------------------------------------------------------------------------------


def _self_peak_rss_bytes() -> int:
    """Peak RSS of this process since its exec.

    On Linux this is VmHWM from /proc/self/status. getrusage's ru_maxrss is not used there: the
    kernel carries the parent's high-water mark across fork/vfork + exec into the child's
    ru_maxrss, so every child would report at least the parent's size.
    """
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    import resource

    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return rss if sys.platform == "darwin" else rss * 1024


def child_main(argv: list[str]) -> int:
    kind = argv[0]
    if kind == "baseline-gmpy2":
        import gmpy2  # noqa: F401

        print(json.dumps({"peak_rss": _self_peak_rss_bytes()}))
        return 0
    if kind == "baseline-verifier":
        import gmpy2  # noqa: F401

        import verifier  # noqa: F401

        print(json.dumps({"peak_rss": _self_peak_rss_bytes()}))
        return 0
    if kind == "full-run":
        p, depth, out = int(argv[1]), int(argv[2]), Path(argv[3])
        print(json.dumps(_child_full_run(p, depth, out)))
        return 0
    print(f"unknown child kind {kind!r}", file=sys.stderr)
    return 2


def _child_full_run(p: int, depth: int, out: Path) -> dict[str, Any]:
    from phase_timer import phase_timer

    from verifier.engine import Run, RunConfig
    from verifier.numbers import Mersenne

    config = RunConfig(Mersenne.from_exponent(p), depth=depth)
    with phase_timer() as spent:
        t0 = time.perf_counter()
        report = Run(config, out).run()
        seconds = time.perf_counter() - t0
    return {
        "seconds": seconds,
        "chain_seconds": spent["chain"],
        "prove_seconds": spent["prove"],
        "report_seconds": report.seconds,
        "squarings": report.squarings,
        "gerbicz_checks": report.gerbicz_checks,
        "errors_recovered": report.errors_recovered,
        "block": config.block,
        "blocks_per_check": config.blocks_per_check,
        "result": report.result,
        "residue64": report.residue64,
        "certificate": str(report.certificate),
        "certificate_bytes": report.certificate_bytes,
        "peak_rss": _self_peak_rss_bytes(),
    }


def run_child(args: list[str]) -> tuple[dict[str, Any], int]:
    """Run this file as a child; return (its JSON output, its peak RSS in bytes).

    The peak is what the child reports for itself (VmHWM on Linux). The wait4 rusage figure is
    kept in the output as ``wait4_maxrss`` for comparison; on Linux it is inflated to at least
    the parent's RSS (see _self_peak_rss_bytes).
    """
    cmd = [sys.executable, os.path.abspath(__file__), "--child", *args]
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE)
    assert proc.stdout is not None
    data = proc.stdout.read()
    proc.stdout.close()
    _, status, usage = os.wait4(proc.pid, 0)
    proc.returncode = os.waitstatus_to_exitcode(status)
    if proc.returncode != 0:
        raise RuntimeError(f"child {args[0]} exited with status {proc.returncode}")
    info = json.loads(data)
    info["wait4_maxrss"] = usage.ru_maxrss if sys.platform == "darwin" else usage.ru_maxrss * 1024
    return info, int(info["peak_rss"])


# ------------------------------------------------------------------------------------------------
# Measurements in the parent
# ------------------------------------------------------------------------------------------------


def bare_square_fold(x: Any, n: int, N: Any, p: int) -> Any:
    """x^(2^n) mod N = 2^p - 1 with gmpy2: square, fold, one conditional subtraction."""
    for _ in range(n):
        x = x * x
        x = (x & N) + (x >> p)
        if x >= N:
            x -= N
    return x


def count_verifier_ops(cert_data: bytes, policy: Any) -> dict[str, int]:
    """One extra, untimed verify with Mersenne.square_n / Mersenne.mul wrapped by counters.

    VerifiedResult.squarings counts every squaring (head, halvings, final segment and its check);
    this independent count also gives the multiplications.
    """
    from verifier.codec import decode_unverified
    from verifier.numbers import Mersenne
    from verifier.verify import verify

    counts = {"squarings": 0, "mults": 0}
    orig_sq, orig_mul = Mersenne.square_n, Mersenne.mul

    def square_n(self: Any, x: Any, n: int) -> Any:
        counts["squarings"] += n
        return orig_sq(self, x, n)

    def mul(self: Any, a: Any, b: Any) -> Any:
        counts["mults"] += 1
        return orig_mul(self, a, b)

    Mersenne.square_n, Mersenne.mul = square_n, mul  # type: ignore[method-assign]
    try:
        verify(decode_unverified(cert_data), policy)
    finally:
        Mersenne.square_n, Mersenne.mul = orig_sq, orig_mul  # type: ignore[method-assign]
    return counts


@dataclass
class Row:
    key: str
    measure: str
    value: float | int
    shown: str
    unit: str = ""
    goal: str = "-"
    met: bool | None = None


def fmt_s(t: float) -> str:
    return f"{t:.3f} s" if t >= 0.1 else f"{t * 1000:.2f} ms"


def fmt_mib(b: int) -> str:
    return f"{b / 2**20:.1f} MiB"


def render(rows: list[Row]) -> str:
    head = ("measure", "value", "goal", "met?")
    cells = [
        (r.measure, r.shown, r.goal, "-" if r.met is None else ("yes" if r.met else "NO"))
        for r in rows
    ]
    widths = [max(len(c[i]) for c in [head, *cells]) for i in range(4)]

    def line(c: tuple[str, str, str, str]) -> str:
        return (
            f"{c[0]:<{widths[0]}}  {c[1]:>{widths[1]}}  {c[2]:<{widths[2]}}  {c[3]}".rstrip()
        )

    rule = "  ".join("-" * w for w in widths)
    return "\n".join([line(head), rule, *(line(c) for c in cells)])


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    if argv and argv[0] == "--child":
        return child_main(argv[1:])

    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    which = ap.add_mutually_exclusive_group()
    which.add_argument("--exponent", type=int, default=None,
                       help=f"p of N = 2^p-1 (default {DEFAULT_EXPONENT})")
    which.add_argument("--quick", action="store_true",
                       help=f"smoke run with p={QUICK_EXPONENT}")
    ap.add_argument("--depth", type=int, default=DEFAULT_DEPTH,
                    help=f"proof depth (default {DEFAULT_DEPTH})")
    ap.add_argument("--repeat", type=int, default=2,
                    help="repetitions per timing, the minimum is reported (default 2)")
    ap.add_argument("--json", metavar="FILE", type=Path, help="also write the numbers as JSON")
    args = ap.parse_args(argv)
    if args.repeat < 1:
        ap.error("--repeat must be >= 1")

    import gmpy2
    from gmpy2 import mpz

    from verifier.codec import decode_unverified
    from verifier.errors import ChainproofError
    from verifier.gerbicz import ChainStats, GerbiczChain, default_block
    from verifier.numbers import Mersenne
    from verifier.verify import VerificationPolicy, verify

    p = QUICK_EXPONENT if args.quick else (args.exponent or DEFAULT_EXPONENT)
    depth = args.depth
    try:
        number = Mersenne.from_exponent(p)
    except ChainproofError as exc:
        ap.error(str(exc))
    if not 1 <= depth <= 24 or (1 << depth) > p:
        ap.error(f"depth {depth} impossible for p={p}")
    N = number.N
    base = 3
    reps = args.repeat
    failures: list[str] = []
    rows: list[Row] = []
    log(f"N = {number.text}, depth {depth}, {reps} repetition(s) per timing")

    # -- 1. Gerbicz chain vs bare loop ----------------------------------------------------------
    L, B = default_block(p)
    bare_times: list[float] = []
    chain_times: list[float] = []
    chain_stats = ChainStats()
    bare_x = chain_x = None
    for i in range(reps):
        log(f"1. bare loop, rep {i + 1}")
        t = time.perf_counter()
        bare_x = bare_square_fold(mpz(base), p, N, p)
        bare_times.append(time.perf_counter() - t)
        log(f"1. Gerbicz chain (L={L}, B={B}), rep {i + 1}")
        chain_stats = ChainStats()
        t = time.perf_counter()
        chain_x = GerbiczChain(number, mpz(base), p, L, B, stats=chain_stats).run()
        chain_times.append(time.perf_counter() - t)
    if bare_x != chain_x:
        failures.append("bare loop and Gerbicz chain disagree on base^(2^p) mod N")
    t_bare, t_chain = min(bare_times), min(chain_times)
    r1 = t_bare / t_chain
    rows += [
        Row("bare_loop_seconds", f"bare square+fold loop, {p} squarings", t_bare, fmt_s(t_bare),
            "s"),
        Row("gerbicz_chain_seconds", f"Gerbicz chain (L=B={L}), no captures", t_chain,
            fmt_s(t_chain), "s"),
        Row("gerbicz_chain_squarings", "  chain squarings incl. checks / p",
            chain_stats.squarings / p,
            f"{chain_stats.squarings} ({chain_stats.squarings / p:.4f}x)"),
        Row("bare_over_chain", "1. bare time / chain time", r1, f"{r1:.3f}", goal=">= 0.95",
            met=r1 >= 0.95),
    ]

    # -- 2. full run vs powmod ------------------------------------------------------------------
    pow_times: list[float] = []
    fermat = None
    for i in range(reps):
        log(f"2. gmpy2.powmod({base}, N-1, N), rep {i + 1}")
        t = time.perf_counter()
        fermat = gmpy2.powmod(base, N - 1, N)
        pow_times.append(time.perf_counter() - t)
    assert fermat is not None
    expected_result = "probable-prime" if fermat == 1 else "composite"
    expected_res64 = f"{int(fermat) & MASK64:016x}"
    t_pow = min(pow_times)

    full: list[dict[str, Any]] = []
    full_rss: list[int] = []
    with tempfile.TemporaryDirectory(prefix="chainproof-bench-") as tmp:
        for i in range(reps):
            log(f"2. full Run(depth={depth}) in a child process, rep {i + 1}")
            out = Path(tmp) / f"run{i}.cpc"
            info, rss = run_child(["full-run", str(p), str(depth), str(out)])
            info["cert_data"] = out.read_bytes()
            leftovers = sorted(q.name for q in Path(tmp).iterdir() if q.name != out.name)
            if leftovers:
                failures.append(f"run left files behind: {leftovers}")
            out.unlink()
            full.append(info)
            full_rss.append(rss)
        best = min(full, key=lambda d: d["seconds"])
        cert_data: bytes = best["cert_data"]
        spool_bytes = (1 << depth) * (number.nbytes + 32)

    for info in full:
        if info["residue64"] != expected_res64:
            failures.append(f"run residue64 {info['residue64']} != powmod's {expected_res64}")
        if info["result"] != expected_result:
            failures.append(f"run result {info['result']!r} != powmod's {expected_result!r}")
        if info["errors_recovered"]:
            failures.append(f"run recovered from {info['errors_recovered']} Gerbicz failures")
    t_full, t_run_chain = best["seconds"], best["chain_seconds"]
    t_rest = t_full - t_run_chain
    r2 = t_pow / t_full
    r2_chain = t_pow / t_run_chain
    rows += [
        Row("powmod_seconds", f"gmpy2.powmod({base}, N-1, N)", t_pow, fmt_s(t_pow), "s"),
        Row("full_run_seconds", f"full Run (depth {depth}): chain+spool+proof+cert", t_full,
            fmt_s(t_full), "s"),
        Row("powmod_over_full_run", "2. powmod time / full run time", r2, f"{r2:.3f}",
            goal=">= 3", met=r2 >= 3),
        Row("run_phase_seconds", "  run phase (chain + spool writes)", t_run_chain,
            fmt_s(t_run_chain), "s"),
        Row("powmod_over_run_phase", "  powmod time / run-phase time", r2_chain,
            f"{r2_chain:.3f}", goal="(info; >= 3)", met=r2_chain >= 3),
        Row("proof_seconds", "  proof building etc. (full - chain)", t_rest, fmt_s(t_rest), "s"),
        Row("proof_percent", "  proof building share of full run", 100 * t_rest / t_full,
            f"{100 * t_rest / t_full:.1f} %", "%"),
        Row("prove_call_seconds", "    of which verifier.proof.prove()", best["prove_seconds"],
            fmt_s(best["prove_seconds"]), "s"),
    ]

    # -- 3. verify vs full run ------------------------------------------------------------------
    policy = VerificationPolicy(unsafe_accept_unsigned=True)
    ver_times: list[float] = []
    vres = None
    for i in range(max(reps, 3)):
        log(f"3. verify, rep {i + 1}")
        t = time.perf_counter()
        try:
            vres = verify(decode_unverified(cert_data), policy)
        except ChainproofError as exc:
            failures.append(f"verify rejected the certificate: {exc}")
            break
        ver_times.append(time.perf_counter() - t)
    if vres is not None and ver_times:
        if vres.result != expected_result:
            failures.append(f"verify result {vres.result!r} != expected {expected_result!r}")
        if vres.residue64 != expected_res64:
            failures.append(f"verify residue64 {vres.residue64} != powmod's {expected_res64}")
        t_ver = min(ver_times)
        r3 = t_full / t_ver
        ops = count_verifier_ops(cert_data, policy)
        rows += [
            Row("verify_seconds", f"verify (depth {depth}, decode included)", t_ver, fmt_s(t_ver),
                "s"),
            Row("full_run_over_verify", "3. full run time / verify time", r3, f"{r3:.1f}",
                goal=">= 30", met=r3 >= 30),
            Row("verifier_squarings", "  verifier squarings (reported) vs p", vres.squarings,
                f"{vres.squarings} vs {p} (1/{p / vres.squarings:.0f})"),
            Row("verifier_mulmods_counted", "  verifier squarings+mults (counted) vs p",
                ops["squarings"] + ops["mults"],
                f"{ops['squarings']}+{ops['mults']} vs {p} "
                f"(1/{p / (ops['squarings'] + ops['mults']):.0f})"),
        ]

    # -- 4. certificate size --------------------------------------------------------------------
    rows.append(Row("certificate_bytes", f"4. certificate size (depth {depth})", len(cert_data),
                    f"{len(cert_data)} B"))

    # -- 5. memory --------------------------------------------------------------------------------
    log("5. import baselines in child processes")
    _, rss_gmpy2 = run_child(["baseline-gmpy2"])
    _, rss_verifier = run_child(["baseline-verifier"])
    rss_full = max(full_rss)
    rows += [
        Row("full_run_peak_rss_bytes", "5. peak RSS of full run (child)", rss_full,
            fmt_mib(rss_full), "B"),
        Row("residue_bytes", "  residue size (p/8)", number.nbytes, f"{number.nbytes} B", "B"),
        Row("spool_bytes", f"  spool on disk (2^{depth} records)", spool_bytes,
            f"{spool_bytes} B", "B"),
        Row("baseline_gmpy2_peak_rss_bytes", "  peak RSS: python + import gmpy2", rss_gmpy2,
            fmt_mib(rss_gmpy2), "B"),
        Row("baseline_verifier_peak_rss_bytes", "  peak RSS: python + import verifier",
            rss_verifier, fmt_mib(rss_verifier), "B"),
        Row("full_run_rss_over_gmpy2_baseline_bytes", "  full run - gmpy2 baseline",
            rss_full - rss_gmpy2, fmt_mib(rss_full - rss_gmpy2), "B"),
        Row("full_run_rss_over_verifier_baseline_bytes", "  full run - verifier-import baseline",
            rss_full - rss_verifier, f"{(rss_full - rss_verifier) / 2**20:.2f} MiB "
            f"(~{(rss_full - rss_verifier) / number.nbytes:.0f} residues)", "B"),
    ]

    ok = not failures
    rows.append(Row("correct", "correctness (residue64 + verdicts)", int(ok),
                    f"{'ok' if ok else 'FAILED'}: {best['residue64']} {best['result']}",
                    goal="must hold", met=ok))

    print(f"chainproof core benchmark: N = {number.text}, depth {depth}, base {base}, "
          f"min of {reps} run(s); Python {platform.python_version()}, gmpy2 {gmpy2.version()}, "
          f"{os.cpu_count()} CPU(s)")
    print(render(rows))
    for f in failures:
        print(f"CORRECTNESS FAILURE: {f}")

    if args.json:
        doc = {
            "number": number.text,
            "exponent": p,
            "depth": depth,
            "base": base,
            "repeat": reps,
            "environment": {
                "python": platform.python_version(),
                "gmpy2": gmpy2.version(),
                "machine": platform.machine(),
                "platform": platform.platform(),
                "cpus": os.cpu_count(),
                "time": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
            },
            "gerbicz_block": L,
            "gerbicz_blocks_per_check": B,
            "measures": {
                r.key: {"measure": r.measure.strip(), "value": r.value, "unit": r.unit,
                        "goal": None if r.goal == "-" else r.goal, "met": r.met}
                for r in rows
            },
            "samples": {
                "bare_loop_seconds": bare_times,
                "gerbicz_chain_seconds": chain_times,
                "powmod_seconds": pow_times,
                "full_run_seconds": [d["seconds"] for d in full],
                "full_run_chain_seconds": [d["chain_seconds"] for d in full],
                "full_run_prove_seconds": [d["prove_seconds"] for d in full],
                "full_run_peak_rss_bytes": full_rss,
                "verify_seconds": ver_times,
            },
            "expected": {"result": expected_result, "residue64": expected_res64},
            "run": {k: v for k, v in best.items() if k not in ("cert_data", "certificate")},
            "verify": None if vres is None else {
                "result": vres.result, "residue64": vres.residue64,
                "squarings": vres.squarings, "seconds": vres.seconds,
            },
            "correct": ok,
            "failures": failures,
        }
        args.json.write_text(json.dumps(doc, indent=2) + "\n")
        log(f"wrote {args.json}")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())

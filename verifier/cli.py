"""The ``chainproof`` command line: parse, call the library, print. No logic lives only here.

Exit codes: 0 success (``check``: verified), 1 rejected certificate or failed run, 2 usage or I/O
error.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from . import __version__
from .codec import UnverifiedCertificate, decode_unverified
from .engine import Run, RunConfig
from .errors import Rejected, RunFailed, StorageError, UsageError
from .methods import METHODS, FermatPRP, Method, Proth, default_method, method
from .numbers import NUMBER_SYNTAX, Fermat, KTwoN, Mersenne, Modulus, parse_modulus, parse_number
from .signing import (
    fingerprint,
    generate_keypair,
    load_private_key,
    load_public_key,
    raw_public,
)
from .verify import PRP_CAUTION, VerificationPolicy, verify

EXTENSION = ".cpc"
EXIT_OK, EXIT_REJECTED, EXIT_USAGE = 0, 1, 2


def _emit(args: argparse.Namespace, obj: dict[str, Any], lines: Sequence[str]) -> None:
    if args.json:
        print(json.dumps(obj, sort_keys=True))
    else:
        print("\n".join(lines))


def _passphrase(args: argparse.Namespace) -> bytes | None:
    name = getattr(args, "passphrase_env", None)
    if not name:
        return None
    value = os.environ.get(name)
    if value is None:
        raise UsageError(f"environment variable {name} (named by --passphrase-env) is not set")
    return value.encode()


def _read_certificate(path: Path, max_bytes: int) -> bytes:
    try:
        size = path.stat().st_size
        if size > max_bytes:
            raise Rejected(f"certificate is {size} bytes, above the limit of {max_bytes}")
        return path.read_bytes()
    except OSError as exc:
        raise UsageError(f"cannot read {path}: {exc.strerror}") from None


@contextmanager
def _progress_bar(enabled: bool, label: str) -> Iterator[Callable[[int, int], None] | None]:
    """A rich progress bar with rate and ETA on a terminal; nothing otherwise."""
    if not enabled:
        yield None
        return
    from rich.progress import (
        BarColumn,
        MofNCompleteColumn,
        Progress,
        TextColumn,
        TimeRemainingColumn,
    )

    columns = (
        TextColumn("{task.description}"),
        BarColumn(),
        MofNCompleteColumn(),
        TextColumn("{task.fields[rate]:>9} sq/s"),
        TimeRemainingColumn(),
    )
    with Progress(*columns, transient=True) as bar:
        task = bar.add_task(label, total=None, rate="")

        def update(step: int, total: int) -> None:
            elapsed = bar.tasks[0].elapsed or 0.0
            rate = f"{step / elapsed:,.0f}" if elapsed > 0 else ""
            bar.update(task, completed=step, total=total, rate=rate)

        yield update


# -- commands ---------------------------------------------------------------------------------
def cmd_keygen(args: argparse.Namespace) -> int:
    pub, fp = generate_keypair(Path(args.output), _passphrase(args))
    _emit(
        args,
        {"private_key": args.output, "public_key": str(pub), "fingerprint": fp},
        [f"private key  {args.output}  (mode 0600; keep it secret)", f"public key   {pub}",
         f"fingerprint  {fp}"],
    )
    return EXIT_OK


def _depth(text: str) -> int | str:
    if text == "auto":
        return text
    try:
        return int(text)
    except ValueError:
        raise argparse.ArgumentTypeError("depth must be an integer or 'auto'") from None


def cmd_prove(args: argparse.Namespace) -> int:
    from .planner import plan

    if args.modulus is not None:
        if args.number is not None:
            raise UsageError("give either a number or --modulus, not both")
        number: Modulus = parse_modulus(args.modulus)
    elif args.number is None:
        raise UsageError("no number given")
    else:
        number = parse_number(args.number)
    factors = tuple(_factor(f) for f in args.known_factor or ())
    test = method(args.test) if args.test else default_method(number, factors)
    if args.base in (None, "auto"):  # Proth needs Jacobi(a/N) = -1: search for the smallest such a
        base = Proth.find_base(number) if test.name == "proth" else test.default_base
    else:
        try:
            base = int(args.base)
        except ValueError:
            raise UsageError(f"base must be an integer or 'auto', not {args.base!r}") from None
    key = load_private_key(Path(args.key), _passphrase(args)) if args.key else None
    out = Path(args.output) if args.output else Path(_default_name(number, test) + EXTENSION)
    test.check(number, base, factors, args.squarings)
    depth = (plan(number, test=test, squarings=args.squarings).recommended.depth
             if args.depth == "auto" else args.depth)
    config = RunConfig(number, base=base, depth=depth, test=test.name, known_factors=factors,
                       delay_squarings=args.squarings)
    show_bar = not args.json and sys.stderr.isatty()

    def warn(message: str) -> None:
        print(f"chainproof: warning: {message}", file=sys.stderr)

    with _progress_bar(show_bar, f"{test.name} {_short(number.text)}") as bar:
        report = Run(config, out, key=key, checkpoint_seconds=args.checkpoint_every,
                     progress=bar, warn=warn).run()
    v = report.verdict
    obj = {
        "number": number.text,
        "test": test.name,
        "base": base,
        "result": report.result,
        "proved": v.proved,
        "subject": v.subject,
        "residue64": report.residue64,
        "certificate": str(report.certificate),
        "certificate_bytes": report.certificate_bytes,
        "seconds": round(report.seconds, 3),
        "squarings": report.squarings,
        "depth": report.depth,
        "gerbicz_checks": report.gerbicz_checks,
        "errors_recovered": report.errors_recovered,
        "resumed_at": report.resumed_at,
        "signer": fingerprint(raw_public(key)) if key else None,
        "caution": v.caution,
    }
    if factors:
        obj["known_factors"] = [str(f) for f in factors]
    resumed = "" if report.resumed_at is None else f" (resumed at step {report.resumed_at:,})"
    signed = f"signed {fingerprint(raw_public(key))}" if key else "UNSIGNED"
    _emit(args, obj, [
        f"{_short(v.subject)}: {report.result} ({test.title}, base {base}), residue64 {report.residue64}",
        f"  run          {report.squarings:,} squarings in {report.seconds:.2f} s{resumed}",
        f"  checks       {report.gerbicz_checks} Gerbicz checks, {report.errors_recovered} errors "
        "recovered",
        f"  certificate  {report.certificate} ({report.certificate_bytes:,} bytes, depth "
        f"{report.depth}, {signed})",
        v.caution,
    ])
    return EXIT_OK


def _factor(text: str) -> int:
    try:
        return int(text, 0)
    except ValueError:
        raise UsageError(f"cannot read factor {text!r}") from None


def _short(text: str) -> str:
    return text if len(text) <= 40 else f"{text[:18]}...{text[-12:]}"


def _default_name(number: Modulus, test: Method) -> str:
    if isinstance(number, Mersenne):
        stem = f"m{number.p}"
    elif isinstance(number, Fermat):
        stem = f"f{number.m}"
    elif isinstance(number, KTwoN):
        stem = f"{number.k}x2e{number.n}{'p' if number.c > 0 else 'm'}1"
    else:
        stem = f"mod{number.bits}bit"
    return stem if test is default_method(number) else f"{stem}-{test.name}"


def cmd_assemble(args: argparse.Namespace) -> int:
    from .recorder import SpoolError, assemble

    key = load_private_key(Path(args.key), _passphrase(args)) if args.key else None
    out = Path(args.output)
    if out.exists():
        raise UsageError(f"{out} already exists; choose another output name")
    try:
        data = assemble(Path(args.spool), out, key)
    except SpoolError as exc:
        _emit(args, {"assembled": False, "spool": args.spool, "reason": str(exc)},
              [f"NOT ASSEMBLED  {exc}"])
        return EXIT_REJECTED
    cert = decode_unverified(data)
    number = parse_number(cert.number)
    v = FermatPRP().verdict(number, cert.base, number.from_bytes(cert.final), ())
    result, residue64 = v.result, v.residue64
    signer = fingerprint(cert.signer) if cert.signer else None
    obj = {"assembled": True, "certificate": str(out), "certificate_bytes": len(data),
           "number": cert.number, "depth": cert.depth, "result": result, "residue64": residue64,
           "signer": signer, "caution": PRP_CAUTION}
    _emit(args, obj, [
        f"{cert.number}: {result} (base {cert.base}), residue64 {residue64}",
        f"  certificate  {out} ({len(data):,} bytes, depth {cert.depth}, "
        f"{'signed ' + signer if signer else 'UNSIGNED'})",
        PRP_CAUTION,
    ])
    return EXIT_OK


def _size(n: float) -> str:
    for unit in ("B", "KB", "MB", "GB", "TB"):
        if n < 1000 or unit == "TB":
            return f"{n:,.0f} {unit}" if unit == "B" else f"{n:,.1f} {unit}"
        n /= 1000
    raise AssertionError


def cmd_plan(args: argparse.Namespace) -> int:
    from .planner import parse_size, plan, plot

    number = parse_number(args.number)
    try:
        max_disk = parse_size(args.max_disk) if args.max_disk else None
    except ValueError as exc:
        raise UsageError(str(exc)) from None
    p = plan(number, max_disk=max_disk, test=method(args.test) if args.test else None)
    if args.plot:
        try:
            plot(p, args.plot)
        except ImportError:
            raise UsageError("--plot needs matplotlib: pip install 'chainproof[plot]'") from None
    rec = p.recommended
    lines = [
        f"{_short(number.text)}: a run is {p.squarings:,} squarings, about {p.run_seconds:,.1f} s on this machine "
        f"({p.squaring_seconds * 1e6:,.1f} us per squaring)",
        f"{'depth':>5}  {'spool disk':>11}  {'certificate':>11}  {'prover extra':>24}  "
        f"{'verifier squarings':>18}  {'verify (model)':>14}",
    ]
    for o in p.options:
        mark = "*" if o.recommended else (" " if o.fits_disk else "x")
        lines.append(
            f"{o.depth:>4}{mark}  {_size(o.spool_bytes):>11}  {_size(o.certificate_bytes):>11}  "
            f"{o.prover_extra_seconds:>11,.2f} s ({o.prover_extra_fraction:>8.2%})  "
            f"{o.verifier_squarings:>18,.0f}  {o.verify_seconds:>12,.3f} s"
        )
    budget = f"spool within {_size(max_disk)} and " if max_disk is not None else ""
    lines.append(f"* recommended depth {rec.depth}: the smallest verify cost with {budget}proof building "
                 f"at most {p.max_prover_extra:.0%} of the run" +
                 ("" if rec.within_prover_budget and rec.fits_disk else
                  " (no depth meets every budget; this one costs the least in all)"))
    if max_disk is not None:
        lines.append("x over the disk budget")
    lines.append("The worker also verifies its own certificate before deleting the spool (costs about "
                 "the verify time).")
    if args.plot:
        lines.append(f"plot written to {args.plot}")
    _emit(args, p.as_dict(), lines)
    return EXIT_OK


def _policy(args: argparse.Namespace) -> VerificationPolicy:
    keys = frozenset(load_public_key(Path(k)) for k in args.trusted_key) if args.trusted_key else None
    return VerificationPolicy(
        trusted_signers=keys,
        unsafe_accept_unsigned=args.accept_unsigned,
        min_depth=args.min_depth,
        max_verifier_squarings=args.max_squarings,
    )


def cmd_check(args: argparse.Namespace) -> int:
    policy = _policy(args)
    path = Path(args.certificate)
    try:
        data = _read_certificate(path, policy.max_certificate_bytes)
        result = verify(decode_unverified(data, max_bytes=policy.max_certificate_bytes), policy)
    except RunFailed as exc:  # this machine failed its own check: no verdict about the certificate
        raise StorageError(f"could not check {path}: {exc}") from None
    except Rejected as exc:
        _emit(args, {"verified": False, "certificate": str(path), "reason": exc.reason},
              [f"REJECTED  {path}: {exc.reason}"])
        return EXIT_REJECTED
    signer = result.signer or "UNSIGNED (accepted only because of --accept-unsigned)"
    speedup = result.claimed_squarings / max(1, result.squarings)
    obj = {
        "verified": True,
        "certificate": str(path),
        "number": result.number,
        "test": result.test,
        "base": result.base,
        "result": result.result,
        "residue64": result.residue64,
        "depth": result.depth,
        "squarings": result.squarings,
        "claimed_squarings": result.claimed_squarings,
        "seconds": round(result.seconds, 3),
        "signer": result.signer,
        "unsigned": result.signer is None,
        "caution": result.caution,
    }
    obj.update(proved=result.proved, subject=result.subject)
    if result.known_factors:
        obj["known_factors"] = [str(f) for f in result.known_factors]
    _emit(args, obj, [
        f"VERIFIED  {_short(result.subject)}: {result.result} ({method(result.test).title}, "
        f"base {result.base})",
        f"  residue64  {result.residue64}",
        f"  proof      depth {result.depth}; {result.squarings:,} squarings instead of "
        f"{result.claimed_squarings:,} ({speedup:,.0f}x fewer)",
        f"  signer     {signer}",
        f"  time       {result.seconds:.3f} s",
        result.caution,
    ])
    return EXIT_OK


def _inspect_fields(cert: UnverifiedCertificate) -> dict[str, Any]:
    obj: dict[str, Any] = {
        "number": cert.number,
        "test": cert.test,
        "base": cert.base,
        "squarings": cert.squarings,
        "depth": cert.depth,
        "proof_values": len(cert.mu),
        "checkpoint_hashes": len(cert.checkpoints),
        "signer": fingerprint(cert.signer) if cert.signer else None,
    }
    try:  # what the certificate would mean if it verified; nothing here is checked
        number = parse_number(cert.number)
        test = method(cert.test)
        group = test.group(number)
        final = group.from_bytes(cert.final)
        factors = tuple(int(f) for f in cert.known_factors or ())
        if len(cert.final) == group.element_bytes and group.check_element(final) is None:
            v = test.verdict(number, cert.base, final, factors)
            obj["claimed_result"], obj["claimed_residue64"] = v.result, v.residue64
            obj["subject"] = v.subject
    except (UsageError, ZeroDivisionError, ValueError):
        pass
    return obj


def cmd_inspect(args: argparse.Namespace) -> int:
    path = Path(args.certificate)
    try:
        data = _read_certificate(path, VerificationPolicy().max_certificate_bytes)
        cert = decode_unverified(data)
    except Rejected as exc:
        _emit(args, {"readable": False, "certificate": str(path), "reason": exc.reason},
              [f"UNREADABLE  {path}: {exc.reason}"])
        return EXIT_REJECTED
    obj = {"readable": True, "verified": False, "certificate": str(path), "bytes": len(data),
           **_inspect_fields(cert)}
    claim = obj.get("claimed_result", "unreadable final residue")
    _emit(args, obj, [
        f"{path}: certificate CLAIMS (not verified; run 'chainproof check')",
        f"  number      {cert.number}   test {cert.test}, base {cert.base}",
        f"  claim       {claim}, residue64 {obj.get('claimed_residue64', '?')}",
        f"  proof       depth {cert.depth}, {cert.squarings:,} squarings, "
        f"{len(cert.checkpoints)} checkpoint hashes",
        f"  signer      {obj['signer'] or 'none (unsigned)'}",
        f"  size        {len(data):,} bytes",
        PRP_CAUTION,
    ])
    return EXIT_OK


# -- parser -------------------------------------------------------------------------------------
def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="chainproof",
        description="Certified Fermat PRP runs: run a test under a Gerbicz check, emit a "
        "certificate (Pietrzak halving proof), and check certificates quickly.",
    )
    parser.add_argument("--version", action="version", version=f"chainproof {__version__}")
    sub = parser.add_subparsers(dest="command", required=True)

    def add(name: str, help_text: str) -> argparse.ArgumentParser:
        p = sub.add_parser(name, help=help_text, description=help_text)
        p.add_argument("--json", action="store_true", help="print one JSON object")
        return p

    p = add("keygen", "create an Ed25519 signing key (PEM, mode 0600) and KEY.pub beside it")
    p.add_argument("-o", "--output", required=True, help="private key file to create")
    p.add_argument("--passphrase-env", metavar="VAR", help="encrypt with the passphrase in $VAR")
    p.set_defaults(func=cmd_keygen)

    p = add("prove", "run a test and write a certificate (resumes if interrupted)")
    p.add_argument("number", nargs="?", help=f"the number: {NUMBER_SYNTAX}")
    p.add_argument("-o", "--output", help=f"certificate file (default e.g. m<p>{EXTENSION})")
    p.add_argument("--test", choices=sorted(METHODS),
                   help="fermat-prp (default), proth, pepin (default for Fermat numbers), "
                   "lucas-lehmer, cofactor-prp (with --known-factor), delay (with --modulus)")
    p.add_argument("--known-factor", action="append", metavar="F",
                   help="a known factor of 2^p-1 (repeatable): test the cofactor N/F (Suyama)")
    p.add_argument("--modulus", metavar="N", help="a generic odd modulus (decimal or 0x-hex) for "
                   "the delay computation x^(2^T) mod N")
    p.add_argument("--squarings", type=int, metavar="T", help="T for --modulus")
    p.add_argument("--key", help="sign with this Ed25519 private key")
    p.add_argument("--passphrase-env", metavar="VAR", help="the key's passphrase is in $VAR")
    p.add_argument("--base", help="the base a (default 3; Lucas-Lehmer uses 4; 'auto' for Proth "
                   "finds one with Jacobi(a/N) = -1, which is also the Proth default)")
    p.add_argument("--depth", type=_depth, default=8,
                   help="proof depth: the verifier does about 1/2^depth of the work (default 8); "
                   "'auto' takes the depth 'chainproof plan' recommends")
    p.add_argument("--checkpoint-every", type=float, default=60.0, metavar="SECONDS",
                   help="write run state at most this often (default 60)")
    p.set_defaults(func=cmd_prove)

    p = add("check", "verify a certificate (exit 0 verified, 1 rejected, 2 usage/IO error)")
    p.add_argument("certificate")
    p.add_argument("--trusted-key", action="append", metavar="KEY.pub",
                   help="accept only signatures by this key (repeatable)")
    p.add_argument("--accept-unsigned", action="store_true",
                   help="UNSAFE: also accept certificates without a signature")
    p.add_argument("--min-depth", type=int, default=1, help="reject proofs shallower than this")
    p.add_argument("--max-squarings", type=int, default=VerificationPolicy.max_verifier_squarings,
                   metavar="N", help="reject certificates that would make this verifier do more than "
                   "N squarings for the head and final segment (default 2^25)")
    p.set_defaults(func=cmd_check)

    p = add("assemble", "build a certificate from a spool folder written by another program "
            "(exit 0 written, 1 spool rejected, 2 usage/IO error)")
    p.add_argument("spool", help="the spool folder (manifest.json + step-<k>.res files)")
    p.add_argument("-o", "--output", required=True, help="certificate file to write")
    p.add_argument("--key", help="sign with this Ed25519 private key")
    p.add_argument("--passphrase-env", metavar="VAR", help="the key's passphrase is in $VAR")
    p.set_defaults(func=cmd_assemble)

    p = add("plan", "compare proof depths: disk, certificate size, prover and verifier cost")
    p.add_argument("number", help=f"the number: {NUMBER_SYNTAX}")
    p.add_argument("--test", choices=sorted(set(METHODS) - {"delay"}), help="default: the number's usual test")
    p.add_argument("--max-disk", metavar="SIZE", help="spool disk budget, e.g. 20GB or 500MiB")
    p.add_argument("--plot", metavar="FILE.png", help="also draw verify cost and disk against depth")
    p.set_defaults(func=cmd_plan)

    p = add("inspect", "show what a certificate claims, without verifying it")
    p.add_argument("certificate")
    p.set_defaults(func=cmd_inspect)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        code: int = args.func(args)
        return code
    except (UsageError, StorageError) as exc:
        _error(args, str(exc))
        return EXIT_USAGE
    except RunFailed as exc:
        _error(args, str(exc))
        return EXIT_REJECTED
    except KeyboardInterrupt:
        _error(args, "interrupted; run the same command again to resume")
        return 130
    except BrokenPipeError:  # e.g. `chainproof check X | head`: the reader left, not an error of ours
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return EXIT_OK


def _error(args: argparse.Namespace, message: str) -> None:
    if getattr(args, "json", False):
        print(json.dumps({"error": message}))
    print(f"chainproof: error: {message}", file=sys.stderr)


if __name__ == "__main__":
    sys.exit(main())

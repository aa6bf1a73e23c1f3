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
from .methods import METHODS, PRP_CAUTION, Method, Proth, default_method, method
from .numbers import NUMBER_SYNTAX, Fermat, KTwoN, Mersenne, Modulus, parse_modulus, parse_number
from .signing import (
    fingerprint,
    generate_keypair,
    load_private_key,
    load_public_key,
    raw_public,
)
from .verify import VerificationPolicy, verify

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
    from rich.console import Console

    with Progress(*columns, transient=True, console=Console(stderr=True)) as bar:
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
    cert = decode_unverified(data)  # assemble has verified it already
    number = parse_modulus(cert.number) if cert.number.startswith("0x") else parse_number(cert.number)
    test = method(cert.test)
    v = test.verdict(number, cert.base, test.group(number).from_bytes(cert.final), ())
    result, residue64 = v.result, v.residue64
    signer = fingerprint(cert.signer) if cert.signer else None
    obj = {"assembled": True, "certificate": str(out), "certificate_bytes": len(data),
           "number": cert.number, "depth": cert.depth, "result": result, "residue64": residue64,
           "signer": signer, "test": test.name, "proved": v.proved, "caution": v.caution}
    _emit(args, obj, [
        f"{_short(cert.number)}: {result} ({test.title}, base {cert.base}), residue64 {residue64}",
        f"  certificate  {out} ({len(data):,} bytes, depth {cert.depth}, "
        f"{'signed ' + signer if signer else 'UNSIGNED'})",
        v.caution,
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
            obj["subject"], obj["caution"] = v.subject, v.caution
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
        f"  number      {_short(cert.number)}   test {cert.test}, base {cert.base}",
        f"  claim       {claim}, residue64 {obj.get('claimed_residue64', '?')}",
        f"  proof       depth {cert.depth}, {cert.squarings:,} squarings, "
        f"{len(cert.checkpoints)} checkpoint hashes",
        f"  signer      {obj['signer'] or 'none (unsigned)'}",
        f"  size        {len(data):,} bytes",
        obj.get("caution", PRP_CAUTION),
    ])
    return EXIT_OK


# -- coordinator operations ------------------------------------------------------------------------
def _open_ledger(spec: str | None) -> Any:
    if not spec:
        return None
    from .ledger import Ledger

    return Ledger(spec, version=__version__)


def cmd_audit(args: argparse.Namespace) -> int:
    from .audit import AuditSettings, run_audit
    from .ledger import Outcome

    settings = AuditSettings(_policy(args), args.timeout)
    ledger_error: list[str] = []
    try:
        ledger = _open_ledger(args.ledger)
    except StorageError as exc:  # audit anyway; report, and exit 2 at the end
        ledger, ledger_error = None, [str(exc)]
        print(f"chainproof: error: {exc}; auditing without recording", file=sys.stderr)
    report = _Report(args.report) if args.report else None
    counts: dict[str, int] = {}
    show_bar = not args.json and sys.stderr.isatty()

    def record(o: Outcome, done: int, total: int) -> None:
        counts[o.outcome] = counts.get(o.outcome, 0) + 1
        if ledger is not None and not ledger_error:
            try:
                ledger.record(o)
            except StorageError as exc:  # keep auditing; nothing is claimed that was not checked
                ledger_error.append(str(exc))
                print(f"chainproof: error: {exc}; results are no longer recorded", file=sys.stderr)
        if report is not None:
            report.write(o)
        if args.json:
            print(json.dumps({"event": "certificate", **o.as_dict()}, sort_keys=True))
        else:
            detail = f"{o.number}: {o.result}" if o.outcome == "verified" else (o.reason or "")
            print(f"{o.outcome.upper():<9} {o.path}  {detail}", flush=True)  # rich keeps the bar below
        if bar_update is not None:
            bar_update(done, total)

    bar_update: Any = None
    try:
        with _progress_bar(show_bar, "audit") as bar:
            bar_update = bar
            outcomes = run_audit(args.paths, settings, jobs=args.jobs, dask_address=args.dask,
                                 on_outcome=record)
    except FileNotFoundError as exc:
        raise UsageError(f"no such file or folder: {exc}") from None
    except KeyboardInterrupt:
        _error(args, "interrupted; the ledger holds every result finished so far")
        return 130
    finally:
        if report is not None:
            report.close()
    if not outcomes:
        raise UsageError("no certificates found")
    conflicts = ledger.conflicts() if ledger is not None and not ledger_error else []
    summary = {"event": "summary", "certificates": len(outcomes), **counts,
               "conflicts": [[a["path"], b["path"]] for a, b in conflicts]}
    if args.json:
        print(json.dumps(summary, sort_keys=True))
    else:
        print(f"{len(outcomes)} certificates: " + ", ".join(f"{v} {k}" for k, v in sorted(counts.items())))
        for a, b in conflicts:
            print(f"CONFLICT  {a['number']} ({a['test']}, base {a['base']}): {a['path']} and {b['path']} "
                  "are both verified but disagree on the final residue; run 'chainproof compare' on them")
    if ledger_error:
        return EXIT_USAGE
    return EXIT_OK if counts.get("verified", 0) == len(outcomes) else EXIT_REJECTED


class _Report:
    """--report FILE: JSON lines (.jsonl) or CSV (.csv), one row per certificate."""

    FIELDS = ("path", "outcome", "reason", "number", "test", "base", "result", "proved", "residue64",
              "signer", "depth", "seconds", "squarings", "certificate_sha256")

    def __init__(self, path: str) -> None:
        import csv

        self.csv = path.endswith(".csv")
        if not (self.csv or path.endswith(".jsonl")):
            raise UsageError("--report must end in .jsonl or .csv")
        try:
            self.fh = open(path, "w", newline="")  # noqa: SIM115 closed in close()
        except OSError as exc:
            raise UsageError(f"cannot write {path}: {exc.strerror}") from None
        self.writer = csv.DictWriter(self.fh, self.FIELDS, extrasaction="ignore") if self.csv else None
        if self.writer is not None:
            self.writer.writeheader()

    def write(self, o: Any) -> None:
        row = o.as_dict()
        if self.writer is not None:
            self.writer.writerow(row)
        else:
            self.fh.write(json.dumps(row, sort_keys=True) + "\n")
        self.fh.flush()

    def close(self) -> None:
        self.fh.close()


def cmd_ledger(args: argparse.Namespace) -> int:
    from .ledger import export_rows

    ledger = _open_ledger(args.ledger)
    rows = list(export_rows(ledger.rows()))
    conflicts = ledger.conflicts()
    if args.action == "export":
        if args.format == "csv":
            import csv

            fields = sorted({k for r in rows for k in r}) if rows else ["certificate_sha256"]
            w = csv.DictWriter(sys.stdout, fields)
            w.writeheader()
            w.writerows(rows)
        else:
            for r in rows:
                print(json.dumps(r, sort_keys=True))
        return EXIT_OK
    conflict_pairs = [[a["path"], b["path"]] for a, b in conflicts]
    lines = [f"{'outcome':<9} {'number':<22} {'test':<13} {'result':<15} {'residue64':<16}  path"]
    for r in rows:
        lines.append(f"{r['outcome']:<9} {_short(str(r['number'] or '-')):<22} {str(r['test'] or '-'):<13} "
                     f"{str(r['result'] or '-'):<15} {str(r['residue64'] or '-'):<16}  {r['path']}")
    lines.append(f"{len(rows)} certificates, {len(conflicts)} conflicts")
    for a, b in conflicts:
        lines.append(f"CONFLICT  {a['number']}: {a['path']} vs {b['path']}")
    _emit(args, {"certificates": rows, "conflicts": conflict_pairs}, lines)
    return EXIT_OK


def cmd_compare(args: argparse.Namespace) -> int:
    from .ledger import compare_checkpoints

    certs = []
    for name in (args.first, args.second):
        path = Path(name)
        try:
            certs.append(decode_unverified(_read_certificate(path, VerificationPolicy().max_certificate_bytes)))
        except Rejected as exc:
            raise UsageError(f"{path}: {exc.reason}") from None
    a, b = certs
    same = (a.number, a.test, a.base, a.squarings, a.known_factors) == (b.number, b.test, b.base, b.squarings,
                                                                         b.known_factors)
    if not same:
        raise UsageError("the certificates make claims about different tests; nothing to compare")
    if a.depth != b.depth:
        raise UsageError(f"depths differ ({a.depth} vs {b.depth}): their checkpoints fall on different "
                         "steps; compare certificates of equal depth")
    d = compare_checkpoints(a.checkpoints, b.checkpoints, a.squarings, a.depth)
    obj = {"number": a.number, "test": a.test, "depth": a.depth, "agree_up_to": d.agree_up_to,
           "first_difference": d.first_difference, "step_agreed": d.step_agreed,
           "step_differs": d.step_differs, "segment_squarings": d.segment}
    if d.first_difference is None:
        lines = [f"{a.number}: all {len(a.checkpoints)} checkpoints agree"]
    else:
        start = "the start (computable by anyone)" if d.agree_up_to == 0 else \
            f"checkpoint {d.agree_up_to} (step {d.step_agreed:,}), whose residue both runs share"
        lines = [
            f"{a.number}: the runs agree up to {start}",
            f"  they part at checkpoint {d.first_difference} (step {d.step_differs:,})",
            f"  re-running those {d.segment:,} squarings (1/{1 << a.depth} of the run) from the shared "
            "residue settles which run went wrong",
        ]
    _emit(args, obj, lines)
    return EXIT_OK if d.first_difference is None else EXIT_REJECTED


def cmd_offload(args: argparse.Namespace) -> int:
    import hashlib

    from .delegate import SecretStore, offload

    policy = _policy(args)
    path = Path(args.certificate)
    data = _read_certificate(path, policy.max_certificate_bytes)
    try:
        off = offload(decode_unverified(data, max_bytes=policy.max_certificate_bytes),
                      hashlib.sha256(data).hexdigest(), str(path), policy)
    except Rejected as exc:
        _emit(args, {"offloaded": False, "reason": exc.reason}, [f"REJECTED  {path}: {exc.reason}"])
        return EXIT_REJECTED
    out = Path(args.output)
    if out.exists():
        raise UsageError(f"{out} already exists; choose another output name")
    secret = SecretStore(Path(args.secrets)).put(off.secret)
    out.write_text(json.dumps(off.task, indent=1) + "\n")
    _emit(args, {"offloaded": True, "task": str(out), "task_id": off.task["task_id"],
                 "squarings": off.task["squarings"], "secret": str(secret)},
          [f"task {off.task['task_id']} written to {out}: {off.task['squarings']:,} squarings for a helper",
           f"  keep {secret} private; settle the helper's answer with 'chainproof settle'"])
    return EXIT_OK


def _read_text(name: str) -> str:
    try:
        return Path(name).read_text()
    except OSError as exc:
        raise UsageError(f"cannot read {name}: {exc.strerror}") from None


def cmd_work(args: argparse.Namespace) -> int:
    from .delegate import work

    text = _read_text(args.task)
    show_bar = not args.json and sys.stderr.isatty()
    try:
        total = int(json.loads(text).get("squarings", 0))
    except (ValueError, AttributeError, TypeError):
        total = 0
    with _progress_bar(show_bar, "work") as bar:
        answer, stats = work(text, progress=(lambda step: bar(step, total)) if bar else None)
    out = Path(args.output)
    out.write_text(json.dumps(answer, indent=1) + "\n")
    _emit(args, {"answer": str(out), "task_id": answer["task_id"], "squarings": stats.squarings,
                 "gerbicz_checks": stats.checks, "errors_recovered": stats.recoveries},
          [f"answer for task {answer['task_id']} written to {out} ({stats.squarings:,} squarings, "
           f"{stats.checks} Gerbicz checks)"])
    return EXIT_OK


def cmd_settle(args: argparse.Namespace) -> int:
    from .delegate import SecretStore, settle

    outcome = settle(_read_text(args.answer), SecretStore(Path(args.secrets)))
    ledger = _open_ledger(args.ledger)
    if ledger is not None:
        ledger.record(outcome)
    if outcome.outcome == "verified":
        _emit(args, {"verified": True, **outcome.as_dict()},
              [f"VERIFIED  {outcome.path}: {outcome.number}: {outcome.result} (final segment checked by a "
               "helper, blinded)"])
        return EXIT_OK
    _emit(args, {"verified": False, **outcome.as_dict()}, [f"REJECTED  {outcome.path}: {outcome.reason}"])
    return EXIT_REJECTED


# -- parser -------------------------------------------------------------------------------------
def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="chainproof",
        description="Certified primality-test runs: run a test under a Gerbicz check, emit a "
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

    def policy_options(p: argparse.ArgumentParser) -> None:
        p.add_argument("--trusted-key", action="append", metavar="KEY.pub",
                       help="accept only signatures by this key (repeatable)")
        p.add_argument("--accept-unsigned", action="store_true",
                       help="UNSAFE: also accept certificates without a signature")
        p.add_argument("--min-depth", type=int, default=1, help="reject proofs shallower than this")
        p.add_argument("--max-squarings", type=int, default=VerificationPolicy.max_verifier_squarings,
                       metavar="N", help="reject certificates that would make this verifier do more than "
                       "N squarings for the head and final segment (default 2^25)")

    p = add("check", "verify a certificate (exit 0 verified, 1 rejected, 2 usage/IO error)")
    p.add_argument("certificate")
    policy_options(p)
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

    p = add("audit", "verify every certificate under the given files and folders, in parallel "
            "(exit 0 all verified, 1 some not, 2 usage/IO error)")
    p.add_argument("paths", nargs="+", help="certificate files, or folders searched for *.cpc")
    p.add_argument("--jobs", type=int, default=0, help="local worker processes (default: one per core)")
    p.add_argument("--dask", metavar="tcp://HOST:PORT", help="run on this Dask distributed scheduler")
    p.add_argument("--ledger", metavar="URL|FILE", help="record outcomes (SQLite file or SQLAlchemy URL)")
    p.add_argument("--report", metavar="OUT.jsonl|OUT.csv", help="also write one row per certificate")
    p.add_argument("--timeout", type=float, metavar="SECONDS", help="time limit per certificate")
    policy_options(p)
    p.set_defaults(func=cmd_audit)

    p = add("ledger", "show or export the verification ledger")
    p.add_argument("action", choices=["show", "export"])
    p.add_argument("--ledger", required=True, metavar="URL|FILE")
    p.add_argument("--format", choices=["jsonl", "csv"], default="jsonl", help="for export")
    p.set_defaults(func=cmd_ledger)

    p = add("compare", "name the first checkpoint where two certificates of the same claim part "
            "(exit 0 identical, 1 they differ, 2 usage/IO error)")
    p.add_argument("first")
    p.add_argument("second")
    p.set_defaults(func=cmd_compare)

    p = add("offload", "check a certificate except its final segment, and write a blinded task for "
            "an untrusted helper")
    p.add_argument("certificate")
    p.add_argument("-o", "--output", required=True, help="task file to write (give it to the helper)")
    p.add_argument("--secrets", default=".chainproof-secrets", help="private folder for task secrets")
    policy_options(p)
    p.set_defaults(func=cmd_offload)

    p = add("work", "(helper) compute a task's squarings under the Gerbicz check and write the answer")
    p.add_argument("task")
    p.add_argument("-o", "--output", required=True)
    p.set_defaults(func=cmd_work)

    p = add("settle", "compare a helper's answer with the kept secret: exit 0 verified, 1 rejected")
    p.add_argument("answer")
    p.add_argument("--secrets", default=".chainproof-secrets")
    p.add_argument("--ledger", metavar="URL|FILE", help="record the outcome")
    p.set_defaults(func=cmd_settle)

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

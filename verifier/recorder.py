"""Certificates for squaring runs done by other software: the spool folder and the Recorder.

A host program that squares base^(2^i) mod N in its own code hands chainproof the residues at the
steps a proof needs. They go into a *spool folder* (normative layout: spec/spool.md), written
either by :class:`Recorder` from Python or directly by a program in any language, and
:func:`assemble` turns a complete folder into a certificate::

    SPOOL/manifest.json      {"format": "chainproof-spool", "version": 1, "number": "2^p-1",
                              "test": "fermat-prp", "base": 3, "squarings": T, "depth": d,
                              "byte_order": "little", "residue_bytes": n}
    SPOOL/step-<k>.res       the element x_k = x_0^(2^k) (n bytes, that byte order; a torus element
                             a + b sqrt 3 as a then b) || SHA-256 of those n bytes

x_0 is the test's chain start (methods.py: base^k for k*2^n+-1, 2 + sqrt 3 for Lucas-Lehmer, ...).
The wanted steps are k = h + j*s for j = 1..2^d, with h = T mod 2^d and s = T div 2^d; the last is
k = T, the final element. Nothing in a spool is trusted: every file is checked, and the certificate
is verified before it is written, so a spool can never yield a certificate that claims more than
was computed.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from gmpy2 import mpz

from .certify import SelfCheckFailed, build_certificate
from .codec import MAX_DEPTH
from .engine import atomic_write
from .errors import StorageError, UsageError
from .methods import Method, method
from .numbers import Modulus, parse_modulus, parse_number

SPOOL_FORMAT = "chainproof-spool"
SPOOL_VERSION = 1
MANIFEST = "manifest.json"
DIGEST = 32
_STEP_FILE = re.compile(r"^step-(0|[1-9][0-9]*)\.res$")


class SpoolError(UsageError):
    """A spool folder or a fed residue is not acceptable. The message names the file or step."""


@dataclass(frozen=True)
class SpoolPlan:
    """What a spool holds: the manifest's content, validated."""

    number: Modulus
    base: int
    squarings: int
    depth: int
    byte_order: str = "little"
    test: str = "fermat-prp"

    def __post_init__(self) -> None:
        num = self.number
        if self.test == "cofactor-prp":
            raise SpoolError("manifest: write a fermat-prp spool; the cofactor test reuses its "
                             "certificate's run (prove --known-factor)")
        try:
            m = method(self.test)
            m.check(num, self.base, (), self.squarings)
            needed = m.squarings(num, self.squarings)
        except UsageError as exc:
            raise SpoolError(f"manifest: {exc}") from None
        if self.squarings != needed:
            raise SpoolError(f"manifest: squarings {self.squarings}, but {self.test} of {num.text} "
                             f"needs {needed}")
        if not 1 <= self.depth <= MAX_DEPTH or (1 << self.depth) > self.squarings:
            raise SpoolError(f"manifest: depth {self.depth} impossible for {self.squarings} squarings")
        if self.byte_order not in ("little", "big"):
            raise SpoolError(f"manifest: byte_order must be 'little' or 'big', not {self.byte_order!r}")

    @property
    def method(self) -> Method:
        return method(self.test)

    @property
    def group(self) -> Any:
        return self.method.group(self.number)

    def start(self) -> Any:
        """x_h: the chain start squared h = T mod 2^d times (the residue before capture 1)."""
        return self.group.square_n(self.method.start(self.number, self.base), self.squarings % self.count)

    def encode(self, x: Any) -> bytes:
        """An element in the spool's byte order (a torus element as a then b)."""
        parts = x if isinstance(x, tuple) else (x,)
        width = self.number.nbytes
        return b"".join(int(v).to_bytes(width, self.byte_order) for v in parts)  # type: ignore[arg-type]

    def decode(self, data: bytes) -> Any:
        width = self.number.nbytes
        vals = [mpz(int.from_bytes(data[i:i + width], self.byte_order))  # type: ignore[arg-type]
                for i in range(0, len(data), width)]
        return vals[0] if len(vals) == 1 else tuple(vals)

    @property
    def count(self) -> int:
        return 1 << self.depth

    def step(self, j: int) -> int:
        """Step of capture j (1-based)."""
        return self.squarings % self.count + j * (self.squarings >> self.depth)

    def steps(self) -> Iterator[int]:
        return (self.step(j) for j in range(1, self.count + 1))

    def manifest(self) -> dict[str, Any]:
        return {
            "format": SPOOL_FORMAT,
            "version": SPOOL_VERSION,
            "number": self.number.text,
            "test": self.test,
            "base": self.base,
            "squarings": self.squarings,
            "depth": self.depth,
            "byte_order": self.byte_order,
            "residue_bytes": self.group.element_bytes,
        }

    @classmethod
    def from_manifest(cls, obj: Any) -> SpoolPlan:
        if not isinstance(obj, dict) or obj.get("format") != SPOOL_FORMAT:
            raise SpoolError(f"manifest: not a {SPOOL_FORMAT} manifest")
        if obj.get("version") != SPOOL_VERSION:
            raise SpoolError(f"manifest: unknown version {obj.get('version')!r}")
        expected = {"format", "version", "number", "test", "base", "squarings", "depth", "byte_order",
                    "residue_bytes"}
        if set(obj) != expected:
            raise SpoolError(f"manifest: fields must be exactly {sorted(expected)}")
        for key in ("base", "squarings", "depth", "residue_bytes"):
            if type(obj[key]) is not int:
                raise SpoolError(f"manifest: {key} must be an integer")
        if type(obj["number"]) is not str or type(obj["test"]) is not str:
            raise SpoolError("manifest: number and test must be strings")
        try:
            number = parse_modulus(obj["number"]) if obj["number"].startswith("0x") else parse_number(obj["number"])
        except UsageError as exc:
            raise SpoolError(f"manifest: {exc}") from None
        if number.text != obj["number"]:
            raise SpoolError(f"manifest: number not in canonical spelling (expected {number.text!r})")
        plan = cls(number, obj["base"], obj["squarings"], obj["depth"], obj["byte_order"], obj["test"])
        if obj["residue_bytes"] != plan.group.element_bytes:
            raise SpoolError(f"manifest: residue_bytes {obj['residue_bytes']} but {obj['test']} of "
                             f"{number.text} needs {plan.group.element_bytes}")
        return plan


def step_file(folder: Path, step: int) -> Path:
    return folder / f"step-{step}.res"


def encode_residue(plan: SpoolPlan, x: Any) -> bytes:
    data = plan.encode(x)
    return data + hashlib.sha256(data).digest()


class SpoolFolder:
    """Read access to a spool folder, validating everything it returns."""

    def __init__(self, folder: Path) -> None:
        self.folder = folder
        path = folder / MANIFEST
        try:
            obj = json.loads(path.read_text())
        except FileNotFoundError:
            raise SpoolError(f"{path}: missing (not a spool folder?)") from None
        except (OSError, ValueError) as exc:
            raise SpoolError(f"{path}: unreadable ({exc})") from None
        self.plan = SpoolPlan.from_manifest(obj)

    def present(self) -> int:
        """How many captures are on disk. They must be exactly the first k wanted steps; any other
        step file, a gap, or a stray file is an error naming it."""
        wanted = {step: j for j, step in enumerate(self.plan.steps(), start=1)}
        found: list[int] = []
        for entry in sorted(os.listdir(self.folder)):
            if entry == MANIFEST or entry.endswith(".tmp"):
                continue
            m = _STEP_FILE.match(entry)
            if not m:
                raise SpoolError(f"{self.folder / entry}: unexpected file in the spool folder")
            step = int(m.group(1))
            if step not in wanted:
                raise SpoolError(f"{self.folder / entry}: step {step} is not one the proof needs")
            found.append(wanted[step])
        found.sort()
        if found != list(range(1, len(found) + 1)):
            missing = next(j for j in range(1, self.plan.count + 1) if j not in found)
            raise SpoolError(f"{step_file(self.folder, self.plan.step(missing))}: missing (later steps "
                             "are present)")
        return len(found)

    def read(self, j: int) -> tuple[Any, bytes]:
        """Capture j as (element, SHA-256 of its canonical little-endian encoding)."""
        plan, group = self.plan, self.plan.group
        path = step_file(self.folder, plan.step(j))
        try:
            raw = path.read_bytes()
        except FileNotFoundError:
            raise SpoolError(f"{path}: missing") from None
        except OSError as exc:
            raise SpoolError(f"{path}: unreadable ({exc.strerror})") from None
        if len(raw) != group.element_bytes + DIGEST:
            raise SpoolError(f"{path}: {len(raw)} bytes, expected {group.element_bytes + DIGEST}")
        data, digest = raw[:-DIGEST], raw[-DIGEST:]
        if hashlib.sha256(data).digest() != digest:
            raise SpoolError(f"{path}: checksum mismatch")
        x = plan.decode(data)
        problem = group.check_element(x)
        if problem is not None:
            raise SpoolError(f"{path}: residue {problem}")
        return x, hashlib.sha256(group.to_bytes(x)).digest()


def assemble(folder: Path, out: Path, key: Ed25519PrivateKey | None = None) -> bytes:
    """Validate a complete spool folder and write its certificate to ``out`` (atomically).

    Raises SpoolError naming the offending file, or if the residues do not form the squaring chain
    the manifest claims (then nothing is written).
    """
    spool = SpoolFolder(folder)
    plan = spool.plan
    if spool.present() != plan.count:
        missing = step_file(folder, plan.step(spool.present() + 1))
        raise SpoolError(f"{missing}: missing; the spool is incomplete")
    digests = [spool.read(j)[1] for j in range(1, plan.count + 1)]
    final = spool.read(plan.count)[0]
    try:
        data = build_certificate(plan.method, plan.number, plan.base, plan.squarings, plan.depth, final,
                                 digests, lambda j: spool.read(j)[0], key)
    except SelfCheckFailed:
        raise SpoolError(
            f"{folder}: the residues do not form the squaring chain x_0^(2^k) that the "
            "manifest describes (wrong values, another number's spool, or a faulty host)"
        ) from None
    try:
        atomic_write(out, data)
    except OSError as exc:
        raise StorageError(f"cannot write {out}: {exc.strerror}") from None
    return data


class Recorder:
    """Collects the residues a certificate needs from a squaring loop run by the host program.

    Typical use::

        rec = Recorder.create(folder, parse_number("2^9941-1"), base=3, depth=8)
        x = 3
        for step in range(1, rec.plan.squarings + 1):
            x = x * x % N                      # the host's own arithmetic
            if step == rec.next_step:
                rec.feed(step, x)              # int, gmpy2.mpz or bytes
        rec.finish(Path("m9941.cpc"), key=None)

    The recorder keeps O(1) residues in memory; captures go to the spool folder, each written
    atomically with its checksum. After a crash of the host, ``Recorder.open(folder)`` continues
    where the folder ends (``next_step`` says which step to feed next; ``resume_point()`` gives the
    residue to restart the host loop from).

    ``check_every=k`` (k >= 1) makes the recorder distrust the host: a Gerbicz check over the fed
    residues every k captures (and at the end) costs s = T div 2^depth squarings each, so
    2^depth / k checks add T/k squarings in all (k = 2^depth: one check, 1/2^depth of the run).
    A failed check removes the captures it covered back to the last good one and raises SpoolError;
    the host resumes from ``resume_point()``.
    """

    def __init__(self, spool: SpoolFolder, fed: int, check_every: int) -> None:
        if check_every < 0:
            raise UsageError("check_every must be >= 0")
        self.spool, self.plan, self.check_every = spool, spool.plan, check_every
        self.fed = fed
        num = self.group = self.plan.group
        self._start = self.plan.start()
        self._d = self._start  # running product u_0 * u_1 * ... * u_fed
        for j in range(1, fed + 1):
            self._d = num.mul(self._d, spool.read(j)[0])
        # captures already on disk count as good until the next check, which covers the whole chain
        self._verified = fed

    # -- construction ---------------------------------------------------------------------------
    @classmethod
    def create(cls, folder: Path, number: Modulus, *, base: int | None = None, depth: int = 8,
               check_every: int = 0, byte_order: str = "little", test: str = "fermat-prp",
               squarings: int | None = None) -> Recorder:
        """Start a new spool in ``folder`` (created if needed; must not hold another spool).
        ``base`` defaults to the test's usual one; ``squarings`` is only for the delay test."""
        m = method(test)
        plan = SpoolPlan(number, m.default_base if base is None else base,
                         squarings if squarings is not None else m.squarings(number), depth, byte_order, test)
        folder.mkdir(parents=True, exist_ok=True)
        manifest = folder / MANIFEST
        if manifest.exists():
            existing = SpoolFolder(folder).plan
            if existing != plan:
                raise SpoolError(f"{manifest}: the folder holds a spool of another run "
                                 f"({existing.number.text}, base {existing.base}, depth {existing.depth})")
        else:
            if any(folder.iterdir()):
                raise SpoolError(f"{folder}: not empty and not a spool folder")
            atomic_write(manifest, (json.dumps(plan.manifest(), indent=1) + "\n").encode())
        return cls.open(folder, check_every=check_every)

    @classmethod
    def open(cls, folder: Path, *, check_every: int = 0) -> Recorder:
        """Reopen a spool folder (after a restart of the host) and continue."""
        spool = SpoolFolder(folder)
        for entry in folder.iterdir():
            if entry.name.endswith(".tmp"):
                entry.unlink()
        return cls(spool, spool.present(), check_every)

    # -- feeding --------------------------------------------------------------------------------
    @property
    def next_step(self) -> int | None:
        """The step whose residue is wanted next, or None when every capture is in."""
        return self.plan.step(self.fed + 1) if self.fed < self.plan.count else None

    @property
    def wanted_steps(self) -> list[int]:
        """Every step still wanted, in order."""
        return [self.plan.step(j) for j in range(self.fed + 1, self.plan.count + 1)]

    def resume_point(self) -> tuple[int, Any]:
        """(step, element) to restart the host loop from: the last capture on disk (step h with
        x_0^(2^h) if there is none)."""
        if self.fed == 0:
            return self.plan.squarings % self.plan.count, self._start
        return self.plan.step(self.fed), self.spool.read(self.fed)[0]

    def _coerce(self, step: int, residue: Any) -> Any:
        """bytes (the spool's encoding), or int / gmpy2.mpz, or for the torus a pair of them."""
        num, group = self.plan.number, self.group
        if isinstance(residue, bytes | bytearray):
            if len(residue) != group.element_bytes:
                raise SpoolError(f"step {step}: residue of {len(residue)} bytes, expected "
                                 f"{group.element_bytes}")
            return self.plan.decode(bytes(residue))
        parts = residue if isinstance(residue, tuple) else (residue,)
        if len(parts) != group.element_bytes // num.nbytes:
            raise SpoolError(f"step {step}: expected {group.element_bytes // num.nbytes} coordinate(s)")
        out = []
        for v in parts:
            if isinstance(v, bool) or not isinstance(v, int | type(mpz(0))):
                raise SpoolError(f"step {step}: residue must be int, gmpy2.mpz or bytes, not "
                                 f"{type(v).__name__}")
            if v < 0:
                raise SpoolError(f"step {step}: negative residue")
            if v >= num.N:
                raise SpoolError(f"step {step}: residue not reduced (>= N)")
            out.append(mpz(v))
        return out[0] if len(out) == 1 else tuple(out)

    def feed(self, step: int, residue: Any) -> None:
        """Accept the element x_0^(2^step) for the step ``next_step`` names (int, gmpy2.mpz or
        bytes; for the Lucas-Lehmer torus a pair (a, b) or 2*nbytes bytes).

        Raises SpoolError for a step not asked for or out of order, a malformed or out-of-range
        residue, or (with ``check_every``) residues inconsistent with the earlier ones.
        """
        want = self.next_step
        if want is None:
            raise SpoolError(f"step {step}: every capture is already in; call finish()")
        if step != want:
            raise SpoolError(f"step {step} was not asked for: the next wanted step is {want}")
        x = self._coerce(step, residue)
        num = self.group
        problem = num.check_element(x)
        if problem is not None:
            raise SpoolError(f"step {step}: residue {problem}")
        path = step_file(self.spool.folder, step)
        try:
            atomic_write(path, encode_residue(self.plan, x))
        except OSError as exc:
            raise StorageError(f"cannot write {path}: {exc.strerror}; the spool is intact up to "
                               f"step {self.resume_point()[0]}") from None
        d_prev, self._d = self._d, num.mul(self._d, x)
        self.fed += 1
        if self.check_every and (self.fed % self.check_every == 0 or self.fed == self.plan.count):
            self._check(d_prev)

    def _check(self, d_prev: Any) -> None:
        num, s = self.group, self.plan.squarings >> self.plan.depth
        if num.mul(self._start, num.square_n(d_prev, s)) == self._d:
            self._verified = self.fed
            return
        bad_from = self.plan.step(self._verified + 1)
        for j in range(self._verified + 1, self.fed + 1):
            step_file(self.spool.folder, self.plan.step(j)).unlink(missing_ok=True)
        self.fed = self._verified
        self._d = self._start
        for j in range(1, self.fed + 1):
            self._d = num.mul(self._d, self.spool.read(j)[0])
        raise SpoolError(
            f"the residues fed from step {bad_from} on are not consistent with the earlier ones "
            f"(Gerbicz check failed); they were discarded: resume the host from step "
            f"{self.resume_point()[0]}"
        )

    def finish(self, out: Path, key: Ed25519PrivateKey | None = None) -> bytes:
        """Build, verify and write the certificate once every capture is in."""
        if self.next_step is not None:
            raise SpoolError(f"the spool is incomplete: step {self.next_step} is still wanted")
        return assemble(self.spool.folder, out, key)

"""The verification ledger: what a coordinator has checked, in SQLite or any SQLAlchemy database.

One row per certificate (keyed by the SHA-256 of its bytes): re-auditing the same file updates
that row instead of adding one. Each outcome is written in its own transaction, so an interrupted
audit leaves every finished row and nothing half-written. Only outcomes produced by
:func:`verifier.verify.verify` are ever recorded as "verified".

A *conflict* is two verified certificates for the same number, test, base (and known factors)
whose final residues differ: one of the two runs is wrong, although each proof checked out (see
spec/threat-model.md for how that can happen). :func:`compare_checkpoints` names the first
checkpoint where two certificates part.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from sqlalchemy import (
    Boolean,
    Column,
    DateTime,
    Float,
    Integer,
    LargeBinary,
    MetaData,
    String,
    Table,
    Text,
    create_engine,
    select,
)
from sqlalchemy.engine import Engine
from sqlalchemy.exc import SQLAlchemyError

from .errors import StorageError

metadata = MetaData()

verifications = Table(
    "chainproof_verifications",
    metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    Column("certificate_sha256", String(64), nullable=False, unique=True),
    Column("path", Text, nullable=False),
    Column("number", Text),
    Column("test", String(32)),
    Column("base", String(20)),
    Column("known_factors", Text),
    Column("result", String(32)),
    Column("proved", Boolean),
    Column("residue64", String(16)),
    Column("final_sha256", String(64)),
    Column("signer", String(64)),
    Column("depth", Integer),
    Column("checkpoints", LargeBinary),
    Column("outcome", String(16), nullable=False),  # verified | rejected | crashed | timeout
    Column("reason", Text),
    Column("verifier_version", String(32), nullable=False),
    Column("seconds", Float),
    Column("squarings", Integer),
    Column("first_seen", DateTime, nullable=False),
    Column("last_checked", DateTime, nullable=False),
    Column("verified_at", DateTime),
)

OUTCOMES = ("verified", "rejected", "crashed", "timeout")


@dataclass(frozen=True)
class Outcome:
    """One audit result, as the ledger stores it."""

    certificate_sha256: str
    path: str
    outcome: str
    reason: str | None = None
    number: str | None = None
    test: str | None = None
    base: int | None = None
    known_factors: tuple[int, ...] = ()
    result: str | None = None
    proved: bool | None = None
    residue64: str | None = None
    final_sha256: str | None = None
    signer: str | None = None
    depth: int | None = None
    checkpoints: bytes | None = None
    seconds: float | None = None
    squarings: int | None = None

    def as_dict(self) -> dict[str, Any]:
        d = dict(self.__dict__)
        d["known_factors"] = [str(f) for f in self.known_factors]
        d.pop("checkpoints")
        return d


def _utcnow() -> dt.datetime:
    return dt.datetime.now(dt.UTC).replace(tzinfo=None)


def ledger_url(spec: str) -> str:
    """A bare path means an SQLite file; anything with '://' is an SQLAlchemy URL."""
    return spec if "://" in spec else f"sqlite:///{Path(spec).resolve()}"


class Ledger:
    """Open (and create if needed) the ledger at ``url``. Raises StorageError if it cannot be
    reached or written."""

    def __init__(self, url: str, *, version: str = "", timeout: float = 5.0) -> None:
        self.url = ledger_url(url)
        self.version = version
        args: dict[str, Any] = {}
        if self.url.startswith("sqlite"):
            args["connect_args"] = {"timeout": timeout}
        elif self.url.startswith("postgresql"):
            args["connect_args"] = {"connect_timeout": max(1, int(timeout))}
        try:
            self.engine: Engine = create_engine(self.url, **args)
            metadata.create_all(self.engine)
        except SQLAlchemyError as exc:
            raise StorageError(f"ledger {self._safe_url()} unavailable: {_brief(exc)}") from None

    def _safe_url(self) -> str:
        return self.engine.url.render_as_string(hide_password=True) if hasattr(self, "engine") else self.url

    def record(self, o: Outcome, *, now: dt.datetime | None = None) -> None:
        """Insert or update the row of this certificate, in one transaction."""
        if o.outcome not in OUTCOMES:
            raise ValueError(o.outcome)
        now = now or _utcnow()
        values = {
            "path": o.path, "number": o.number, "test": o.test,
            "base": None if o.base is None else str(o.base),
            "known_factors": ",".join(str(f) for f in o.known_factors) or None,
            "result": o.result, "proved": o.proved, "residue64": o.residue64,
            "final_sha256": o.final_sha256, "signer": o.signer, "depth": o.depth,
            "checkpoints": o.checkpoints, "outcome": o.outcome, "reason": o.reason,
            "verifier_version": self.version, "seconds": o.seconds, "squarings": o.squarings,
            "last_checked": now,
        }
        try:
            with self.engine.begin() as conn:
                row = conn.execute(select(verifications.c.id, verifications.c.verified_at).where(
                    verifications.c.certificate_sha256 == o.certificate_sha256)).first()
                if o.outcome == "verified":
                    values["verified_at"] = now if row is None or row.verified_at is None else row.verified_at
                else:
                    values["verified_at"] = None
                if row is None:
                    conn.execute(verifications.insert().values(
                        certificate_sha256=o.certificate_sha256, first_seen=now, **values))
                else:
                    conn.execute(verifications.update().where(verifications.c.id == row.id).values(**values))
        except SQLAlchemyError as exc:
            raise StorageError(f"ledger {self._safe_url()}: cannot record {o.path}: {_brief(exc)}") from None

    def rows(self) -> list[dict[str, Any]]:
        try:
            with self.engine.connect() as conn:
                result = conn.execute(select(verifications).order_by(verifications.c.id))
                return [dict(r._mapping) for r in result]
        except SQLAlchemyError as exc:
            raise StorageError(f"ledger {self._safe_url()}: {_brief(exc)}") from None

    def conflicts(self) -> list[tuple[dict[str, Any], dict[str, Any]]]:
        """Pairs of verified rows for the same claim (number, test, base, factors) that disagree on
        the final residue: each pair once, in ledger order."""
        groups: dict[tuple[Any, ...], list[dict[str, Any]]] = {}
        for r in self.rows():
            if r["outcome"] == "verified":
                groups.setdefault((r["number"], r["test"], r["base"], r["known_factors"]), []).append(r)
        out = []
        for rows in groups.values():
            for i, a in enumerate(rows):
                for b in rows[i + 1:]:
                    if a["final_sha256"] != b["final_sha256"]:
                        out.append((a, b))
        return out

    def close(self) -> None:
        self.engine.dispose()


def _brief(exc: BaseException) -> str:
    text = str(getattr(exc, "orig", None) or exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


def export_rows(rows: Sequence[dict[str, Any]]) -> Iterator[dict[str, Any]]:
    """Rows with JSON-friendly values (timestamps as ISO text, checkpoints as a count)."""
    for r in rows:
        d = dict(r)
        cps = d.pop("checkpoints", None)
        d["checkpoint_count"] = len(cps) // 32 if cps else 0
        for k, v in d.items():
            if isinstance(v, dt.datetime):
                d[k] = v.isoformat(timespec="seconds") + "Z"
        yield d


# -- comparing two runs -----------------------------------------------------------------------------
@dataclass(frozen=True)
class Divergence:
    """Where two certificates of the same claim part (checkpoints are 1-based, as in the spec)."""

    agree_up_to: int  # last checkpoint index both share (0: none, only the start)
    first_difference: int | None  # first differing checkpoint index, or None if all agree
    step_agreed: int  # the chain step of checkpoint ``agree_up_to`` (h if 0)
    step_differs: int | None
    segment: int  # squarings between the two, s = T div 2^depth


def compare_checkpoints(a: Sequence[bytes], b: Sequence[bytes], squarings: int, depth: int) -> Divergence:
    """Compare two checkpoint hash lists of the same claim and depth."""
    if len(a) != len(b) or len(a) != 1 << depth:
        raise ValueError("checkpoint lists of different lengths cannot be compared")
    h, s = squarings % (1 << depth), squarings >> depth
    for j, (x, y) in enumerate(zip(a, b, strict=True), start=1):
        if x != y:
            return Divergence(j - 1, j, h + (j - 1) * s, h + j * s, s)
    return Divergence(len(a), None, squarings, None, s)


"""Pietrzak's halving proof that y = x^(2^T), made non-interactive with Fiat-Shamir (SHA-256).

Notation as in the paper: a claim (x, y, T) is halved with mu = x^(2^(T/2)) and a challenge r:
    x' = x^r * mu,   y' = mu^r * y,   T' = T/2.
After ``depth`` halvings the verifier checks x^(2^T') = y directly.

Our statement: in a group (residues mod N, or the Lucas-Lehmer torus), x = x_0^(2^h) with
h = T mod 2^depth (the verifier squares this short head itself), y = the final element
x_0^(2^T), and the proof covers the remaining 2^depth * s squarings, s = T div 2^depth. The
prover's captured elements are u_j = x_0^(2^(h + j*s)), j = 1..2^depth.

Challenges: r_i = c_i + lam * h_i, where lam is the exponent of the subgroup of elements of known
order (2p for 2^p - 1, see numbers.py), c_i = 2^(T_i/2) mod lam, and h_i is CHALLENGE_BITS = 64 bits of a SHA-256
chain over the statement and mu_1..mu_i. With r_i = 2^(T_i/2) (mod lam), a claim off by a factor g
of known order stays off by exactly g through every halving (spec/protocol.md, section 5).
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

DOMAIN = b"chainproof/fiat-shamir/v1"
#: Hash entropy of each challenge on top of the fixed residue modulo lam (format version 1).
CHALLENGE_BITS = 64


def residue_digest(group: Any, x: Any) -> bytes:
    """SHA-256 of an element's fixed-width encoding (the checkpoint hash)."""
    return hashlib.sha256(group.to_bytes(x)).digest()


def _field(h: Any, data: bytes) -> None:
    h.update(len(data).to_bytes(8, "big"))
    h.update(data)


@dataclass(frozen=True)
class Statement:
    """What a certificate claims: x0^(2^squarings) = final in ``group``, with its proof shape.

    ``context`` holds the certificate's descriptive fields (number, test, base, known factors) as
    strings; they, the signer and everything else here are bound into the Fiat-Shamir seed.
    """

    group: Any
    x0: Any
    squarings: int
    depth: int
    final: Any
    checkpoint_digests: tuple[bytes, ...]
    signer: bytes = b""  # the signer's public key, or empty: binds the proof to the signer
    context: tuple[str, ...] = ()

    @property
    def head(self) -> int:
        """Squarings before the proven part (verifier does them): T mod 2^depth."""
        return self.squarings % (1 << self.depth)

    @property
    def segment(self) -> int:
        """Squarings between captured residues: T div 2^depth."""
        return self.squarings >> self.depth

    def start(self) -> Any:
        return self.group.square_n(self.x0, self.head)

    def seed(self) -> bytes:
        h = hashlib.sha256()
        _field(h, DOMAIN)
        _field(h, len(self.context).to_bytes(8, "big"))
        for item in self.context:
            _field(h, item.encode())
        for v in (self.squarings, self.depth):
            _field(h, v.to_bytes(8, "big"))
        _field(h, self.group.to_bytes(self.final))
        _field(h, hashlib.sha256(b"".join(self.checkpoint_digests)).digest())
        _field(h, self.signer)
        return h.digest()


class Challenges:
    """The Fiat-Shamir challenge sequence: feed mu_i, get r_i."""

    def __init__(self, st: Statement) -> None:
        self.st = st
        self.state = st.seed()
        self.level = 0

    def next(self, mu: Any) -> int:
        st = self.st
        self.level += 1
        h = hashlib.sha256()
        _field(h, self.state)
        _field(h, self.level.to_bytes(8, "big"))
        _field(h, st.group.to_bytes(mu))
        self.state = h.digest()
        entropy = int.from_bytes(self.state[: CHALLENGE_BITS // 8], "big")
        lam = st.group.known_order_exponent
        half = st.segment << (st.depth - self.level)  # T_i / 2
        return pow(2, half, lam) + lam * entropy


def prove(st: Statement, capture: Callable[[int], Any]) -> list[Any]:
    """Compute mu_1..mu_depth from captured residues ``capture(j)`` = u_j, 1 <= j < 2^depth.

    mu_i is a product of the u_j at odd multiples of 2^(depth-i), each raised to a product of
    earlier challenges. It is built as a binary tree, node = left^(r_k) * right, so level i costs
    2^(i-1) - 1 exponentiations by single challenges, and at most ``depth`` partial products are
    held at once. Each u_j is a leaf at exactly one level, so it is read once in all.
    """
    num, d = st.group, st.depth
    ch = Challenges(st)
    rs: list[int] = []
    mus: list[Any] = []

    def node(k: int, b: int, w: int, i: int) -> Any:
        if k == i:
            return capture(b + (1 << (d - i)))
        half = w >> 1
        left = node(k + 1, b, half, i)
        left = num.pow(left, rs[k - 1])
        return num.mul(left, node(k + 1, b + half, half, i))

    for i in range(1, d + 1):
        mu = node(1, 0, 1 << d, i)
        mus.append(mu)
        rs.append(ch.next(mu))
    return mus


def reduce_claim(st: Statement, mus: Sequence[Any]) -> tuple[Any, Any, int, int]:
    """The verifier's halvings: return (x, y, s, squarings) such that the certificate is sound
    iff x^(2^s) = y; ``squarings`` counts those done so far (the head and the exponentiations,
    2 * depth of them by (64 + log2(2p))-bit numbers)."""
    num = st.group
    ch = Challenges(st)
    x, y = st.start(), st.final
    squarings = st.head
    for mu in mus:
        r = ch.next(mu)
        x = num.mul(num.pow(x, r), mu)
        y = num.mul(num.pow(mu, r), y)
        squarings += 2 * (r.bit_length() - 1)
    return x, y, st.segment, squarings

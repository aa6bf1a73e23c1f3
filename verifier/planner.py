"""The depth planner: what each proof depth costs the worker, the disk and the verifier.

Costs are counted in squaring-equivalents of the modulus (a multiplication counts as
MULTIPLY_COST squarings, measured with gmpy2 at p = 86243) and turned into seconds with a
squaring time measured on this machine. The recommended depth is the one with the smallest
verifier cost among those whose spool fits the disk budget and whose proof building costs at
most 2% of the run.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from dataclasses import asdict, dataclass
from typing import Any

from .codec import MAX_DEPTH
from .methods import Method, default_method
from .numbers import Modulus

#: One multiplication modulo N in squarings (gmpy2: 133 us vs 107 us at p = 86243).
MULTIPLY_COST = 1.25
#: Default bound on proof building, as a fraction of the run.
MAX_PROVER_EXTRA = 0.02
DIGEST = 32


def _chain(number: Modulus, test: Method | None = None, squarings: int | None = None) -> tuple[Any, int]:
    m = test or default_method(number)
    return m.group(number), m.squarings(number, squarings)


def challenge_bits(number: Modulus, test: Method | None = None) -> int:
    """Bit length of a challenge r = c + lam*h with 64-bit h (lam = 2p for 2^p - 1)."""
    group, _ = _chain(number, test, 2)
    return 64 + int(group.known_order_exponent).bit_length()


def exponentiation_cost(number: Modulus, test: Method | None = None) -> float:
    """Sliding-window exponentiation by one challenge, in squaring-equivalents."""
    bits = challenge_bits(number, test)
    return (bits - 1) + (bits / 5 + 8) * MULTIPLY_COST


def verifier_squarings(number: Modulus, depth: int, test: Method | None = None,
                       squarings: int | None = None) -> float:
    """Head, halvings (two exponentiations and two multiplications per level), final segment and
    its Gerbicz check (about 2*sqrt(s))."""
    _, T = _chain(number, test, squarings)
    s = T >> depth
    halvings = depth * (2 * exponentiation_cost(number, test) + 2 * MULTIPLY_COST)
    return T % (1 << depth) + halvings + s + 2 * math.isqrt(s) * MULTIPLY_COST


def prover_extra_squarings(number: Modulus, depth: int, test: Method | None = None) -> float:
    """Building mu_1..mu_d: 2^d - d - 1 exponentiations and as many multiplications."""
    nodes = (1 << depth) - depth - 1
    return nodes * (exponentiation_cost(number, test) + MULTIPLY_COST)


def certificate_bytes(number: Modulus, depth: int, signed: bool = True, test: Method | None = None) -> int:
    """Certificate size: header, field names, final + depth residues, 2^d checkpoint hashes."""
    group, _ = _chain(number, test, 2)
    residue = group.element_bytes + 5  # msgpack bin header
    fixed = 9 + 110 + len(number.text)
    sig = 2 * 12 + 32 + 64 if signed else 0
    return fixed + (depth + 1) * residue + (1 << depth) * (DIGEST + 2) + sig


def spool_bytes(number: Modulus, depth: int, test: Method | None = None) -> int:
    group, _ = _chain(number, test, 2)
    return (1 << depth) * (group.element_bytes + DIGEST)


def measure_squaring_seconds(number: Modulus, budget: float = 0.2, test: Method | None = None,
                             clock: Callable[[], float] = time.perf_counter) -> float:
    """Time squarings of the test's chain start for about ``budget`` seconds (at least 3)."""
    m = test or default_method(number)
    group = m.group(number)
    x = group.square_n(m.start(number, m.default_base), 8)  # a full-size element
    n, t0 = 0, clock()
    while n < 3 or (clock() - t0 < budget and n < 4096):
        x = group.square_n(x, 1)
        n += 1
    return (clock() - t0) / n


@dataclass(frozen=True)
class DepthOption:
    depth: int
    spool_bytes: int
    certificate_bytes: int
    prover_extra_squarings: float
    prover_extra_fraction: float
    prover_extra_seconds: float
    verifier_squarings: float
    verify_seconds: float
    self_check_seconds: float  # the worker's own verification (= verify_seconds)
    fits_disk: bool
    within_prover_budget: bool
    recommended: bool = False

    def as_dict(self) -> dict[str, Any]:
        return asdict(self)


@dataclass(frozen=True)
class Plan:
    number: Modulus
    squarings: int
    squaring_seconds: float
    run_seconds: float
    max_disk: int | None
    max_prover_extra: float
    options: tuple[DepthOption, ...]

    @property
    def recommended(self) -> DepthOption:
        return next(o for o in self.options if o.recommended)

    def as_dict(self) -> dict[str, Any]:
        return {
            "number": self.number.text,
            "squarings": self.squarings,
            "squaring_seconds": self.squaring_seconds,
            "run_seconds": self.run_seconds,
            "max_disk": self.max_disk,
            "max_prover_extra": self.max_prover_extra,
            "recommended_depth": self.recommended.depth,
            "depths": [o.as_dict() for o in self.options],
        }


def plan(number: Modulus, *, max_disk: int | None = None, max_prover_extra: float = MAX_PROVER_EXTRA,
         squaring_seconds: float | None = None, test: Method | None = None,
         squarings: int | None = None) -> Plan:
    """Cost of every possible depth for a run of ``test`` (default: the number's usual test) on
    ``number``, with a recommendation.

    If no depth fits both budgets, the recommendation is the depth with the smallest
    worker-plus-verifier cost among those that fit the disk (depth 1 if none does).
    """
    t_sq = squaring_seconds if squaring_seconds is not None else measure_squaring_seconds(number, test=test)
    _, T = _chain(number, test, squarings)
    options = []
    for d in range(1, min(MAX_DEPTH, T.bit_length() - 1) + 1):
        extra = prover_extra_squarings(number, d, test)
        ver = verifier_squarings(number, d, test, squarings)
        disk = spool_bytes(number, d, test)
        options.append(DepthOption(
            depth=d, spool_bytes=disk, certificate_bytes=certificate_bytes(number, d, test=test),
            prover_extra_squarings=extra, prover_extra_fraction=extra / T,
            prover_extra_seconds=extra * t_sq, verifier_squarings=ver, verify_seconds=ver * t_sq,
            self_check_seconds=ver * t_sq,
            fits_disk=max_disk is None or disk <= max_disk,
            within_prover_budget=extra <= max_prover_extra * T,
        ))
    good = [o for o in options if o.fits_disk and o.within_prover_budget]
    if good:
        best = min(good, key=lambda o: (o.verifier_squarings, o.depth))
    else:
        fits = [o for o in options if o.fits_disk] or options[:1]
        best = min(fits, key=lambda o: (o.prover_extra_squarings + o.verifier_squarings, o.depth))
    options = [o if o is not best else DepthOption(**{**o.as_dict(), "recommended": True}) for o in options]
    return Plan(number, T, t_sq, T * t_sq, max_disk, max_prover_extra, tuple(options))


_UNITS = {"": 1, "B": 1, "K": 10**3, "KB": 10**3, "M": 10**6, "MB": 10**6, "G": 10**9, "GB": 10**9,
          "T": 10**12, "TB": 10**12, "KIB": 2**10, "MIB": 2**20, "GIB": 2**30, "TIB": 2**40}


def parse_size(text: str) -> int:
    """'20GB', '500MiB', '1e9' -> bytes. Raises ValueError."""
    t = text.strip().upper().replace(" ", "")
    num = t.rstrip("KMGTIB")
    unit = t[len(num):]
    if unit not in _UNITS or not num:
        raise ValueError(f"cannot read size {text!r} (examples: 20GB, 500MiB)")
    return int(float(num) * _UNITS[unit])


def plot(p: Plan, path: str) -> None:
    """Verify cost and spool disk against depth, as a PNG (needs matplotlib)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    depths = [o.depth for o in p.options]
    fig, ax = plt.subplots(figsize=(7.5, 4.5), dpi=110)
    ax.semilogy(depths, [o.verify_seconds for o in p.options], "o-", label="verify time (model)")
    ax.semilogy(depths, [o.prover_extra_seconds for o in p.options], "s--", label="prover extra time")
    ax.set_xlabel("proof depth")
    ax.set_ylabel("seconds (log scale)")
    ax2 = ax.twinx()
    ax2.semilogy(depths, [o.spool_bytes for o in p.options], "^:", color="tab:green", label="spool disk")
    ax2.set_ylabel("spool bytes (log scale)")
    rec = p.recommended
    ax.axvline(rec.depth, color="grey", alpha=0.5)
    ax.annotate(f"recommended: {rec.depth}", (rec.depth, rec.verify_seconds), textcoords="offset points",
                xytext=(8, 10))
    if p.max_disk is not None:
        ax2.axhline(p.max_disk, color="tab:green", alpha=0.4, linestyle="-", label="disk budget")
    lines = ax.get_lines()[:2] + ax2.get_lines()[:2]
    ax.legend(lines, [str(line.get_label()) for line in lines], loc="upper center")
    ax.set_title(f"{p.number.text}: run about {p.run_seconds:,.0f} s on this machine")
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)

"""The Gerbicz error check on a squaring chain x_{i+1} = x_i^2 mod N.

Every L-th residue is multiplied into a running product d_k = x_0 * x_L * ... * x_{kL}. The
identity d_k = x_0 * d_{k-1}^(2^L) holds for a correct chain, and a wrong residue anywhere in the
chain (or a wrong d) breaks it except with negligible probability. Checking it costs L squarings, so
checking every B blocks costs about 1/L + 1/B of the run. On a mismatch the chain rolls back to the
last state a passed check covered.

The last T mod L squarings fall outside any block: they are computed twice and compared.

Used by the worker's run engine (with captures and checkpoints) and by the verifier (bare).
"""

from __future__ import annotations

import bisect
import math
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from typing import Any

from .errors import RunFailed

#: Consecutive failed checks after which a run gives up instead of looping on broken hardware.
DEFAULT_MAX_CONSECUTIVE_FAILURES = 8


def default_block(total: int) -> tuple[int, int]:
    """Block length L and blocks per check B for a chain of ``total`` squarings.

    Overhead is about 1/L + 1/B; the work lost on an error is at most L*B squarings. L = B near
    sqrt(total)/3, capped at 1000, keeps overhead near 2% for 10^5 squarings and 0.2% for long runs.
    """
    side = max(2, min(1000, math.isqrt(max(total, 1)) // 3))
    return side, side


def single_check_block(total: int) -> tuple[int, int]:
    """L and B for one check at the end: L = sqrt(total), so the check and the block
    multiplications cost about 2*sqrt(total). For an in-memory chain (the verifier's final
    segment), where an error only means doing the segment again."""
    side = max(1, math.isqrt(max(total, 1)))
    return side, max(1, total // side)


@dataclass(frozen=True)
class ChainState:
    """A point of the chain that a passed check covers: step i, x_i and the running product d."""

    step: int
    x: Any
    d: Any


@dataclass
class ChainStats:
    checks: int = 0
    recoveries: int = 0
    squarings: int = 0  # every squaring done, check work and repeated work included


class CaptureGrid:
    """Steps where the caller wants to see the residue: ``start + j*spacing`` for j = 1..count,
    plus any ``extra`` steps (used by fault-injection tests)."""

    def __init__(self, start: int, spacing: int, count: int, extra: Iterable[int] = ()) -> None:
        self.start, self.spacing, self.count = start, spacing, count
        self.extra = sorted(set(extra))

    def index(self, step: int) -> int | None:
        """Capture index j of ``step``, or None if it is not a capture step."""
        off = step - self.start
        if off > 0 and off % self.spacing == 0 and off // self.spacing <= self.count:
            return off // self.spacing
        return None

    def covered(self, step: int) -> int:
        """How many grid captures (extras not counted) lie at or before ``step``."""
        return max(0, min(self.count, (step - self.start) // self.spacing))

    def next_after(self, step: int) -> int | None:
        best: int | None = None
        if self.count:
            j = 1 if step < self.start else (step - self.start) // self.spacing + 1
            if j <= self.count:
                best = self.start + j * self.spacing
        k = bisect.bisect_right(self.extra, step)
        if k < len(self.extra) and (best is None or self.extra[k] < best):
            best = self.extra[k]
        return best


OnStop = Callable[[int, Any], None]
OnState = Callable[[ChainState], None]
Fault = Callable[[int, Any], Any]


class GerbiczChain:
    """Compute x_0^(2^total) in ``group`` (numbers.py: residues or the Lucas torus) under the
    Gerbicz check, resumable from a verified ChainState.

    Callbacks: ``on_stop(step, x)`` at every capture step (the residue is not yet covered by a
    check), ``on_commit(state)`` after each passed check, ``on_rollback(state)`` after a failed one
    (everything seen by on_stop after ``state.step`` is void), ``progress(step)`` at block ends.
    ``fault(step, x)`` may replace the residue at stops: a test hook for simulated hardware errors.

    Raises RunFailed after ``max_failures`` consecutive failed checks.
    """

    def __init__(
        self,
        group: Any,
        x0: Any,
        total: int,
        block: int,
        blocks_per_check: int,
        *,
        grid: CaptureGrid | None = None,
        on_stop: OnStop | None = None,
        on_commit: OnState | None = None,
        on_rollback: OnState | None = None,
        fault: Fault | None = None,
        max_failures: int = DEFAULT_MAX_CONSECUTIVE_FAILURES,
        stats: ChainStats | None = None,
        progress: Callable[[int], None] | None = None,
    ) -> None:
        if block < 1 or blocks_per_check < 1:
            raise ValueError("block and blocks_per_check must be >= 1")
        self.group, self.x0, self.total = group, x0, total
        self.L, self.B = block, blocks_per_check
        self.grid = grid or CaptureGrid(0, 1, 0)
        self.on_stop, self.on_commit, self.on_rollback = on_stop, on_commit, on_rollback
        self.fault = fault
        self.max_failures = max_failures
        self.stats = stats or ChainStats()
        self.progress = progress

    def start_state(self) -> ChainState:
        return ChainState(0, self.x0, self.x0)

    def _next_stop(self, step: int, limit: int) -> int:
        nxt = self.grid.next_after(step)
        return limit if nxt is None or nxt > limit else nxt

    def _visit(self, step: int, x: Any) -> Any:
        if self.fault is not None:
            x = self.fault(step, x)
        if self.on_stop is not None and self.grid.index(step) is not None:
            self.on_stop(step, x)
        return x

    def _failed(self, verified: ChainState) -> None:
        self.stats.recoveries += 1
        self._consecutive += 1
        if self._consecutive > self.max_failures:
            raise RunFailed(
                f"the Gerbicz check failed {self._consecutive} times in a row near step "
                f"{verified.step}: the machine is producing wrong results; stopping"
            )
        if self.on_rollback is not None:
            self.on_rollback(verified)

    def run(self, state: ChainState | None = None) -> Any:
        """Run from ``state`` (default: the start) to step ``total``; return x_total."""
        num, L, B, T = self.group, self.L, self.B, self.total
        verified = state or self.start_state()
        self._consecutive = 0
        end_full = T - T % L
        stats = self.stats
        while True:
            step, x, d = verified.step, verified.x, verified.d
            while step < end_full:
                nxt = min(step - step % L + L, self._next_stop(step, end_full))
                x = num.square_n(x, nxt - step)
                stats.squarings += nxt - step
                step = nxt
                x = self._visit(step, x)
                if step % L:
                    continue
                if self.progress is not None:
                    self.progress(step)
                d_prev, d = d, num.mul(d, x)
                if (step // L) % B and step != end_full:
                    continue
                stats.checks += 1
                stats.squarings += L
                if num.mul(self.x0, num.square_n(d_prev, L)) == d:
                    verified = ChainState(step, x, d)
                    self._consecutive = 0
                    if self.on_commit is not None:
                        self.on_commit(verified)
                else:
                    self._failed(verified)
                    step, x, d = verified.step, verified.x, verified.d
            if step >= T:
                return verified.x
            # Tail shorter than one block: compute twice, with stops on the first pass only.
            s, xa = step, x
            while s < T:
                nxt = self._next_stop(s, T)
                xa = num.square_n(xa, nxt - s)
                s = nxt
                xa = self._visit(s, xa)
            xb = num.square_n(x, T - step)
            stats.squarings += 2 * (T - step)
            stats.checks += 1
            if xa == xb:
                verified = ChainState(T, xa, d)
                self._consecutive = 0
                if self.on_commit is not None:
                    self.on_commit(verified)
                return xa
            self._failed(verified)

"""Split a worker run's time into the checked chain and proof building, for the benchmarks.

Wraps ``verifier.engine.GerbiczChain.run`` and ``verifier.certify.prove`` with timers while the
context is open (library files are not changed)."""

from __future__ import annotations

import time
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

from verifier import certify, engine


@contextmanager
def phase_timer() -> Iterator[dict[str, float]]:
    spent = {"chain": 0.0, "prove": 0.0}
    base_chain, base_prove = engine.GerbiczChain, certify.prove

    class TimedChain(base_chain):  # type: ignore[misc, valid-type]
        def run(self, state: Any = None) -> Any:
            t = time.perf_counter()
            try:
                return super().run(state)
            finally:
                spent["chain"] += time.perf_counter() - t

    def timed_prove(*args: Any, **kwargs: Any) -> Any:
        t = time.perf_counter()
        try:
            return base_prove(*args, **kwargs)
        finally:
            spent["prove"] += time.perf_counter() - t

    engine.GerbiczChain, certify.prove = TimedChain, timed_prove  # type: ignore[misc]
    try:
        yield spent
    finally:
        engine.GerbiczChain, certify.prove = base_chain, base_prove  # type: ignore[misc]

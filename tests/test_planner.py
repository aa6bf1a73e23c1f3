"""The depth planner's cost model against operations actually counted, and its recommendation."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from gmpy2 import mpz

from verifier import parse_number
from verifier.cli import main
from verifier.numbers import Mersenne
from verifier.planner import parse_size, plan, prover_extra_squarings, verifier_squarings
from verifier.proof import Statement, prove, reduce_claim


class Counting:
    """Count squarings and multiplications done through a Mersenne object."""

    def __init__(self, monkeypatch: pytest.MonkeyPatch) -> None:
        self.ops = 0.0
        sq, mul = Mersenne.square_n, Mersenne.mul

        def square_n(num: Mersenne, x: mpz, n: int) -> mpz:
            self.ops += n
            return sq(num, x, n)

        def mul_(num: Mersenne, a: mpz, b: mpz) -> mpz:
            self.ops += 1.25
            return mul(num, a, b)

        monkeypatch.setattr(Mersenne, "square_n", square_n)
        monkeypatch.setattr(Mersenne, "mul", mul_)


@pytest.mark.parametrize("p, depth", [(4423, 4), (9941, 6), (21701, 8)])
def test_cost_model_matches_counted_operations(monkeypatch: pytest.MonkeyPatch, p: int, depth: int) -> None:
    num = Mersenne(p)
    h, s = p % (1 << depth), p >> depth
    u = [num.square_n(mpz(3), h)]
    for _ in range(1 << depth):
        u.append(num.square_n(u[-1], s))
    st = Statement(num, 3, p, depth, u[-1], tuple(b"\0" * 32 for _ in range(1 << depth)))
    counter = Counting(monkeypatch)
    mus = prove(st, lambda j: u[j])
    assert counter.ops == pytest.approx(prover_extra_squarings(num, depth), rel=0.12)
    counter.ops = 0
    x, y, seg, _ = reduce_claim(st, mus)
    counter_halvings = counter.ops
    model = verifier_squarings(num, depth) - s - h  # the halvings part of the model
    assert counter_halvings == pytest.approx(model - 2 * (s ** 0.5) * 1.25, rel=0.15)


def test_recommendation_respects_budgets() -> None:
    num = parse_number("2^86243-1")
    p = plan(num, squaring_seconds=1e-4)
    rec = p.recommended
    assert rec.within_prover_budget and rec.prover_extra_fraction <= 0.02
    better = [o for o in p.options if o.verifier_squarings < rec.verifier_squarings]
    assert all(not o.within_prover_budget for o in better)
    tight = plan(num, max_disk=50_000, squaring_seconds=1e-4)
    assert tight.recommended.spool_bytes <= 50_000 < plan(num, squaring_seconds=1e-4).recommended.spool_bytes
    assert sum(o.recommended for o in tight.options) == 1


def test_long_runs_get_deep_proofs_cheaply() -> None:
    """T >= 10^5: the recommended depth keeps proof building within 2% (model)."""
    for p in (110503, 1257787, 43112609):  # OEIS A000043 terms (from memory); any prime p works here
        rec = plan(Mersenne(p), squaring_seconds=1e-4).recommended
        assert rec.prover_extra_fraction <= 0.02 and rec.depth >= 4


def test_parse_size() -> None:
    assert parse_size("20GB") == 20 * 10**9 and parse_size("500MiB") == 500 * 2**20
    assert parse_size("1e6") == 10**6
    with pytest.raises(ValueError):
        parse_size("lots")


def test_plan_command_and_auto_depth(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    png = tmp_path / "plan.png"
    assert main(["plan", "2^9941-1", "--max-disk", "100KB", "--plot", str(png), "--json"]) == 0
    obj = json.loads(capsys.readouterr().out)
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    rec = obj["recommended_depth"]
    assert [d["depth"] for d in obj["depths"] if d["recommended"]] == [rec]
    out = tmp_path / "a.cpc"
    assert main(["prove", "2^9941-1", "--depth", "auto", "-o", str(out), "--json"]) == 0
    made = json.loads(capsys.readouterr().out)
    assert made["depth"] == plan(parse_number("2^9941-1")).recommended.depth
    with pytest.raises(SystemExit) as exc:  # argparse refuses it: usage error
        main(["prove", "2^9941-1", "--depth", "deep", "-o", str(tmp_path / "b.cpc")])
    assert exc.value.code == 2

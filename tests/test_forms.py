"""More number forms and tests (issue: Proth, Pépin, certified Lucas-Lehmer, cofactors, delay),
checked against outside sources named beside each check."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
import sympy
from adversary import forge, known_subgroup
from conftest import det_key
from gmpy2 import mpz
from hypothesis import given
from hypothesis import strategies as st

from verifier import Rejected, Run, RunConfig, UsageError, VerificationPolicy, decode_unverified, verify
from verifier.cli import main
from verifier.codec import encode
from verifier.methods import METHODS, Proth
from verifier.numbers import Fermat, KTwoN, LucasTorus, Mersenne, parse_modulus, parse_number

ACCEPT_UNSIGNED = VerificationPolicy(unsafe_accept_unsigned=True)


def certify(tmp: Path, number: str, test: str = "", base: int | None = None, depth: int = 2,
            factors: tuple[int, ...] = (), squarings: int | None = None, name: str = "c.cpc"):  # type: ignore[no-untyped-def]
    num = parse_number(number) if not number.startswith("mod:") else parse_modulus(number[4:])
    m = METHODS[test] if test else None
    if base is None:
        base = Proth.find_base(num) if test == "proth" else (m.default_base if m else 3)
    out = tmp / name
    T = (m or METHODS["fermat-prp"]).squarings(num, squarings)
    depth = min(depth, T.bit_length() - 1)
    cfg = RunConfig(num, base=base, depth=depth, test=test, known_factors=factors, delay_squarings=squarings)
    Run(cfg, out).run()
    data = out.read_bytes()
    out.unlink()
    return verify(decode_unverified(data), ACCEPT_UNSIGNED)


# -- arithmetic ----------------------------------------------------------------------------------
@given(k=st.sampled_from([1, 3, 5, 7, 15, 27, 1023, 99999]), n=st.integers(2, 400), c=st.sampled_from([1, -1]),
       data=st.data())
def test_k2n_fold_matches_builtin_mod(k: int, n: int, c: int, data: st.DataObject) -> None:
    num = KTwoN(k, n, c)
    N = int(num.N)
    x = data.draw(st.one_of(st.integers(0, N - 1), st.sampled_from([0, 1, N - 1, N - 2])))
    y = data.draw(st.integers(0, N - 1))
    r = num.reduce(mpz(x) * y)
    assert 0 <= r < N and r == x * y % N  # reference: Python's % on built-in ints
    assert num.square_n(mpz(x), 5) == pow(x, 32, N)  # reference: built-in pow


def test_fermat_numbers_match_a000215() -> None:
    # OEIS A000215, Fermat numbers 2^(2^m)+1 (values from memory)
    assert [int(Fermat(m).N) for m in range(6)] == [3, 5, 17, 257, 65537, 4294967297]


@given(p=st.sampled_from([5, 7, 13, 61, 89, 127]), n=st.integers(0, 40), data=st.data())
def test_torus_squaring_matches_definition(p: int, n: int, data: st.DataObject) -> None:
    """(a + b sqrt3)^(2^n) by the norm shortcut equals plain multiplication in Z_N[sqrt 3]."""
    num = Mersenne(p)
    N = int(num.N)
    t = LucasTorus(num)
    x = t.pow((mpz(2), mpz(1)), data.draw(st.integers(1, 10**6)))
    assert t.check_element(x) is None
    a, b = int(x[0]), int(x[1])
    for _ in range(n):
        a, b = (a * a + 3 * b * b) % N, (2 * a * b) % N
    assert t.square_n(x, n) == (a, b)


def test_lucas_lehmer_chain_matches_a003010() -> None:
    # OEIS A003010: 4, 14, 194, 37634, 1416317954, 2005956546822746114 (from memory); modulo
    # 2^127-1 none of these is reduced, so 2*a_k must equal them exactly.
    t = LucasTorus(Mersenne(127))
    x = (mpz(2), mpz(1))
    got = []
    for _ in range(6):
        got.append(int(2 * x[0]))
        x = t.square_n(x, 1)
    assert got == [4, 14, 194, 37634, 1416317954, 2005956546822746114]
    s = [4]
    for _ in range(5):
        s.append(s[-1] ** 2 - 2)  # the recurrence itself, as a second reference
    assert got == s


def test_lucas_lehmer_residue_of_m11(tmp_path: Path) -> None:
    # s_9 = 1736 (mod 2047) for p = 11 (common practice); 2047 = 23 * 89, so "composite"
    r = certify(tmp_path, "2^11-1", "lucas-lehmer", depth=2)
    assert r.result == "composite" and int(r.residue64, 16) == 1736 and r.proved


# -- verdicts against OEIS and sympy -------------------------------------------------------------
A000043_BELOW_1300 = [2, 3, 5, 7, 13, 17, 19, 31, 61, 89, 107, 127, 521, 607, 1279]  # OEIS, from memory


def test_certified_lucas_lehmer_below_1300(tmp_path: Path) -> None:
    proved = []
    for p in sympy.primerange(5, 1300):
        r = certify(tmp_path, f"2^{p}-1", "lucas-lehmer", depth=1 + p % 4 if p > 16 else 1)
        assert r.result == ("prime" if sympy.isprime(2**p - 1) else "composite")  # reference: sympy
        if r.result == "prime":
            proved.append(p)
    assert proved == A000043_BELOW_1300[2:]  # OEIS A000043; p = 2, 3 are below the size limit
    with pytest.raises(UsageError, match="too small"):  # 2^3-1 = 7: T = 1 squaring
        RunConfig(parse_number("2^3-1"), base=4, depth=1, test="lucas-lehmer")


# OEIS A002253: n with 3*2^n+1 prime; A002235: n with 3*2^n-1 prime (both from memory)
A002253 = [1, 2, 5, 6, 8, 12, 18, 30, 36, 41, 66, 189]
A002235 = [0, 1, 2, 3, 4, 6, 7, 11, 18, 34, 38, 43, 55, 64, 76, 94, 103, 143]


def test_three_times_power_of_two_plus_one(tmp_path: Path) -> None:
    def proth(n: int) -> str:
        if sympy.sqrt(3 * 2**n + 1).is_integer:  # a square (25, for n = 3): no base qualifies
            with pytest.raises(UsageError, match="perfect square"):
                certify(tmp_path, f"3*2^{n}+1", "proth")
            return "composite"
        return str(certify(tmp_path, f"3*2^{n}+1", "proth").result)

    proth_primes = [n for n in range(3, 200) if proth(n) == "prime"]
    assert proth_primes == [n for n in A002253 if n >= 3]  # Proth's test needs T = n-1 >= 2
    assert proth_primes == [n for n in range(3, 200) if sympy.isprime(3 * 2**n + 1)]  # sympy
    prp = [n for n in range(2, 200) if certify(tmp_path, f"3*2^{n}+1").result == "probable-prime"]
    assert prp == [n for n in A002253 if n >= 2]


def test_three_times_power_of_two_minus_one(tmp_path: Path) -> None:
    prp = [n for n in range(2, 200) if certify(tmp_path, f"3*2^{n}-1").result == "probable-prime"]
    assert prp == [n for n in A002235 if n >= 2]
    assert prp == [n for n in range(2, 200) if sympy.isprime(3 * 2**n - 1)]  # reference: sympy


# OEIS A080076, Proth primes (from memory), the terms below 10^4
A080076 = [3, 5, 13, 17, 41, 97, 113, 193, 241, 257, 353, 449, 577, 641, 673, 769, 929, 1153, 1217,
           1409, 1601, 2113, 2689, 2753, 3137, 3329, 3457, 4481, 4993, 6529, 7297, 7681, 7937, 9473,
           9601, 9857]


def test_proth_primes_below_10000(tmp_path: Path) -> None:
    """Every Proth number k*2^n+1 < 10^4 (k odd, k < 2^n) with n - 1 >= 2 squarings."""
    found, tested = [], []
    for n in range(3, 14):
        for k in range(1, min(1 << n, (10**4 - 1) >> n) + 1, 2):
            N = k * 2**n + 1
            if N >= 10**4:
                continue
            text = f"{k}*2^{n}+1" if k > 1 else (f"2^(2^{n.bit_length() - 1})+1" if n & (n - 1) == 0 else None)
            if text is None:
                continue  # 2^n+1 with n not a power of two: trivially composite, refused
            tested.append(N)
            if sympy.sqrt(N).is_integer:
                continue  # a perfect square: refused (no base with Jacobi -1), and composite
            if certify(tmp_path, text, "proth").result == "prime":
                found.append(N)
    found.sort()
    assert found == sorted(N for N in tested if sympy.isprime(N))  # reference: sympy
    assert found == [N for N in A080076 if N in tested]  # reference: OEIS A080076


def test_pepin_fermat_numbers(tmp_path: Path) -> None:
    # OEIS A019434 (Fermat primes): F_0..F_4; F_5..F_14 are composite (common practice)
    for m in range(2, 15):
        r = certify(tmp_path, f"2^(2^{m})+1", depth=min(4, (2**m - 1).bit_length() - 1))
        assert r.test == "pepin" and r.proved
        assert r.result == ("prime" if m <= 4 else "composite"), m
    for m in (0, 1):  # 3 and 5 need fewer than 2 squarings: too small to certify
        with pytest.raises(UsageError, match="too small"):
            RunConfig(Fermat(m), base=3, depth=1, test="pepin")
    assert parse_number("F_10") == parse_number("2^1024+1") == parse_number("2^(2^10)+1")


def test_cofactors_against_sympy(tmp_path: Path) -> None:
    # 2^29-1 = 233 * 1103 * 2089 (from memory), checked by multiplication
    assert 233 * 1103 * 2089 == 2**29 - 1
    cases = 0
    for p in (11, 23, 29, 37, 41, 43, 47, 53, 59, 67, 71, 73, 79, 83, 97, 101, 103, 109, 113):
        factors = sorted(sympy.factorint(2**p - 1))  # reference: sympy's factorisation
        for known in {tuple(factors[:1]), tuple(factors[:-1])}:
            if not known or len(known) == len(factors):
                continue
            F = 1
            for f in known:
                F *= f
            C = (2**p - 1) // F
            r = certify(tmp_path, f"2^{p}-1", "cofactor-prp", factors=known, depth=2)
            assert r.result == ("probable-prime" if sympy.isprime(C) else "composite"), (p, known)
            assert r.known_factors == known and "cofactor" in r.subject
            cases += 1
    assert cases >= 15
    with pytest.raises(UsageError, match="not a proper factor"):
        RunConfig(parse_number("2^29-1"), depth=2, known_factors=(7,))
    with pytest.raises(UsageError, match="no cofactor"):
        RunConfig(parse_number("2^11-1"), depth=2, known_factors=(23, 89))


def test_delay_on_generic_modulus(tmp_path: Path) -> None:
    p = sympy.nextprime(2**100 + 12345)
    q = sympy.nextprime(2**101 + 999)
    N = p * q
    r = certify(tmp_path, f"mod:{N}", "delay", base=5, depth=4, squarings=5000)
    assert r.result == "computed" and r.number == hex(N)
    assert int(r.residue64, 16) == pow(5, 2**5000, N) & (2**64 - 1)  # reference: built-in pow
    for bad, reason in [(N * 2, "odd"), (N * 3, "small factor 3"), (p * p, "perfect power"), (12345, "64 bits")]:
        with pytest.raises(UsageError, match=reason):
            parse_modulus(str(bad))


def test_deterministic_verdicts_say_so_and_prp_ones_warn(tmp_path: Path) -> None:
    assert "not a primality proof" in certify(tmp_path, "3*2^30+1").caution
    proved = certify(tmp_path, "3*2^30+1", "proth")
    assert proved.result == "prime" and proved.proved and "deterministic" in proved.caution


# -- adversarial provers, one per form --------------------------------------------------------------
@pytest.mark.parametrize("number, test, base, lies", [
    ("2^127-1", "fermat-prp", 3, "subgroup"),
    ("3*2^150+1", "fermat-prp", 3, "pm1"),
    ("3*2^150-1", "fermat-prp", 3, "pm1"),
    ("3*2^189+1", "proth", None, "pm1"),           # a prime (OEIS A002253): -y would say composite
    ("2^(2^7)+1", "pepin", 3, "subgroup"),          # 2 has order 2^8 modulo F_7
    ("2^127-1", "lucas-lehmer", 4, "torus"),        # -y would turn "prime" into "composite"
    ("2^127-1", "cofactor-prp", 3, "none"),
])
def test_lying_provers_per_form(number: str, test: str, base: int | None, lies: str) -> None:
    num = parse_number(number)
    m = METHODS[test]
    if base is None:
        base = Proth.find_base(num)
    group = m.group(num)
    if lies == "torus":
        minus_one = (num.N - 1, mpz(0))
        cands = [group.identity, minus_one]
        claims = [minus_one]
    elif lies == "subgroup":
        cands = known_subgroup(num)
        claims = [num.N - 1, mpz(2), mpz(8), num.N - 4]
    else:
        cands = [mpz(1), num.N - 1]
        claims = [num.N - 1]
    if test == "cofactor-prp":
        return  # the chain is fermat-prp's (covered above); its verdict is computed, not claimed
    for g in claims:
        for depth in (2, 3):
            cert, tries = forge(num, base, depth, g, test=m, candidates=cands)
            assert tries >= len(cands)
            with pytest.raises(Rejected, match="does not verify"):
                verify(decode_unverified(encode(cert)), ACCEPT_UNSIGNED)
    # control: the honest claim through the same forger is accepted
    honest, _ = forge(num, base, 3, group.identity, test=m, candidates=cands)
    verify(decode_unverified(encode(honest)), ACCEPT_UNSIGNED)


# -- engine and command line -------------------------------------------------------------------------
def test_lucas_lehmer_run_resumes(tmp_path: Path) -> None:
    """Crash-safe state works for torus elements too: same certificate after a crash."""
    cfg = RunConfig(parse_number("2^1279-1"), base=4, depth=4, test="lucas-lehmer", block=16, blocks_per_check=4)
    Run(cfg, tmp_path / "clean.cpc", key=det_key()).run()

    class Crash(Exception):
        pass

    def crash(step: int, x: object) -> object:
        if step == 900:
            raise Crash
        return x

    with pytest.raises(Crash):
        Run(cfg, tmp_path / "r.cpc", key=det_key(), fault=crash, fault_steps=[900], checkpoint_seconds=0).run()
    rep = Run(cfg, tmp_path / "r.cpc", key=det_key()).run()
    assert rep.resumed_at and (tmp_path / "r.cpc").read_bytes() == (tmp_path / "clean.cpc").read_bytes()
    assert rep.result == "prime"  # 2^1279-1 (OEIS A000043)


def test_command_line_forms(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    def run(*args: str) -> dict:  # type: ignore[type-arg]
        code = main([*args, "--json"])
        out = capsys.readouterr().out.strip().splitlines()[-1]
        assert code == 0, out
        return json.loads(out)

    made = [
        run("prove", "3*2^5000+1", "--test", "proth", "-o", str(tmp_path / "a.cpc"), "--depth", "6"),
        run("prove", "2^(2^10)+1", "-o", str(tmp_path / "b.cpc"), "--depth", "5"),
        run("prove", "2^4423-1", "--test", "lucas-lehmer", "-o", str(tmp_path / "c.cpc"), "--depth", "6"),
        run("prove", "2^29-1", "--known-factor", "233", "-o", str(tmp_path / "d.cpc"), "--depth", "3"),
        run("prove", "--modulus", str(sympy.nextprime(2**80) * sympy.nextprime(2**90)), "--squarings", "3000",
            "-o", str(tmp_path / "e.cpc"), "--depth", "4"),
    ]
    expected = [("proth", "composite"), ("pepin", "composite"), ("lucas-lehmer", "prime"),
                ("cofactor-prp", "composite"), ("delay", "computed")]
    # 3*2^5000+1 is composite (sympy); F_10 composite (common practice); 2^4423-1 prime (A000043);
    # (2^29-1)/233 = 1103 * 2089 (above)
    assert not sympy.isprime(3 * 2**5000 + 1)
    for obj, (test, result), name in zip(made, expected, "abcde", strict=True):
        assert obj["test"] == test and obj["result"] == result
        checked = run("check", str(tmp_path / f"{name}.cpc"), "--accept-unsigned")
        assert checked["verified"] and checked["result"] == result and checked["test"] == test
        assert checked["caution"]
    assert run("check", str(tmp_path / "c.cpc"), "--accept-unsigned")["proved"] is True
    assert main(["prove", "2^29-1", "--test", "proth"]) == 2
    capsys.readouterr()


def _cyclic(group: object, g: mpz, limit: int = 1 << 12) -> list[mpz]:
    out, x = [mpz(1)], g
    while x != 1 and len(out) < limit:
        out.append(x)
        x = group.mul(x, g)  # type: ignore[attr-defined]
    return out


def _sqrt2(num: KTwoN) -> mpz:
    """sqrt(2) modulo F_m = 2^n + 1 (n = 2^m >= 4): 2^(n/4) * (2^(n/2) - 1)."""
    return num.mul(num.pow(mpz(2), num.n // 4), num.pow(mpz(2), num.n // 2) - 1)


@pytest.mark.parametrize("number, test, make_u, weak_lam", [
    # k = 9 = 3^2, n even: u = 3 * 2^(n/2) has u^2 = -1 (order 4). A composite: 5 * 73 * 101.
    ("9*2^12+1", "proth", lambda num: mpz(3) << 6, 2),
    # F_m: sqrt(2) has order 2^(m+2), above the 2^(m+1) of <2>
    ("2^(2^5)+1", "pepin", _sqrt2, None),
    ("2^(2^4)+1", "fermat-prp", _sqrt2, None),
])
def test_public_elements_beyond_plus_minus_two_are_neutralised(number: str, test: str, make_u, weak_lam,  # type: ignore[no-untyped-def]
                                                               monkeypatch: pytest.MonkeyPatch) -> None:
    """Public elements of known order that a form brings (found in review): lies by them are
    rejected with the challenge modulus the form declares, and accepted with a smaller one (which
    shows the test can fail)."""
    assert 9 * 2**12 + 1 == 5 * 73 * 101  # the Proth case is composite (checked by multiplication)
    num = parse_number(number)
    m = METHODS[test]
    base = Proth.find_base(num) if test == "proth" else 3
    u = make_u(num)
    cands = _cyclic(num, u)
    lam = num.known_order_exponent
    assert num.pow(u, lam) == 1  # the declared exponent kills u
    lies = [num.N - 1] + [g for g in cands if g != 1][:5]
    depth = min(3, (m.squarings(num)).bit_length() - 1)
    for g in lies:
        cert, _ = forge(num, base, depth, g, test=m, candidates=cands)
        with pytest.raises(Rejected):
            verify(decode_unverified(encode(cert)), ACCEPT_UNSIGNED)
    weaker = weak_lam or lam // 2
    monkeypatch.setattr(type(num), "known_order_exponent", property(lambda self: weaker))
    wins = 0
    for g in lies:
        cert, _ = forge(num, base, depth, g, test=m, candidates=cands)
        try:
            verify(decode_unverified(encode(cert)), ACCEPT_UNSIGNED)
            wins += 1
        except Rejected:
            pass
    assert wins >= 1


def test_generic_modulus_rules_found_in_review() -> None:
    with pytest.raises(UsageError, match="perfect power"):
        parse_modulus(str(sympy.nextprime(2**17) ** 13))
    with pytest.raises(UsageError, match="is prime"):
        parse_modulus(str(sympy.nextprime(2**100)))
    with pytest.raises(UsageError, match="too large"):
        parse_modulus(hex((1 << 16400) + 1))

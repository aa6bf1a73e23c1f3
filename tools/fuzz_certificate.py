"""Coverage-guided fuzzing of the certificate reader and verifier with atheris (libFuzzer).

    python tools/fuzz_certificate.py CORPUS_DIR [libFuzzer options, e.g. -runs=20000 or -max_total_time=600]

Seed the corpus with the fixtures (tests copy fixtures/**/*.cpc into a scratch folder). The only
acceptable outcomes for an input are "verified" and the single rejection exception; anything else
(another exception, a hang, a crash) is a finding and stops the fuzzer with the input saved.
"""

from __future__ import annotations

import sys

import atheris

with atheris.instrument_imports():
    from verifier import Rejected, VerificationPolicy, decode_unverified, verify
    from verifier.errors import RunFailed

# Bound the work one input may ask for, so the fuzzer spends its time on parsing paths.
POLICY = VerificationPolicy(unsafe_accept_unsigned=True, max_verifier_squarings=50_000,
                            max_certificate_bytes=1 << 20)


def one_input(data: bytes) -> None:
    try:
        verify(decode_unverified(data, max_bytes=POLICY.max_certificate_bytes), POLICY)
    except Rejected:
        pass
    except RunFailed as exc:  # the verifier's own arithmetic failing would be a real finding
        raise AssertionError(f"verifier self-check failed: {exc}") from None


def main() -> None:
    atheris.Setup(sys.argv, one_input)
    atheris.Fuzz()


if __name__ == "__main__":
    main()

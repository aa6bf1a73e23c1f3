"""chainproof: checkable Fermat PRP runs with Gerbicz checks and Pietrzak halving certificates.

Library entry points:

* :class:`RunConfig` and :class:`Run` (worker): run a test and write a certificate.
* :func:`decode_unverified`, :func:`verify`, :class:`VerificationPolicy` (verifier).
* :class:`Rejected`: the one exception for a certificate that is not accepted.
"""

from .codec import UnverifiedCertificate, decode_unverified, encode
from .engine import Run, RunConfig, RunReport
from .errors import ChainproofError, Rejected, RunFailed, StorageError, UsageError
from .methods import PRP_CAUTION
from .numbers import Mersenne, parse_number
from .verify import VerificationPolicy, VerifiedResult, verify

__version__ = "0.1.0"

__all__ = [
    "PRP_CAUTION",
    "ChainproofError",
    "Mersenne",
    "Rejected",
    "Run",
    "RunConfig",
    "RunFailed",
    "RunReport",
    "StorageError",
    "UnverifiedCertificate",
    "UsageError",
    "VerificationPolicy",
    "VerifiedResult",
    "__version__",
    "decode_unverified",
    "encode",
    "parse_number",
    "verify",
]

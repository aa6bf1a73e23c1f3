"""The project's exceptions. Every certificate that fails verification raises :class:`Rejected`."""

from __future__ import annotations


class ChainproofError(Exception):
    """Base class of all chainproof errors."""


class Rejected(ChainproofError):
    """A certificate was not accepted. ``reason`` is one human-readable line.

    There is one rejection type on purpose: callers decide on "verified or not", never on which
    check failed, so no error oracle is offered.
    """

    def __init__(self, reason: str) -> None:
        super().__init__(reason)
        self.reason = reason


class UsageError(ChainproofError):
    """Bad input from the user: a malformed number, an out-of-range option, an unreadable file."""


class StorageError(ChainproofError):
    """Run state or output could not be written (disk full, permissions). What was on disk before
    is intact; the same command resumes once the cause is fixed."""


class VerifyTimeout(ChainproofError):
    """Verification did not finish before its deadline: no verdict about the certificate."""


class RunFailed(ChainproofError):
    """A run could not finish correctly, e.g. the Gerbicz check kept failing (broken hardware)."""

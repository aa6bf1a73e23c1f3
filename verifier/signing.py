"""Ed25519 keys and signatures (RFC 8032) through the ``cryptography`` package.

Private keys are stored as PEM PKCS#8 with file mode 0600; the public key goes beside them as
PEM SubjectPublicKeyInfo in ``<name>.pub``. A key's fingerprint is ``ed25519:`` followed by the
first 16 bytes of SHA-256 of the raw 32-byte public key, in hex.
"""

from __future__ import annotations

import hashlib
import os
import stat
from pathlib import Path

from cryptography.exceptions import InvalidSignature
from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey, Ed25519PublicKey

from .errors import UsageError

PUBLIC_KEY_BYTES = 32
SIGNATURE_BYTES = 64


def fingerprint(public_key: bytes) -> str:
    return "ed25519:" + hashlib.sha256(public_key).digest()[:16].hex()


def raw_public(key: Ed25519PrivateKey | Ed25519PublicKey) -> bytes:
    pub = key.public_key() if isinstance(key, Ed25519PrivateKey) else key
    return pub.public_bytes(serialization.Encoding.Raw, serialization.PublicFormat.Raw)


def public_path(private_path: Path) -> Path:
    return private_path.with_name(private_path.name + ".pub")


def generate_keypair(path: Path, passphrase: bytes | None = None) -> tuple[Path, str]:
    """Write a new private key to ``path`` (0600, refusing to overwrite) and its public key to
    ``path.pub``. Returns (public key path, fingerprint). Raises UsageError if a file exists."""
    key = Ed25519PrivateKey.generate()
    enc: serialization.KeySerializationEncryption = (
        serialization.BestAvailableEncryption(passphrase) if passphrase else serialization.NoEncryption()
    )
    pem = key.private_bytes(serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8, enc)
    pub_file = public_path(path)
    for target in (path, pub_file):
        if target.exists():
            raise UsageError(f"{target} already exists; not overwriting a key")
    try:
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    except OSError as exc:
        raise UsageError(f"cannot create {path}: {exc.strerror}") from None
    with os.fdopen(fd, "wb") as fh:
        fh.write(pem)
    os.chmod(path, 0o600)  # the umask may have removed bits but never adds them; make it exact
    pub_pem = key.public_key().public_bytes(
        serialization.Encoding.PEM, serialization.PublicFormat.SubjectPublicKeyInfo
    )
    pub_file.write_bytes(pub_pem)
    return pub_file, fingerprint(raw_public(key))


def load_private_key(path: Path, passphrase: bytes | None = None) -> Ed25519PrivateKey:
    """Load a PEM PKCS#8 Ed25519 private key. Refuses files readable by group or others.

    Raises UsageError for a missing, unsafe, malformed or non-Ed25519 key or a wrong passphrase.
    """
    try:
        st = path.stat()
    except OSError as exc:
        raise UsageError(f"cannot read key {path}: {exc.strerror}") from None
    if st.st_mode & (stat.S_IRWXG | stat.S_IRWXO):
        raise UsageError(
            f"key {path} is accessible by group or others (mode {stat.S_IMODE(st.st_mode):o}); "
            f"run: chmod 600 {path}"
        )
    try:
        key = serialization.load_pem_private_key(path.read_bytes(), password=passphrase)
    except TypeError:
        raise UsageError(f"key {path} is passphrase-protected: supply the passphrase") from None
    except ValueError:
        raise UsageError(f"key {path} is not a readable PEM private key (or wrong passphrase)") from None
    if not isinstance(key, Ed25519PrivateKey):
        raise UsageError(f"key {path} is not an Ed25519 key")
    return key


def load_public_key(path: Path) -> bytes:
    """Raw 32-byte Ed25519 public key from a PEM file. Raises UsageError if unreadable."""
    try:
        key = serialization.load_pem_public_key(path.read_bytes())
    except OSError as exc:
        raise UsageError(f"cannot read public key {path}: {exc.strerror}") from None
    except ValueError:
        raise UsageError(f"{path} is not a PEM public key") from None
    if not isinstance(key, Ed25519PublicKey):
        raise UsageError(f"{path} is not an Ed25519 public key")
    return raw_public(key)


def sign(key: Ed25519PrivateKey, message: bytes) -> bytes:
    """Ed25519 signature (deterministic, RFC 8032)."""
    return key.sign(message)


def signature_valid(public_key: bytes, message: bytes, signature: bytes) -> bool:
    if len(public_key) != PUBLIC_KEY_BYTES or len(signature) != SIGNATURE_BYTES:
        return False
    try:
        Ed25519PublicKey.from_public_bytes(public_key).verify(signature, message)
    except (InvalidSignature, ValueError):
        return False
    return True

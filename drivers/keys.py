"""CURVE key pairs for the network link: make them, load them, with errors that name the file (never its content).

``generate_keys(DIR, NAME)`` writes ``NAME.key`` (public: copy it into the server's allow directory, or give
it to clients as the server's identity) and ``NAME.key_secret`` (secret: stays with its owner, mode 0600).
"""

from __future__ import annotations

import os
import re
from pathlib import Path

import zmq
import zmq.auth

from drivers.errors import KeyFileError

_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}$")

HOW_TO_MAKE_KEYS = (
    "make a key pair for the server and one per client with 'mfma keys generate DIR NAME', "
    "then start the server with --server-key DIR/SERVER.key_secret --allow ALLOWDIR, where ALLOWDIR holds "
    "the clients' NAME.key public files"
)


def generate_keys(directory: str | os.PathLike, name: str) -> tuple[Path, Path]:
    """Write ``NAME.key`` and ``NAME.key_secret`` into ``directory`` (created if needed); returns both paths.

    Refuses to overwrite an existing pair, so a secret in use is never lost by a typo.
    """
    if not isinstance(name, str) or not _NAME.match(name):
        raise KeyFileError(f"key name {name!r} must be 1-64 letters, digits, '_', '-' or '.'")
    if not zmq.has("curve"):
        raise KeyFileError("this pyzmq build has no CURVE support")
    folder = Path(directory)
    public, secret = folder / f"{name}.key", folder / f"{name}.key_secret"
    for path in (public, secret):
        if path.exists():
            raise KeyFileError(f"{path} already exists; choose another name or remove the old pair first")
    try:
        folder.mkdir(parents=True, exist_ok=True)
        pub_path, sec_path = zmq.auth.create_certificates(folder, name)
        os.chmod(sec_path, 0o600)
    except OSError as exc:
        raise KeyFileError(f"cannot write keys into {folder}: {exc.strerror or exc}") from None
    return Path(pub_path), Path(sec_path)


def _load(path: str | os.PathLike, what: str) -> tuple[bytes, bytes | None]:
    p = Path(path)
    if not p.is_file():
        raise KeyFileError(f"{what} file {p} does not exist ({HOW_TO_MAKE_KEYS})")
    try:
        public, secret = zmq.auth.load_certificate(p)
    except (OSError, ValueError, UnicodeDecodeError):
        raise KeyFileError(f"{what} file {p} is unreadable or not a CURVE key file") from None
    if not public:
        raise KeyFileError(f"{what} file {p} holds no public key")
    return public, secret


def load_public_key(path: str | os.PathLike) -> bytes:
    """The Z85 public key in ``NAME.key`` (or ``NAME.key_secret``, which carries both)."""
    return _load(path, "public key")[0]


def load_secret_key(path: str | os.PathLike) -> tuple[bytes, bytes]:
    """(public, secret) from a ``NAME.key_secret`` file."""
    public, secret = _load(path, "secret key")
    if not secret:
        raise KeyFileError(f"secret key file {Path(path)} holds no secret key (is it the public .key file?)")
    return public, secret


def check_allow_dir(directory: str | os.PathLike) -> int:
    """Number of client public keys in an allow directory; at least one, else an error."""
    d = Path(directory)
    if not d.is_dir():
        raise KeyFileError(f"allow directory {d} does not exist ({HOW_TO_MAKE_KEYS})")
    try:
        keys = zmq.auth.load_certificates(d)
    except (OSError, ValueError, UnicodeDecodeError):
        raise KeyFileError(f"allow directory {d} holds an unreadable key file") from None
    if not keys:
        raise KeyFileError(f"allow directory {d} holds no client public keys (*.key)")
    return len(keys)

"""``mfma keys generate DIR NAME``: CURVE key pair for the network link."""

from __future__ import annotations

from assistant.cli._common import emit_text


def generate(args) -> int:
    from drivers.keys import generate_keys

    public, secret = generate_keys(args.directory, args.name)
    emit_text([f"public key: {public}", f"secret key: {secret} (keep it private)"])
    return 0

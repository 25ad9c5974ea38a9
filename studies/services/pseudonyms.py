"""Random, unguessable display ids for cases and reads."""

from __future__ import annotations

import secrets

_ALPHABET = "ABCDEFGHJKMNPQRSTVWXYZ23456789"  # no 0/O, 1/I/L, U: easy to read aloud


def new_pseudonym(prefix: str, length: int = 8) -> str:
    return prefix + "-" + "".join(secrets.choice(_ALPHABET) for _ in range(length))

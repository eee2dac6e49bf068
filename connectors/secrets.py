"""Secrets from the environment or a file, resolved at connect time and never logged."""

from __future__ import annotations

import os
from pathlib import Path


class SecretError(ValueError):
    """A secret that cannot be resolved; the message names where it was looked for, not its value."""


def resolve_secret(ref: str | None) -> str | None:
    """``env:NAME`` -> the environment variable; ``file:/path`` -> the file's first line; else the text itself."""
    if ref is None:
        return None
    if ref.startswith("env:"):
        name = ref[4:]
        value = os.environ.get(name)
        if value is None:
            raise SecretError(f"environment variable {name} is not set")
        return value
    if ref.startswith("file:"):
        path = Path(ref[5:])
        try:
            return path.read_text(encoding="utf-8").splitlines()[0].strip()
        except (OSError, IndexError) as exc:
            raise SecretError(f"cannot read secret file {path}: {type(exc).__name__}") from None
    return ref


def redact(text: str, *secrets: str | None) -> str:
    """Replace every occurrence of the given secrets in ``text`` (for error messages)."""
    for s in secrets:
        if s:
            text = text.replace(s, "***")
    return text

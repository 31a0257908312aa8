"""The error types steelyard raises. The CLI catches :class:`SteelyardError` only."""

from __future__ import annotations

from pathlib import Path


class SteelyardError(Exception):
    """Base of every error that means "bad input or usage" (exit code 2)."""


class LoadError(SteelyardError):
    """A checkpoint could not be read: malformed, hostile, or unsupported.

    The message always names the file, so one stderr line is enough for the user.
    """

    def __init__(self, path: str | Path, reason: str) -> None:
        self.path = str(path)
        self.reason = reason
        super().__init__(f"{self.path}: {reason}")


class PolicyError(SteelyardError):
    """A policy file or option is wrong: unknown key, wrong type, value out of range."""

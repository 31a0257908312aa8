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


class UnreadableTensor(SteelyardError):
    """A tensor's bytes turned out broken when read lazily, after loading succeeded.

    Raised where the tensor is read (:class:`steelyard.graph.Tensor`), so the engine can
    tell a broken input (exit 2) from a bug in a rule (exit 3): only this type, never a bare
    ``ValueError`` from anywhere, becomes "could not be read". ``cause`` is the reader's error.
    """

    def __init__(self, tensor: str, cause: BaseException) -> None:
        self.tensor = tensor
        self.cause = cause
        super().__init__(f"tensor {tensor!r}: {type(cause).__name__}: {cause}")


class PolicyError(SteelyardError):
    """A policy file or option is wrong: unknown key, wrong type, value out of range."""

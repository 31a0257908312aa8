"""Which content hash names a checkpoint's bytes.

The checkpoint block of every report carries the digest of the checkpoint's files, in order,
under the algorithm's name: ``"blake3": hex`` by default, ``"sha256": hex`` when asked for
(``--digest sha256``, the API's ``digest="sha256"``), never both. BLAKE3 (Aumasson, Neves,
O'Connor and Wilcox-O'Hearn, 2020) is the default because SHA-256, at 1.5 GB/s on one thread
here, took as long as reading the whole checkpoint, and BLAKE3 runs at 4.2 GB/s
(docs/performance.md). SHA-256 stays available to match a digest that a registry or a
manifest publishes: it is what ``sha256sum`` prints over a one-file checkpoint.

The choices live in this module of their own so that the command line can offer them, and
renderers can read a report's digest, without importing the audit engine (the hashing itself
is :func:`steelyard.checkpoint_audit.digest_of`, which imports ``blake3`` only when it runs).
"""

from __future__ import annotations

from collections.abc import Mapping
from enum import Enum
from typing import Any

from steelyard.errors import SteelyardError

__all__ = ["DEFAULT_DIGEST", "Digest", "digest_in", "digest_named", "digest_shown"]


class Digest(str, Enum):
    """The content hashes a checkpoint's identity can be computed with."""

    BLAKE3 = "blake3"
    """BLAKE3, 256-bit output (the default)."""
    SHA256 = "sha256"
    """SHA-256 (FIPS 180-4), for matching published SHA-256 digests."""


#: The algorithm used when none is asked for.
DEFAULT_DIGEST = Digest.BLAKE3


def digest_named(name: str) -> Digest:
    """The algorithm called ``name`` (a :class:`Digest` member is accepted as itself); any
    other value is a usage error naming the allowed ones."""
    try:
        return Digest(name)
    except ValueError:
        allowed = " or ".join(d.value for d in Digest)
        raise SteelyardError(f"digest {name!r}: use {allowed}") from None


def digest_in(block: Mapping[str, Any]) -> tuple[str, str] | None:
    """(algorithm, hex digest) that a report's checkpoint block carries, or None when it
    carries none (an audit built by hand); what every renderer shows and labels."""
    for algorithm in Digest:
        value = block.get(algorithm.value)
        if isinstance(value, str) and value:
            return algorithm.value, value
    return None


def digest_shown(block: Mapping[str, Any]) -> tuple[str, str]:
    """(label, text) of a checkpoint block's digest as reports show it: the algorithm's name
    and the hex digest, or ``digest`` and ``not computed`` when the block carries none."""
    found = digest_in(block)
    return found if found is not None else ("digest", "not computed")

"""Per-source random streams: one rule for the Python API and the pipeline alike.

Every source gets ``SeedSequence([seed, key])`` with ``key`` a stable 64-bit
BLAKE2b hash of its id (Python's ``hash`` is salted per process), so a
source's random numbers do not depend on its position, its chunk or the
worker that runs it. ``seed=None`` means 0 everywhere (a run is repeatable
unless the user asks for another seed).
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterable

import numpy as np

from .errors import InputError

__all__ = ["DEFAULT_SEED", "id_hash", "source_seed", "source_seeds", "resolve_seed"]

#: The seed used when none is given: runs are repeatable by default.
DEFAULT_SEED = 0


def resolve_seed(seed: int | None) -> int:
    """The run seed: ``None`` -> :data:`DEFAULT_SEED`; otherwise a non-negative int."""
    if seed is None:
        return DEFAULT_SEED
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise InputError(f"seed must be a non-negative integer or None, got {seed!r}")
    return int(seed)


def id_hash(key: object) -> int:
    """Stable 64-bit hash of ``str(key)`` (BLAKE2b, little-endian)."""
    digest = hashlib.blake2b(str(key).encode("utf-8"), digest_size=8).digest()
    return int.from_bytes(digest, "little")


def source_seed(seed: int | None, key: object) -> np.random.SeedSequence:
    """Seed sequence of one source: ``SeedSequence([seed, id_hash(key)])``.

    Examples
    --------
    >>> a = source_seed(7, "SRC-1").generate_state(1)
    >>> b = source_seed(7, "SRC-1").generate_state(1)
    >>> bool((a == b).all())
    True
    """
    return np.random.SeedSequence([resolve_seed(seed), id_hash(key)])


def source_seeds(seed: int | None, keys: Iterable[object]) -> list[np.random.SeedSequence]:
    """:func:`source_seed` for each of ``keys``."""
    return [source_seed(seed, k) for k in keys]

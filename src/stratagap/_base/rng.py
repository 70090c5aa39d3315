"""Seeds and random streams.

Streams are keyed by *block of resamples*, not by batch, so that results do not depend on the
batch size or on the number of workers: resample ``b`` always comes from block ``b // BLOCK`` of
``numpy.random.SeedSequence(seed).spawn(...)``.
"""

from __future__ import annotations

import numpy as np

from ..errors import InputError

#: Resamples drawn from one child stream. Batches are built from whole blocks.
BLOCK = 250


def check_seed(seed, name: str = "seed") -> int:
    """Return ``seed`` as a non-negative Python int, or raise :class:`InputError`."""
    if isinstance(seed, (bool, np.bool_)):
        raise InputError(f"`{name}` must be a non-negative integer, got {seed!r}; pass e.g. `seed=2026`")
    if isinstance(seed, (int, np.integer)):
        seed = int(seed)
    elif isinstance(seed, str) and seed.strip().lstrip("+").isdigit():
        seed = int(seed)
    else:
        raise InputError(f"`{name}` must be a non-negative integer, got {seed!r}; pass e.g. `seed=2026`")
    if seed < 0:
        raise InputError(f"`{name}` must be a non-negative integer, got {seed}; pass e.g. `seed=2026`")
    return seed


def block_generators(seed: int, n_resamples: int, block: int = BLOCK):
    """One ``numpy.random.Generator`` per block of ``block`` resamples, in order."""
    n_blocks = -(-n_resamples // block)
    children = np.random.SeedSequence(seed).spawn(n_blocks)
    return [np.random.default_rng(c) for c in children]


def substream(seed: int, label: str) -> np.random.Generator:
    """An independent generator for one named use of the run's seed (e.g. 'crossfit').

    Keyed by a stable hash of ``label`` so adding a new use never shifts an existing stream.
    """
    key = [ord(c) for c in label]
    return np.random.default_rng(np.random.SeedSequence([seed, *key]))

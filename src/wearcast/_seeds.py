"""Seeds derived from a model's name, so the list of models moves no model's results."""

from __future__ import annotations

import zlib

import numpy as np


def name_seed(seed: int, name: str, *keys: int) -> int:
    """A seed in [0, 2**31 - 1) for ``name`` (and optional integer ``keys``: a fold, a
    date's ordinal) derived from ``seed`` through ``numpy.random.SeedSequence``.

    The name enters as its CRC-32, which is the same in every process and on every
    platform (Python's ``hash`` of a string is not), so adding or removing other
    names, or reordering them, changes nothing for this one.
    """
    sequence = np.random.SeedSequence([int(seed), zlib.crc32(name.encode("utf-8")), *(int(k) for k in keys)])
    return int(np.random.default_rng(sequence).integers(0, 2**31 - 1))

"""The one home of seed derivation: a tuple of non-negative ints -> one seed.

numpy's ``SeedSequence`` hashes the tuple (its entropy mixing is designed so
that nearby tuples give independent streams); the first 64-bit word, shifted
to ``bits`` bits, is the seed. The same tuple always gives the same seed, so a
run, a resumed run and a run on several ranks draw the same numbers.
"""
from __future__ import annotations

import struct

import numpy as np


def derive_seed(*parts: int, bits: int = 63) -> int:
    """Seed of ``parts`` (non-negative ints, trusted), in ``[0, 2**bits)``."""
    word = int(np.random.SeedSequence([int(p) for p in parts]).generate_state(1, np.uint64)[0])
    return word >> (64 - bits)


def float_key(x: float) -> int:
    """A non-negative int standing for a float, e.g. a temperature, to 9 significant digits."""
    return int.from_bytes(struct.pack("<d", float(f"{float(x):.9g}")), "little")

"""Random streams: every random step draws from its own stream of the one seed.

The streams are children of ``numpy.random.SeedSequence(seed)`` (its ``spawn``), one per named
step, so no two steps share draws and no step of seed ``s`` repeats a step of seed ``s + 1``
(as seeds made by adding an offset to the given one did: the holdout draw of seed 0 was the
start of seed 1).  A new random step gets a new name at the end of :data:`STEPS`, so that the
streams of the steps already named stay as they are.

>>> a, b = stream(0, "holdout"), np.random.default_rng(1)   # seed 1's start values
>>> bool(a.random() != b.random())
True
>>> child = np.random.SeedSequence(7).spawn(len(STEPS))[STEPS.index("holdout")]
>>> bool(stream(7, "holdout").random() == np.random.default_rng(child).random())
True
"""
from __future__ import annotations

import numpy as np

# the fit's start values draw from the seed's own stream (default_rng(seed)), every other step
# from one of these children of it
STEPS = ("holdout", "prior items", "variance subsets", "variance ratings", "variance draws", "evaluation folds",
         "evaluation inner", "tune validation", "coverage folds", "loop subsets")


def stream(seed: int, step: str, *more: int) -> np.random.Generator:
    """The generator of ``step`` for ``seed``; ``more`` picks a sub-stream (a fold's, say)."""
    key = (STEPS.index(step), *map(int, more))
    return np.random.default_rng(np.random.SeedSequence(int(seed), spawn_key=key))


def sub_seed(seed: int, step: str, *more: int) -> int:
    """A whole-number seed drawn from ``step``'s stream, for code that takes a seed."""
    return int(stream(seed, step, *more).integers(2 ** 63))

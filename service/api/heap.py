"""Keeping the garbage collector's full passes off the objects a server holds for good.

With the libraries and a bundle loaded, a process tracks some 235,000 objects (functions,
types, tuples and dicts of numba, pandas, scikit-learn, pydantic...), and a full collection
walks them all: 140-190 ms with the GIL held. Under load one came every few seconds, and every
request in flight waited for it (the 60-190 ms tail seen with several busy connections).
Freezing the heap once the bundles are loaded takes those objects out of the collector's
generations: full passes then walk only what was made since, well under a millisecond.
"""

from __future__ import annotations

import gc


def settle() -> None:
    """Collect once, then freeze every surviving object (call after the bundles are loaded).

    Frozen objects are still freed as soon as nothing refers to them (a swapped-out bundle
    set is), but a reference cycle among them never is; so everything frozen earlier goes back
    to the collector, and is collected, first. The collection holds the GIL for one full pass,
    once per load.
    """
    gc.unfreeze()
    gc.collect()
    gc.freeze()

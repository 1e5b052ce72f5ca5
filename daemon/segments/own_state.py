"""A watch's own copy of the state it was committed with.

An input's segment watches change their state as rows come (window sums, samples,
pools) while the committed state must stay as it was until the input commits: an input
that fails leaves it untouched. A JSON round trip copies everything, which for a drift
state with a full-covariance baseline and an open window, or a lifecycle state with its
samples, took about 5 and 2 ms an input (D=16, K=8): more than the model's learning of
a 10,000-row input. The parts a watch only ever replaces whole are shared instead.
"""
from __future__ import annotations

import json

__all__ = ["own_copy"]


def own_copy(state: dict | None, shared: tuple[str, ...] = (),
             shallow: tuple[str, ...] = ()) -> dict | None:
    """A copy of ``state`` (JSON-able) to change: the values under ``shared`` are the
    same objects (the watch replaces them whole, never changes them in place), those
    under ``shallow`` are dicts copied one level (their values are replaced, never
    changed), everything else is copied through JSON. Keys keep their order."""
    if state is None:
        return None
    rest = json.loads(json.dumps({k: v for k, v in state.items()
                                  if k not in shared and k not in shallow}))
    return {k: v if k in shared else (None if v is None else dict(v)) if k in shallow
            else rest[k] for k, v in state.items()}

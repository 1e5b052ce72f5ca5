"""An input's segment watches change their own copy of the committed state, never the
committed state itself (an input that fails must leave it as it was), while the parts
they only replace whole are shared rather than copied."""
import copy
import json

import numpy as np

from shoal.config import parse_config
from shoal.core import Mixture
from shoal.daemon.ingest.learning import learn_chunks
from shoal.daemon.segments.monitor import DriftMonitor
from shoal.daemon.segments.own_state import own_copy
from shoal.daemon.segments.segment_life import LifeWatch

MEANS = 20.0 * np.eye(3, 4)


def test_own_copy_shares_copies_one_level_or_copies_through():
    state = {"a": {"x": [1.0, 2.0]}, "baseline": {"covs": [[1.0]]}, "sample": {"0": "AAA"},
             "b": [1, 2], "none": None}
    out = own_copy(state, shared=("baseline",), shallow=("sample", "none"))
    assert list(out) == list(state) and out == state
    assert out["baseline"] is state["baseline"]
    assert out["sample"] is not state["sample"] and out["sample"]["0"] is state["sample"]["0"]
    assert out["a"] is not state["a"] and out["a"]["x"] is not state["a"]["x"]
    assert out["b"] is not state["b"] and out["none"] is None
    assert own_copy(None) is None


def _rows(n, seed):
    """Seeded rows of three unit Gaussians far apart in 4 features (synthetic)."""
    rng = np.random.default_rng(seed)
    return MEANS[rng.integers(0, 3, n)] + rng.standard_normal((n, 4))


def _states(settings):
    """The drift and lifecycle states after 60,000 rows: a baseline, an open window, a
    pool and samples."""
    m = Mixture.from_parameters([1 / 3] * 3, MEANS, np.stack([np.eye(4)] * 3),
                                refresh_rows=settings.learning.refresh_rows)
    watch = DriftMonitor(settings).begin(None, version=1, file="a", unusual_below=-6.0)
    life = LifeWatch(settings, None, version=1, file="a")
    watch.start(stream_offset=0)
    life.start(stream_offset=0)
    m, _ = learn_chunks(settings, m, _rows(60_000, 1), watch, life)
    return m, json.loads(json.dumps(watch.state)), json.loads(json.dumps(life.final_state()))


def test_an_input_leaves_the_committed_states_as_they_were():
    settings = parse_config({"features": ["a", "b", "c", "d"], "segments": 3}, ".")
    m, drift, life_state = _states(settings)
    assert drift["baseline"] is not None and drift["window"] is not None
    assert life_state["sample"] and life_state["pool"]["X"] is not None
    committed = copy.deepcopy((drift, life_state))
    # the next input, taken three times and dropped each time without its states being
    # kept: a short one (rows 60,000-61,000: no decision point, its rows only join the
    # samples), the same population (samples renewed, windows added), then one that
    # moves (a birth and drift alerts)
    same = _rows(30_000, 2)
    moved = np.concatenate([same + [3.0, 0, 0, 0], MEANS[0] + MEANS[1]
                            + np.random.default_rng(3).standard_normal((6_000, 4))])
    for X, acts in ((same[:1000], False), (same, False), (moved, True)):
        watch = DriftMonitor(settings).begin(drift, version=2, file="b", unusual_below=-6.0)
        life = LifeWatch(settings, life_state, version=2, file="b")
        learn_chunks(settings, m, X, watch, life)
        assert bool(watch.alerts and life.events) == acts
        json.dumps((watch.state, life.final_state()))   # as the commit takes them
        assert (drift, life_state) == committed

"""When the lifecycle looks: a segment's split test waits 2, 8, then 32 times its
sample's size of new sampled rows; pairs far apart are looked at every 4th decision
point; a state written before these waits existed loads and goes on."""
import numpy as np

from shoal.config import parse_config
from shoal.core import Mixture
from shoal.daemon.ingest.learning import learn_chunks
from shoal.daemon.segments import segment_life
from shoal.daemon.segments.life_rows import Samples
from shoal.daemon.segments.segment_life import LifeWatch

MEANS = [[0.0, 0.0], [20.0, 0.0]]


def _settings(**lifecycle):
    return parse_config({"features": ["a", "b"], "segments": 2, "lifecycle": lifecycle}, ".")


def _rows(n, seed):
    """Seeded rows of two unit Gaussians far apart, half each (synthetic)."""
    rng = np.random.default_rng(seed)
    return np.asarray(MEANS)[rng.integers(0, 2, n)] + rng.standard_normal((n, 2))


def test_a_segment_that_keeps_passing_is_tested_at_2_8_then_32_times_its_sample(monkeypatch):
    settings = _settings(merge_distance=None)
    m = Mixture.from_parameters([0.5, 0.5], MEANS, np.stack([np.eye(2)] * 2),
                                refresh_rows=settings.learning.refresh_rows)
    life = LifeWatch(settings, None, version=1, file="")
    life.start(stream_offset=1000)
    tests = []
    take = Samples.take

    def recorded(self, sid):   # a test reads its segment's sample first
        key = str(sid)
        tests.append((sid, self.state["fresh"][key], self.state["passed"].get(key, 0)))
        return take(self, sid)

    monkeypatch.setattr(Samples, "take", recorded)
    learn_chunks(settings, m, _rows(300_000, 5), None, life)
    cap = 200   # 50 per feature, at least 200
    per_point = settings.lifecycle.check_rows // 4   # sampled rows between two points
    for sid in (0, 1):
        mine = [(fresh, passed) for s, fresh, passed in tests if s == sid]
        assert [passed for _, passed in mine] == list(range(len(mine)))
        for fresh, passed in mine:
            wait = cap * (2, 8, 32)[min(passed, 2)]
            # at the first decision point at which the wait is reached
            assert wait <= fresh < wait + per_point, (sid, fresh, passed)
        # 300,000 rows, half each, every 4th sampled: 37,500 sampled rows a segment,
        # tests at 400, 2,000 and 8,400, then every 6,400
        assert len(mine) == 7
    assert life.events == []


def test_pairs_far_apart_are_looked_at_every_4th_point(monkeypatch):
    settings = _settings()
    check = settings.lifecycle.check_rows
    looks = []
    apart = segment_life.pairs_apart
    monkeypatch.setattr(segment_life, "pairs_apart",
                        lambda *a, **k: looks.append(a[0].n_rows) or apart(*a, **k))
    for gap, every in ((20.0, 4), (3.0, 1)):
        # 20 sds apart: the bound is far past 4x the merge distance; 3 sds apart: the
        # pair does not merge (Hellinger 0.82 > 0.4) but is within 4x, so looked at
        # every point
        m = Mixture.from_parameters([0.5, 0.5], [[0.0, 0.0], [gap, 0.0]],
                                    np.stack([np.eye(2)] * 2))
        life = LifeWatch(settings, None, version=1, file="")
        life.start(stream_offset=1000)
        looks.clear()
        for point in range(1, 10):
            assert life.at_boundary(m._evolve(n_rows=point * check)) is not None
        assert looks == [point * check for point in range(1, 10, every)]
        assert life.events == []


def test_a_state_from_before_the_waits_loads_and_goes_on():
    # A lifecycle state as written before split tests waited longer and pairs were
    # looked at less often: no "passed", no "apart_until" (format 1 all the same).
    settings = _settings()
    check = settings.lifecycle.check_rows
    m = Mixture.from_parameters([0.5, 0.5], MEANS, np.stack([np.eye(2)] * 2),
                                refresh_rows=settings.learning.refresh_rows)
    m = m._evolve(n_rows=3 * check)
    old = {"format": 1, "offset": 1000, "done_at": 2 * check, "low_since": {},
           "unsettled": {}, "pool": {"X": [[9.0, 9.0]] * 3, "rows": [9000, 9100, 9200]},
           "recent": {"rows": check, "mass": {"0": 2048.0, "1": 2048.0}},
           "sample": {}, "fresh": {"0": 300, "1": 900}, "cool": {}}
    earlier = _rows(2000, 6)   # samples of 250 rows each, packed as the checkpoint keeps them
    labels = (earlier[:, 0] > 10).astype(np.int64)[::4]
    samples = Samples(old, 2)
    samples.add(earlier, 0, labels, np.zeros(len(labels)),
                {0: int(np.sum(labels == 0)), 1: int(np.sum(labels == 1))}, [0, 1])
    samples.pack([0, 1])
    kept = dict(old["sample"])
    life = LifeWatch(settings, old, version=4, file="")
    life.at_boundary(m)
    piece = _rows(check, 7)
    life.observe(m, piece, m.score(piece))
    state = life.final_state()
    assert state["passed"] == {"1": 1}    # segment 1 (900 new rows) was tested, 0 not yet
    assert state["fresh"]["0"] > 300 and state["fresh"]["1"] < 900
    assert state["sample"]["0"] != kept["0"] and state["sample"]["1"] != kept["1"]
    assert state["apart_until"] == 3 * check + 4 * check
    assert state["pool"]["rows"][:3] == [9000, 9100, 9200] and life.events == []

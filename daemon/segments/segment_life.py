"""Segments that are born, retire and merge, decided at fixed points along the stream.

The pipeline hands every piece of rows it learns to a :class:`LifeWatch` (one per
input), and asks it, before each piece, whether a decision point has been reached.
Decision points sit at every multiple of ``lifecycle.check_rows`` rows learned after
warm-up, and pieces never cross them or the model's refresh points, so each row is
tested with the parameters that scored it and every decision is taken on the same
model whatever the cut of the stream into files (a restart redoes the same input
from the same checkpoint and decides the same).

At a decision point, in this order:

retire  a segment whose share of the rows learned between decision points (the sum
        of its responsibilities over them) has been under ``retire_weight`` for
        ``retire_rows`` rows or more is dropped (:func:`shoal.core.lifecycle.retire`).
        The evidence is the recent rows, not the model's weight, which fades with
        the half-life (from 10% to 0.5% takes 4.3 half-lives) and so would keep a
        vanished segment long after its rows stopped;
merge   the two segments that overlap most, if closer than ``merge_distance``, are
        merged by adding their statistics; the older id survives
        (:func:`shoal.core.lifecycle.merge`);
birth   rows no segment explains (chi-square bound) sit in a bounded pool; when at
        least ``birth_rows`` of them form one compact group
        (:func:`shoal.core.lifecycle.compact_group`) that widening a segment does not
        explain as well (:func:`shoal.core.lifecycle.widening_explains`) a segment is
        born from it with a new id (:func:`shoal.core.lifecycle.add_component`);
split   every fourth row goes to its segment's sample; when two Gaussians explain a
        segment's renewed sample better than one, by BIC
        (:func:`shoal.core.lifecycle.split_test`), and the parts would not merge
        back, it splits: the larger part keeps the id (:func:`shoal.core.lifecycle.split`).
        A segment's test waits for twice its sample's size of new rows, then four
        times longer after each test it passes, up to 32 times (``_SPLIT_WAITS``).

Pairs that a cheap bound puts far apart are looked at every 4th decision point only
(``_APART_POINTS``). Between decision points a piece is sampled and its possibly
unexplained rows kept aside in a few array steps; the exact work waits until a
decision needs it (:mod:`~shoal.daemon.segments.life_rows`).

A pair that split or merged is not merged or split back for
``lifecycle.cool_down_rows`` rows.

The pool and the bookkeeping travel in the checkpoint's ``extra["lifecycle"]`` and are
committed with the model. Each event becomes a segment-history entry and an alert
(``kind: lifecycle``); the drift baseline drops a retired or merged-away id at once
and takes a born segment in once it has settled (``lifecycle.settle_rows`` rows).
"""
from __future__ import annotations

import logging

import numpy as np

from shoal.config import Settings
from shoal.core import Mixture, ModelError
from shoal.core.lifecycle import (OVERLAP_MEASURES, add_component, compact_group, merge,
                                  overlapping_pairs, pairs_apart, recent_share, retire, split,
                                  split_test, unexplained_scored, widening_explains)
from shoal.core.piece_tallies import PieceTallies, piece_tallies
from shoal.daemon.runtime.logs import log_event
from shoal.daemon.segments.life_rows import SAMPLE_STRIDE, Samples, UnexplainedPool, first_sampled
from shoal.daemon.segments.own_state import own_copy
from shoal.daemon.segments.life_events import (
    describe,
    history_with_events,
    lifecycle_alert_id,
    lifecycle_event,
    log_lifecycle_alerts,
)
from shoal.daemon.state.store import HistoryRow

__all__ = ["LifeWatch", "lifecycle_alert_id", "STATE_FORMAT"]

STATE_FORMAT = 1
_MIN_BIRTH_WEIGHT, _MAX_BIRTH_WEIGHT = 1e-3, 0.5
_SPLIT_WAITS = (2, 8, 32)
"""A split test waits for this many times the sample's size of new sampled rows: twice,
then four times longer after each test passed (at D=16, 32 times is 64,000 rows of the
segment). A split is a slow structural change, and a segment found one Gaussian test
after test is the likeliest to stay one; a new segment, the parts of a split and the
survivor of a merge start again at twice, so a model that lumps two groups, or a
segment that just changed, is tested as soon as its sample has renewed."""
_APART_MARGIN, _APART_POINTS = 4.0, 4
"""When the means-and-traces bound puts every pair at 4 times the merge distance or more
(Bhattacharyya), pairs are looked at again at the 4th decision point only: segments move
gradually, and for the bound to drop fourfold two means must come halfway together (or
spreads grow four times). After any lifecycle event they are looked at the next point."""
_BIRTH_ROWS_PER_FEATURE = 20
"""A group is born only from at least this many rows per feature (besides
``birth_rows``): its mean is then known to about ``sqrt(D / n) = 0.22`` of its sds
(Mahalanobis), the rms error of a mean from ``n`` rows."""


class LifeWatch:
    """Lifecycle decisions for the rows of one input: it pools the rows no segment
    explains and samples every segment's rows as pieces are learned, and at each
    decision point retires, merges, gives birth and splits, telling the drift watch
    of the input which segments came and went. Its ``state`` (the checkpoint's
    ``extra["lifecycle"]``), ``events`` (segment history) and ``alerts`` go to the
    commit with the model."""

    # the model's FeatureTransforms (set by the pipeline): summaries give a transformed
    # feature's median and central 68% interval in the data's units
    transforms = None

    def __init__(self, settings: Settings, state: dict | None, *, version: int, file: str):
        self.settings = settings
        self.cfg = settings.lifecycle
        self.features = list(settings.features)
        self.version = version
        self.file = file
        if state is not None and state.get("format") != STATE_FORMAT:
            raise ValueError(f"lifecycle state has format {state.get('format')!r}")
        # the pool is read once and replaced at the end; the samples are replaced one by one
        self.state = own_copy(state, shared=("pool",), shallow=("sample",))
        self.events: list[dict] = []
        self.alerts: list[tuple[str, dict]] = []
        self._samples: Samples | None = None
        self._pool: UnexplainedPool | None = None
        self._waits: list[int] = []   # fresh sampled rows each split test needs
        # the segment ids of the model that saw the last piece, their keys (str), and
        # the ids the samples were last pruned to
        self._live: list[int] | None = None
        self._keyed: tuple[list[int] | None, list[str]] = (None, [])
        self._known: list[int] | None = None
        self._due = True   # some segment may have come to its split test's wait
        if self.state is not None:
            self._load()

    # -- state -----------------------------------------------------------------------
    def start(self, stream_offset: int) -> None:
        """A new model: stream rows are ``stream_offset`` + rows learned after warm-up."""
        self.state = {"format": STATE_FORMAT, "offset": int(stream_offset), "done_at": 0,
                      "low_since": {}, "unsettled": {}, "pool": {"X": [], "rows": []},
                      "recent": {"rows": 0, "mass": {}}, "sample": {}, "fresh": {},
                      "passed": {}, "cool": {}}
        self._load()

    def _ensure(self) -> dict:
        if self.state is None:   # a model made before lifecycle watching: count from here
            self.start(self.settings.warmup_rows)
        return self.state

    def _load(self) -> None:
        d = len(self.features)
        self._samples = Samples(self.state, d)
        self._waits = [self._samples.cap * wait for wait in _SPLIT_WAITS]
        self._pool = UnexplainedPool(self.state["pool"], d, self.cfg.unexplained_quantile,
                                     self.cfg.pool_rows)

    def final_state(self) -> dict:
        st = self._ensure()
        st["pool"] = self._pool.to_state()
        self._samples.pack(self._live)
        return st

    # -- pieces ----------------------------------------------------------------------
    def rows_to_boundary(self, mixture: Mixture) -> int:
        """Rows the next piece may hold: it crosses no decision point and no refresh point
        (so the whole piece is scored with one parameter set, the one it is tested with)."""
        n = int(mixture.n_rows)
        c, r = self.cfg.check_rows, int(mixture.refresh_rows)
        return min(c - n % c, r - n % r)

    def tally_bounds(self, before: Mixture) -> tuple[float, int]:
        """The log-density under which rows that ``before`` scores may be unexplained, and
        a piece's first sampled row: what :meth:`observe` needs tallied."""
        self._ensure()
        return self._pool.near_bound(before), first_sampled(before.n_rows)

    def observe(self, before: Mixture, X: np.ndarray, scores,
                tallies: PieceTallies | None = None) -> None:
        """Sample a learned piece and pool its rows that no segment explains (both wait
        until a decision needs them: :mod:`~shoal.daemon.segments.life_rows`); ``before``
        is the model that scored them (its ``n_rows`` is the piece's first learned row),
        ``scores`` its scores with rows that miss a feature at log-density ``+inf``
        (``complete_only``): those are neither pooled nor sampled; ``tallies`` its
        :func:`~shoal.core.piece_tallies.piece_tallies` under :meth:`tally_bounds`."""
        st = self._ensure()
        first = first_sampled(before.n_rows)
        if tallies is None:
            tallies = piece_tallies(scores.log_density, scores.component, X, before.center,
                                    before.n_components, first=first, stride=SAMPLE_STRIDE,
                                    near_below=self._pool.near_bound(before), sample=True)
        ids = self._live = before.ids.tolist()
        # sampled rows of each segment, those that miss a feature too (they count
        # towards a split test's wait, but do not go into a sample)
        fresh = tallies.sampled.tolist()
        # each segment's responsibility total: the drift watch's moments carry it
        mass = (scores.resp.T.sum(axis=1) if scores.moments is None
                else scores.moments.T).tolist()
        recent = st.setdefault("recent", {"rows": 0, "mass": {}})
        recent["rows"] += len(X)
        by_id, sampled = recent["mass"], st.setdefault("fresh", {})
        passed, waits, last = st.setdefault("passed", {}), self._waits, len(self._waits) - 1
        counts = {}
        for sid, key, m, c in zip(ids, self._keys(ids), mass, fresh):
            by_id[key] = by_id.get(key, 0.0) + m
            if c:
                sampled[key] = total = sampled.get(key, 0) + c
                counts[sid] = c
                if total >= waits[min(passed.get(key, 0), last)]:
                    self._due = True   # a split test may be due (if not cooling down)
        if counts:
            self._samples.add(X, first, scores.segment[first::SAMPLE_STRIDE],
                              tallies.sample_ld, counts, ids, rows=tallies.sample_rows)
        self._pool.add(before, X, scores, tallies.near)

    def _keys(self, ids: list[int]) -> list[str]:
        """The state's keys (``str``) of segment ids, kept while the ids stay the same."""
        if ids != self._keyed[0]:
            self._keyed = (ids, [str(sid) for sid in ids])
        return self._keyed[1]

    # -- decision points -------------------------------------------------------------
    def at_boundary(self, mixture: Mixture, watch=None) -> Mixture:
        """At a decision point not yet taken, retire, merge, give birth and split; returns
        the model to learn on with."""
        st = self._ensure()
        n = int(mixture.n_rows)
        if n == 0 or n % self.cfg.check_rows or st["done_at"] == n:
            return mixture
        st["done_at"] = n
        self._pool.trim(n - self.cfg.pool_span_rows)
        mixture = self._retire(mixture, n, watch)
        if n >= st.get("apart_until", 0):   # pairs far apart wait (_APART_POINTS)
            mixture = self._merge(mixture, n, watch)
        mixture = self._birth(mixture, n)
        if self._due or mixture.ids.tolist() != self._known:
            mixture = self._split(mixture, n, watch)
        if st["unsettled"]:
            self._settle(mixture, n, watch)
        self._live = mixture.ids.tolist()
        return mixture

    def _retire(self, mixture: Mixture, n: int, watch) -> Mixture:
        st = self.state
        recent = st.get("recent") or {"rows": 0, "mass": {}}
        st["recent"] = {"rows": 0, "mass": {}}
        rows, floor = recent["rows"], self.cfg.retire_weight
        if not st["low_since"] and rows > 0 and all(
                recent["mass"].get(key, 0.0) / rows >= floor
                for key in self._keys(mixture.ids.tolist())):
            return mixture   # no segment under the floor, now or before: nothing to follow
        live = {str(sid) for sid in mixture.ids.tolist()}
        low = {sid: at for sid, at in st["low_since"].items() if sid in live}
        share = {}
        if recent["rows"] > 0:
            start = n - recent["rows"]
            for sid in mixture.ids.tolist():
                share[sid] = recent["mass"].get(str(sid), 0.0) / recent["rows"]
                if share[sid] < self.cfg.retire_weight:
                    low.setdefault(str(sid), start)
                else:
                    low.pop(str(sid), None)
        due = sorted((share.get(sid, float(mixture.weights[k])), sid)
                     for k, sid in enumerate(mixture.ids.tolist())
                     if str(sid) in low and n - low[str(sid)] >= self.cfg.retire_rows)
        for weight, sid in due:
            if mixture.n_components < 2:
                break
            since = low[str(sid)]
            k = int(np.flatnonzero(mixture.ids == sid)[0])
            mean, sd = mixture.data_means()[k], mixture.data_stds()[k]
            mixture = retire(mixture, sid)
            low.pop(str(sid), None)
            st["unsettled"].pop(str(sid), None)
            self._drop_baseline(watch, [sid], "retired")
            self._event("retired", sid, n, weight=weight, mean=mean, spread=sd,
                        under_since_row=self.state["offset"] + since,
                        summary=(f"segment {sid} retired: its share of recent rows "
                                 f"stayed under {self.cfg.retire_weight:.2%} for "
                                 f"{n - since} rows (last {weight:.2%}); its rows go "
                                 f"to the others; "
                                 f"it was {self._describe(mean, sd)}"))
        st["low_since"] = low
        return mixture

    def _merge(self, mixture: Mixture, n: int, watch) -> Mixture:
        bound = self.cfg.merge_distance
        if bound is None or mixture.n_components < 2:
            return mixture
        if pairs_apart(mixture, bound, self.cfg.merge_measure, _APART_MARGIN):
            # far apart: the model moves a little per decision point, so look again
            # only at the _APART_POINTS-th point from here
            self.state["apart_until"] = n + _APART_POINTS * self.cfg.check_rows
            return mixture
        cool = self._cooling(n)
        pairs = [p for p in overlapping_pairs(mixture, bound, self.cfg.merge_measure)
                 if f"{p[0]}|{p[1]}" not in cool]
        if not pairs:
            return mixture
        keep, drop, distance = pairs[0]
        cool[str(keep)] = n + self.cfg.cool_down_rows   # no split of the merged segment
        self.state.setdefault("passed", {}).pop(str(keep), None)
        means, sds = mixture.data_means(), mixture.data_stds()
        ka, kb = (int(np.flatnonzero(mixture.ids == i)[0]) for i in (keep, drop))
        before = {str(sid): {"weight": float(mixture.weights[k]), "mean": means[k].tolist(),
                             "spread": sds[k].tolist()}
                  for sid, k in ((keep, ka), (drop, kb))}
        mixture = merge(mixture, keep, drop)
        k = int(np.flatnonzero(mixture.ids == keep)[0])
        mean, sd = mixture.data_means()[k], mixture.data_stds()[k]
        self.state["unsettled"].pop(str(drop), None)
        self.state["low_since"].pop(str(drop), None)
        self._drop_baseline(watch, [drop], "merged")
        measure = self.cfg.merge_measure
        self._event("merged", drop, n, into=keep, distance=distance, measure=measure,
                    before=before, weight=float(mixture.weights[k]), mean=mean, spread=sd,
                    summary=(f"segment {drop} merged into segment {keep} ({measure} distance "
                             f"{distance:.3f} < {bound:g}); merged segment "
                             f"{self._describe(mean, sd)}, weight {mixture.weights[k]:.1%}"))
        return mixture

    def _cooling(self, n: int) -> dict:
        """Pairs ("a|b", no merge) and segments ("a", no split) still cooling down."""
        st = self.state
        cool = st.setdefault("cool", {})
        if cool:
            st["cool"] = cool = {k: until for k, until in cool.items() if until > n}
        return cool

    def _split(self, mixture: Mixture, n: int, watch) -> Mixture:
        """Split the first segment whose renewed sample (the rows it still holds) two
        Gaussians explain better than one (by BIC), if the two parts would not merge
        back; one split per decision point."""
        st = self.state
        ids = mixture.ids.tolist()
        if ids != self._known:   # segments that left take their samples along
            live = {str(sid) for sid in ids}
            for name in ("fresh", "passed"):
                st[name] = {key: v for key, v in st.setdefault(name, {}).items() if key in live}
            self._samples.keep_only(live)
            self._known = ids
        cap = self._samples.cap
        cool = self._cooling(n)
        fresh, passed = st["fresh"], st["passed"]
        # a test is due once the sample's size times the wait (_SPLIT_WAITS) came in
        waits, last = self._waits, len(self._waits) - 1
        due = [sid for sid, key in zip(ids, self._keys(ids))
               if fresh.get(key, 0) >= waits[min(passed.get(key, 0), last)]]
        self._due = bool(due)   # until a piece brings a segment to its wait
        due = [sid for sid in due if str(sid) not in cool]
        if not due or mixture.n_components >= self.cfg.max_segments:
            return mixture
        bound = self.cfg.merge_distance
        q = self.cfg.unexplained_quantile
        for sid in due:
            key = str(sid)
            rows = self._samples.take(sid)
            if len(rows) < cap:
                continue
            fresh[key] = 0
            passed[key] = passed.get(key, 0) + 1
            # the rows the segment still holds (a birth or merge since may have
            # taken some elsewhere) and explains: rows far from every segment are
            # the pool's, for a birth
            scores = mixture.score(rows)
            held = scores.segment == sid
            held[unexplained_scored(mixture, scores.resp, scores.log_density, q)] = False
            rows = rows[held]
            if len(rows) < cap // 2:
                continue
            parts = split_test(rows, covariance=mixture.covariance,
                               seed=self.settings.seed,
                               reg_covar=self.settings.learning.reg_covar)
            if parts is None:
                continue
            fractions, means, covs, gain = parts
            if bound is not None:
                apart = OVERLAP_MEASURES[self.cfg.merge_measure](means[0], covs[0],
                                                                 means[1], covs[1])
                if apart < bound:
                    continue   # the merge rule would put them back together
            k = int(np.flatnonzero(mixture.ids == sid)[0])
            before = {"weight": float(mixture.weights[k]), "mean": mixture.data_means()[k].tolist(),
                      "spread": mixture.data_stds()[k].tolist()}
            try:
                mixture = split(mixture, sid, fractions, means, covs)
            except ModelError as exc:
                log_event("segment_split_skipped", logging.WARNING, segment=sid,
                          model_version=self.version, detail=str(exc))
                continue
            new = int(mixture.ids[-1])
            cool[f"{sid}|{new}"] = n + self.cfg.cool_down_rows
            for part in (sid, new):
                self._samples.restart(part)
            for part in (key, str(new)):
                fresh[part] = 0
                passed.pop(part, None)
                st["unsettled"][part] = n
            self._drop_baseline(watch, [sid], "split")
            ka = int(np.flatnonzero(mixture.ids == sid)[0])
            means_now, sds_now = mixture.data_means(), mixture.data_stds()
            self._event("split", sid, n, new=new, gain=gain, before=before,
                        weight=float(mixture.weights[ka]), mean=means_now[ka],
                        spread=sds_now[ka],
                        new_weight=float(mixture.weights[-1]), new_mean=means_now[-1].tolist(),
                        new_spread=sds_now[-1].tolist(),
                        summary=(f"segment {sid} split in two (BIC gain {gain:.1f}): it keeps "
                                 f"{self._describe(means_now[ka], sds_now[ka])}, weight "
                                 f"{mixture.weights[ka]:.1%}; new segment {new} takes "
                                 f"{self._describe(means_now[-1], sds_now[-1])}, weight "
                                 f"{mixture.weights[-1]:.1%}"))
            return mixture
        return mixture

    def _birth(self, mixture: Mixture, n: int) -> Mixture:
        cfg = self.cfg
        d = len(self.features)
        # fewer rows than compact_group needs, even if every waiting row were
        # unexplained: no group (and no widths to measure)
        need = max(cfg.birth_rows, _BIRTH_ROWS_PER_FEATURE * d, d + 2)
        pool = self._pool
        if len(pool.X) + pool.waiting_rows < need or mixture.n_components >= cfg.max_segments:
            return mixture
        pool.settle()
        pool.trim(n - cfg.pool_span_rows)   # rows of the waiting pieces that are too old
        if len(pool.X) < need:
            return mixture
        covs = mixture.data_covariance_matrices()
        widest = max(float(np.exp(0.5 * np.linalg.slogdet(c)[1] / mixture.n_features))
                     for c in covs)
        group = compact_group(pool.X,
                              min_rows=max(cfg.birth_rows, _BIRTH_ROWS_PER_FEATURE * len(self.features)),
                              max_sd=cfg.birth_max_spread * widest,
                              threshold=cfg.unexplained_quantile, seed=self.settings.seed,
                              reg_covar=self.settings.learning.reg_covar)
        if group is None:
            return mixture
        mean, cov, members = group
        count = int(members.sum())
        widened, gain = widening_explains(mixture, pool.X[members], mean, cov,
                                          cfg.unexplained_quantile)
        if widened is None:
            widened, gain = pool.ring_widening(mixture, mean, count,
                                               self.settings.learning.reg_covar)
        if widened is not None:
            log_event("segment_birth_declined", logging.DEBUG, rows=count, segment=widened,
                      detail=f"segment {widened} widened explains the group as well "
                             f"(BIC gain of a new group {gain:.1f}; nan: centred on it)")
            return mixture
        weight = float(np.clip(recent_share(pool.rows[members], n),
                               _MIN_BIRTH_WEIGHT, _MAX_BIRTH_WEIGHT))
        try:
            mixture = add_component(mixture, weight, mean, cov)
        except ModelError as exc:   # e.g. a group too extreme for float64: no birth
            log_event("segment_birth_skipped", logging.WARNING, rows=count,
                      model_version=self.version, detail=str(exc))
            return mixture
        sid = int(mixture.ids[-1])
        pool.remove(members)
        self.state["unsettled"][str(sid)] = n
        sd = np.sqrt(np.diag(cov))
        self._event("born", sid, n, weight=weight, mean=mean, spread=sd, rows=count,
                    summary=(f"segment {sid} born from {count} unexplained rows "
                             f"(about {weight:.1%} of recent rows): "
                             f"{self._describe(mean, sd)}"))
        return mixture

    def _settle(self, mixture: Mixture, n: int, watch) -> None:
        """Born segments that have settled join the drift baseline."""
        unsettled = self.state["unsettled"]
        if not unsettled:
            return
        ready = sorted(int(sid) for sid, at in unsettled.items()
                       if n - at >= self.cfg.settle_rows)
        if not ready:
            return
        for sid in ready:
            del unsettled[str(sid)]
        present = watch.adopt_segments(mixture, ready) if watch is not None else []
        if present:
            log_event("drift_baseline_adopted", segments=present, model_version=self.version)

    def _drop_baseline(self, watch, ids, why: str) -> None:
        """A segment that left: out of the drift baseline and its drift alerts cleared."""
        if watch is not None:
            watch.drop_segments(ids, why)

    # -- events ----------------------------------------------------------------------
    def _describe(self, mean, sd) -> str:
        return describe(self.features, self.transforms, mean, sd)

    def _event(self, kind: str, sid: int, n: int, **fields) -> None:
        self.state.pop("apart_until", None)   # segments changed: look at pairs next time
        lifecycle_event(self, kind, sid, n, **fields)

    def history(self, rows: list[HistoryRow]) -> list[HistoryRow]:
        """The segment history of this version with the events marked; a segment that
        left gets a row of its own (weight 0, its last mean and spread)."""
        return history_with_events(self.events, rows)

    def log_events(self, model_version: int) -> None:
        """One log line per event; called once they are committed."""
        log_lifecycle_alerts(self.alerts, model_version)

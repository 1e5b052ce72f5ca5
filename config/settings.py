"""Typed settings: one frozen dataclass per section of the YAML file.

The defaults here and the shipped ``default.yaml`` say the same thing (a test
checks it). Each field's ``metadata`` carries what the loader needs to
validate it: ``min``/``max`` bounds, ``choices``, and ``doc`` (one line).
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType
from typing import Mapping

from shoal.core.covariance import COVARIANCE_TYPES   # one list, the core's families
from shoal.core.transforms import TRANSFORMS

__all__ = [
    "SegmentCount",
    "WatchSettings",
    "LimitSettings",
    "OutputSettings",
    "LearningSettings",
    "HttpSettings",
    "DriftBounds",
    "BoundOverride",
    "DriftSettings",
    "WebhookSettings",
    "AlertSettings",
    "LifecycleSettings",
    "RetentionSettings",
    "Settings",
    "COVARIANCE_TYPES",
    "OUTPUT_FORMATS",
    "LOG_LEVELS",
    "TRANSFORM_NAMES",
]

OUTPUT_FORMATS = ("parquet", "csv")
OVERLAP_MEASURES = ("hellinger", "bhattacharyya")
LOG_LEVELS = ("debug", "info", "warning", "error")
TRANSFORM_NAMES = TRANSFORMS            # one list, the core's transforms


def _f(default, doc, **checks):
    """A dataclass field with validation metadata."""
    if isinstance(default, (list, dict, set)):
        raise TypeError("mutable default")  # settings are immutable: use tuples
    return field(default=default, metadata={"doc": doc, **checks})


@dataclass(frozen=True)
class SegmentCount:
    """The ``segments`` setting: how many segments the model has. Fixed when ``min ==
    max`` (a single integer in the file); otherwise the warm-up fits every count from
    ``min`` to ``max`` and keeps the one with the lowest BIC."""

    min: int = _f(4, "fewest segments", min=1, max=1000)
    max: int = _f(4, "most segments", min=1, max=1000)

    @property
    def fixed(self) -> bool:
        """True when the count is fixed rather than chosen at warm-up."""
        return self.min == self.max


@dataclass(frozen=True)
class WatchSettings:
    """The ``watch`` section: how the inbox is watched and when a dropped file counts as
    ready. File events (or polling, on network filesystems) put names on a bounded queue;
    a periodic rescan catches events that were missed; a file is read only once it has
    stayed unchanged for ``settle_seconds``, and the worker counts as stuck after
    ``stall_seconds`` without progress.
    """

    settle_seconds: float = _f(
        1.0, "a file written in place is read once unchanged this long", min=0.0, max=3600.0)
    rescan_seconds: float = _f(
        5.0, "full listing of the inbox this often, for events that were missed",
        min=0.05, max=86400.0)
    ignore: tuple[str, ...] = _f(
        ("*.tmp", "*.part", "*.partial", "*.swp", "*~", ".*"),
        "glob patterns of names never read (temporary and hidden files)")
    recursive: bool = _f(False, "also take inputs in sub-folders of the inbox (named by their "
                                "path relative to it; a sub-folder whose name matches ignore "
                                "is passed over)")
    polling: bool = _f(False, "poll the folder instead of using OS events (network filesystems)")
    poll_seconds: float = _f(1.0, "polling interval when polling is on", min=0.05, max=3600.0)
    queue_size: int = _f(10000, "bound of the queue between file events and the worker",
                         min=1, max=10_000_000)
    stall_seconds: float = _f(
        60.0, "the worker counts as stuck (unhealthy; no systemd watchdog ping) after this "
              "long without progress", min=1.0, max=86400.0)
    incomplete_seconds: float = _f(
        600.0, "a Parquet file without its footer (still being written) waits this long "
               "after its last change, then is quarantined as truncated", min=0.0,
        max=86400.0)


@dataclass(frozen=True)
class LimitSettings:
    """The ``limits`` section: the bounds past which an input is quarantined rather
    than read (bytes on disk, rows, columns, decoded bytes, gzip inflation), so that a
    hostile or mistaken file cannot exhaust memory, and how many crashes on one input
    set it aside unread.
    """

    max_file_bytes: int = _f(4 * 1024**3, "larger inputs are quarantined", min=1)
    max_rows: int = _f(20_000_000, "inputs with more rows are quarantined", min=1)
    max_columns: int = _f(10_000, "inputs with more columns are quarantined", min=1)
    max_data_bytes: int = _f(
        2 * 1024**3, "inputs that decode to more bytes (CSV text after decompression, "
                     "Parquet column data as declared and as decoded) are quarantined", min=1)
    max_gzip_ratio: float = _f(
        100.0, "a .csv.gz input that inflates to more than this many times its compressed "
               "bytes (past the first 16 MiB) is quarantined as a decompression bomb", min=1.0)
    max_attempts: int = _f(
        3, "an input the process ended on (a crash no handler catches) this many times is "
           "quarantined, unread, at the next start", min=1, max=1000)


@dataclass(frozen=True)
class OutputSettings:
    """The ``output`` section: the labels files written for each committed input
    (their format, the quantile of log-density below which a row is marked unusual, an
    optional column of the segments' names) and whether committed inputs leave the
    inbox.
    """

    format: str = _f("parquet", "labels file format", choices=OUTPUT_FORMATS)
    unusual_quantile: float = _f(
        0.01, "rows whose log-density is below this quantile are marked unusual",
        min=0.0, max=0.5)
    keep_inputs: bool = _f(False, "leave committed inputs in the inbox instead of moving them "
                                  "to processed/")
    segment_names: bool = _f(False, "add a segment_name column (the operator's name of each "
                                    "row's segment, set with `shoal name`) to the labels")


@dataclass(frozen=True)
class InputSettings:
    """The ``input`` section: how CSV inputs are written (delimiter, decimal mark,
    column names when there is no header line) and what happens to a malformed row:
    the whole input is quarantined, or the row is skipped and recorded in a sidecar.
    """

    bad_rows: str = _f("quarantine", "a CSV row with the wrong number of fields or a feature "
                       "value that is no number: quarantine the input, or skip the row "
                       "(counted, its line in a sidecar next to the labels)",
                       choices=("quarantine", "skip"))
    delimiter: str = _f(",", "the CSV field delimiter (.tsv files: a tab)",
                        choices=(",", ";", "\t", "|", " "))
    decimal: str = _f(".", "the decimal mark of CSV numbers ('.' or ',')", choices=(".", ","))
    columns: tuple[str, ...] = _f((), "CSV files without a header line: the names of their "
                                      "columns in order (empty: the first line is a header)")


@dataclass(frozen=True)
class LearningSettings:
    """The ``learning`` section: how the model is updated after warm-up (the stepwise
    EM step's decay, the covariance regularisation, k-means++ restarts, rows per update
    and per parameter refresh), how many checkpoints are kept, and how many features a
    row needs present to be labelled and learned from.
    """

    step_exponent: float = _f(
        0.7, "without half_life_rows, the stepwise EM step decays as "
             "(row + offset)^-exponent", min=0.5, max=1.0,
        min_open=True)
    reg_covar: float = _f(1e-6, "added to covariance diagonals (standardised units)",
                          min=0.0, max=1.0)
    n_init: int = _f(5, "k-means++ restarts at warm-up", min=1, max=100)
    chunk_rows: int = _f(65536, "rows per stepwise update inside one input", min=1,
                         max=10_000_000)
    refresh_rows: int = _f(
        4096, "the model's parameters are derived anew from its statistics at every "
              "multiple of this many rows learned after warm-up (a slow stream sets fewer); "
              "fixed once a model exists in the state folder", min=1, max=10_000_000)
    checkpoints_kept: int = _f(20, "model checkpoints kept in the state store", min=1)
    min_observed: int | None = _f(
        None, "rows with fewer features present (not null, NaN or empty) get no segment and "
        "are not learned from (null: half the features, rounded up)", min=1)

    def observed_floor(self, n_features: int) -> int:
        """``min_observed`` cleared for ``n_features`` features."""
        if self.min_observed is not None:
            return int(self.min_observed)
        return max(1, (n_features + 1) // 2)


@dataclass(frozen=True)
class HttpSettings:
    """The ``http`` section: the optional status endpoint (status page, metrics and
    health), off unless a port is given, listening on loopback by default, with a bound
    on open connections and on how long an idle one is kept.
    """

    address: str = _f("127.0.0.1", "address the status endpoint listens on (loopback by default)")
    port: int | None = _f(None, "port of the status endpoint (null: off; 0: any free port)",
                          min=0, max=65535)
    max_connections: int = _f(
        64, "open connections at most; past it a new one closes the oldest idle one",
        min=1, max=10000)
    idle_seconds: float = _f(10.0, "a connection that sends no complete request this long "
                                   "is closed", min=0.1, max=3600.0)


@dataclass(frozen=True)
class DriftBounds:
    """How far a segment may move from its baseline before it counts as drift.

    Each statistic is measured over one evaluation window of rows against the
    baseline; null switches a statistic off.
    """

    mean_shift: float | None = _f(
        0.3, "segment mean moved this many baseline standard deviations (Mahalanobis)",
        min=0.0, min_open=True)
    spread_ratio: float | None = _f(
        1.5, "segment spread grew or shrank by this factor (geometric mean of the sd ratios)",
        min=1.0, min_open=True)
    weight_change: float | None = _f(
        0.05, "segment's share of rows changed by this much (absolute)", min=0.0, max=1.0,
        min_open=True)
    missing_share: float | None = _f(
        0.2, "share of a segment's rows missing a feature changed by this much (absolute)",
        min=0.0, max=1.0, min_open=True)
    fit_drop: float | None = _f(
        0.5, "mean log-density per row fell this far below the baseline level (nats/row)",
        min=0.0, min_open=True)
    feature_shift: float | None = _f(
        None, "one feature's mean moved this many baseline sds (null: off; set it per "
              "feature in overrides)", min=0.0, min_open=True)


@dataclass(frozen=True)
class BoundOverride:
    """One entry of ``drift.overrides``: bounds for one segment, one feature, or one
    feature of one segment, in place of ``drift.bounds``. A key left null keeps the
    general bound; ``feature`` is the only way to set a ``feature_shift`` bound for a
    single feature."""

    segment: int | None = _f(None, "segment id the override applies to (null: every segment)",
                             min=0)
    feature: str | None = _f(None, "feature whose feature_shift bound this sets (null: none)")
    mean_shift: float | None = _f(None, "see drift.bounds", min=0.0, min_open=True)
    spread_ratio: float | None = _f(None, "see drift.bounds", min=1.0, min_open=True)
    weight_change: float | None = _f(None, "see drift.bounds", min=0.0, max=1.0,
                                     min_open=True)
    missing_share: float | None = _f(None, "see drift.bounds", min=0.0, max=1.0,
                                     min_open=True)
    feature_shift: float | None = _f(None, "see drift.bounds", min=0.0, min_open=True)


@dataclass(frozen=True)
class DriftSettings:
    """The ``drift`` section: how segments are compared with their baseline and when
    an alert is raised and cleared. Statistics are evaluated over windows of
    ``window_rows`` rows once ``settle_rows`` rows have been learned; a move counts when
    it passes its bound and ``noise_multiple`` times its estimation noise for
    ``persist`` windows, and clears below ``resolve_fraction`` of the bound; an optional
    time column gives alerts their time ranges.
    """

    enabled: bool = _f(True, "compare segments with their baseline and raise alerts")
    window_rows: int = _f(4096, "rows per evaluation window (the unit of persistence); "
                                "best a multiple of learning.refresh_rows",
                          min=1, max=10_000_000)
    settle_rows: int = _f(
        20000, "rows learned after warm-up before the baseline is taken",
        min=0, max=1_000_000_000)
    bounds: DriftBounds = _f(DriftBounds(), "bounds of each statistic")
    overrides: tuple[BoundOverride, ...] = _f(
        (), "per-segment or per-feature bounds, e.g. [{segment: 3, mean_shift: 1.0}]")
    noise_multiple: float = _f(
        3.0, "a move must also exceed this many times its estimation noise", min=0.0)
    persist: int = _f(3, "consecutive windows past a bound before an alert is raised", min=1,
                      max=1000)
    resolve_fraction: float = _f(
        0.8, "a raised alert clears once the statistic is back under this share of its "
             "bound", min=0.0, max=1.0, min_open=True)
    resolve_persist: int = _f(3, "... for this many consecutive windows", min=1, max=1000)
    cool_down_windows: int = _f(
        5, "after an alert clears, the same segment and statistic cannot be raised again for "
           "this many windows", min=0, max=1_000_000)
    critical_multiple: float = _f(
        2.0, "severity is critical when the value is at least this multiple of its bound "
             "(spread_ratio: this power)", min=1.0)
    time_column: str | None = _f(
        None, "a passthrough column holding each row's time; alerts give time ranges "
              "from it")
    time_unit: str | None = _f(
        None, "the unit of epoch times in time_column when they are numbers: s, ms, us or "
              "ns (unset: inferred from their size, and logged)",
        choices=("s", "ms", "us", "ns"))
    time_format: str | None = _f(
        None, "a strptime format for time_column's text (e.g. '%m/%d/%Y %H:%M:%S'); "
              "unset: ISO 8601")


@dataclass(frozen=True)
class WebhookSettings:
    """One entry of ``alerts.webhooks``: an HTTP endpoint that receives each alert as a
    signed JSON POST, where its signing secret is read from (a file or an environment
    variable), and how failed deliveries are retried with exponential backoff before
    the alert waits for the next start.
    """

    url: str = _f("", "http:// or https:// URL that receives each alert as a JSON POST",
                  required=True)
    secret_file: Path | None = _f(
        None, "file holding the signing secret, whsec_<base64 key> (a secret without the "
              "prefix is used as its bytes; relative: from the config's folder)")
    secret_env: str | None = _f(None, "environment variable holding the signing secret")
    timeout_seconds: float = _f(5.0, "deadline of one whole request, connect to last byte",
                                min=0.1, max=300.0)
    retries: int = _f(8, "failed attempts retried this many times before the alert waits "
                         "for the next start", min=0, max=1000)
    backoff_seconds: float = _f(1.0, "first retry delay; doubles each retry, with jitter",
                                min=0.0, max=3600.0)
    max_backoff_seconds: float = _f(300.0, "longest retry delay", min=0.0, max=86400.0)


@dataclass(frozen=True)
class AlertSettings:
    """The ``alerts`` section: where alerts are delivered. Every alert is appended to
    a JSON-lines file (by default in the state folder) and POSTed to each configured
    webhook whose host is in ``allow_hosts``.
    """

    file: Path | None = _f(
        None, "JSON-lines file every alert is appended to (null: alerts.jsonl in the state "
              "folder)")
    webhooks: tuple[WebhookSettings, ...] = _f((), "HTTP endpoints alerts are POSTed to")
    allow_hosts: tuple[str, ...] = _f(
        (), "host names webhooks may be sent to; any other host is refused")


@dataclass(frozen=True)
class LifecycleSettings:
    """The ``lifecycle`` section: segments that are born, retire, merge and split as the
    population changes, decided every ``check_rows`` learned rows. Rows no segment
    explains are pooled and a compact group of them becomes a new segment; a segment
    whose share of recent rows stays small retires; two segments closer than
    ``merge_distance`` merge; a pair just split or merged is left alone for
    ``cool_down_rows`` rows."""

    enabled: bool = _f(True, "segments are born, retired and merged as the population changes")
    check_rows: int = _f(
        4096, "births, retirements and merges are decided at every multiple of this many "
              "rows learned after warm-up; best a multiple of learning.refresh_rows",
        min=1, max=10_000_000)
    unexplained_quantile: float = _f(
        0.999, "a row is unexplained when its squared Mahalanobis distance to every segment "
               "exceeds this chi-square quantile", min=0.5, max=1.0, min_open=True)
    pool_rows: int = _f(2000, "most unexplained rows kept (the newest)", min=10,
                        max=1_000_000)
    pool_span_rows: int = _f(20000, "unexplained rows older than this many rows leave the pool",
                             min=100)
    birth_rows: int = _f(
        50, "a new segment needs at least this many pooled rows forming one group (and "
            "20 per feature)", min=10)
    birth_max_spread: float = _f(
        2.0, "a group is compact when the geometric mean of its sds is at most this many "
             "times that of the widest segment", min=0.0, min_open=True)
    max_segments: int = _f(12, "no birth beyond this many segments", min=1, max=1000)
    retire_weight: float = _f(
        0.005, "a segment whose share of recent rows stays under this for retire_rows rows "
               "retires", min=0.0, max=1.0)
    retire_rows: int = _f(30000, "rows a segment's share of recent rows (counted between "
                                 "decision points) must stay under retire_weight before it "
                                 "retires", min=1)
    merge_measure: str = _f("hellinger", "distance between two segments' Gaussians",
                            choices=OVERLAP_MEASURES)
    merge_distance: float | None = _f(
        0.4, "two segments closer than this merge (null: never)", min=0.0, min_open=True)
    settle_rows: int = _f(
        20000, "a born or split segment joins the drift baseline after this many rows",
        min=0)
    cool_down_rows: int = _f(
        50000, "a pair split or merged is not merged or split back for this many rows",
        min=0)


@dataclass(frozen=True)
class RetentionSettings:
    """What is cleaned up, by the running service between inputs and by ``shoal prune``.

    Nothing that exactly-once or an undelivered alert still needs is removed: the
    ledger row of an input still in the inbox, alert notifications not yet delivered
    or still open, lifecycle events of the segment history.
    """

    processed_days: float | None = _f(
        7.0, "committed inputs in processed/ are deleted this many days after they were "
             "moved there (0: at once; null: kept)", min=0.0)
    processed_bytes: int | None = _f(
        None, "processed/ is kept under this many bytes, oldest inputs deleted first "
              "(null: no limit)", min=0)
    quarantine_days: float | None = _f(
        30.0, "quarantined inputs and their sidecars are deleted this many days after they "
              "were quarantined (null: kept)", min=0.0)
    alerts_file_bytes: int | None = _f(
        64 * 1024**2, "the alerts file is rotated (alerts.jsonl.1, .2, ...) once it is this "
                      "large (null: never)", min=1)
    alerts_files_kept: int = _f(5, "rotated alerts files kept beside the current one",
                                min=0, max=1000)
    history_days: float | None = _f(
        90.0, "segment history older than this is thinned to one model version a day "
              "(lifecycle events kept), delivered and closed alert notifications and ledger "
              "rows older than this are removed; a redelivered input is recognised as done "
              "for this long (null: keep everything)", min=0.0)
    check_seconds: float = _f(
        60.0, "the running service applies retention between inputs at most this often",
        min=0.0, max=86400.0)


@dataclass(frozen=True)
class Settings:
    """The whole configuration, one frozen object: the features modelled, the folders
    (absolute once loaded: relative ones are taken from the config file's folder), the
    model's shape (segments, covariance type, warm-up, forgetting) and one section
    object per part of the service. Build it with :func:`shoal.config.load_config` or
    :func:`shoal.config.parse_config`, which validate every key."""

    features: tuple[str, ...] = _f((), "numeric columns modelled (required)", required=True)
    inbox: Path = _f(Path("inbox"), "folder watched for drops")
    outbox: Path = _f(Path("outbox"), "folder where labels files are written")
    state: Path = _f(Path("state"), "folder of the state store, quarantine/ and processed/")
    passthrough: tuple[str, ...] = _f((), "columns copied to the labels unchanged (keys, times)")
    transforms: Mapping[str, str] = field(
        default_factory=lambda: MappingProxyType({}),   # read-only, like the tuples
        metadata={"doc": "per feature, a transform applied before the model: log, log1p, "
                         "logit, yeo-johnson or none (the default)",
                  "choices": TRANSFORM_NAMES})
    passthrough_types: Mapping[str, str] = field(
        default_factory=lambda: MappingProxyType({}),
        metadata={"doc": "per passthrough column, its type in the labels: string, int64, "
                         "float64, bool, timestamp or date (unset: the stream's first "
                         "input's)",
                  "choices": ("string", "int64", "float64", "bool", "timestamp", "date")})
    segments: SegmentCount = _f(SegmentCount(), "an integer, or {min, max} chosen by BIC")
    covariance: str = _f("full", "covariance type", choices=COVARIANCE_TYPES)
    warmup_rows: int = _f(2000, "rows buffered before the first model is fitted", min=10)
    half_life_rows: int | None = _f(
        50000, "rows after which old data counts half, from the end of warm-up on, so "
               "the model tracks a moving population (null: no forgetting)", min=1)
    seed: int = _f(0, "seed of every random choice", min=0, max=2**32 - 1)
    log_level: str = _f("info", "lowest level logged", choices=LOG_LEVELS)
    watch: WatchSettings = _f(WatchSettings(), "inbox watching")
    limits: LimitSettings = _f(LimitSettings(), "input limits")
    output: OutputSettings = _f(OutputSettings(), "labels files")
    input: InputSettings = _f(InputSettings(), "how CSV inputs are written")
    learning: LearningSettings = _f(LearningSettings(), "model updates")
    http: HttpSettings = _f(HttpSettings(), "status page, metrics and health over HTTP")
    drift: DriftSettings = _f(DriftSettings(), "drift of segments against their baseline")
    alerts: AlertSettings = _f(AlertSettings(), "where alerts are delivered")
    lifecycle: LifecycleSettings = _f(LifecycleSettings(), "births, retirements and merges "
                                      "of segments")
    retention: RetentionSettings = _f(RetentionSettings(), "what is cleaned up, and when")

    @property
    def transform_kinds(self) -> tuple[str, ...]:
        """The transform of each feature, in the order of ``features``."""
        return tuple(self.transforms.get(name, "none") for name in self.features)

    @property
    def columns(self) -> tuple[str, ...]:
        """Every column read from an input: features first, then passthrough."""
        return self.features + tuple(c for c in self.passthrough if c not in self.features)

"""A config under which a few drops of the warehouse scenario (seed 7, 500 rows each) raise
and clear drift alerts and retire a segment within 4,000 rows: tiny windows, no noise
margin, a weight_change bound near the windows' own scatter, a segment retired when its
share of recent rows stays under 20% for 2,500 rows."""
from shoal.daemon.demo.scenario import FEATURES, drops as scenario_drops
from drills import write_drop

import pyarrow as pa

LIVELY_CONFIG = {
    "features": list(FEATURES), "passthrough": ["unit_id", "timestamp"], "segments": 3,
    "covariance": "diag", "warmup_rows": 1000, "seed": 3,
    "learning": {"n_init": 1, "checkpoints_kept": 1},
    "inbox": "inbox", "outbox": "outbox", "state": "state",
    "drift": {"settle_rows": 1000, "window_rows": 500, "noise_multiple": 0.0, "persist": 1,
              "resolve_persist": 1, "resolve_fraction": 1.0, "cool_down_windows": 0,
              "time_column": "timestamp",
              "bounds": {"weight_change": 0.02, "mean_shift": None, "spread_ratio": None,
                         "fit_drop": None}},
    "lifecycle": {"check_rows": 500, "unexplained_quantile": 0.9, "birth_rows": 20,
                  "birth_max_spread": 5.0, "pool_span_rows": 5000,
                  "retire_weight": 0.2, "retire_rows": 2500},
}


def lively_drops(folder, first: int, last: int) -> list:
    """Drops ``first`` .. ``last - 1`` of the scenario (seed 7, 500 rows), as Parquet."""
    folder.mkdir(parents=True, exist_ok=True)
    out = []
    for i, columns in enumerate(scenario_drops(last, 500, seed=7)):
        if i >= first:
            columns.pop("state")
            out.append(write_drop(pa.table(columns), folder, f"fleet-{i:03d}.parquet"))
    return out

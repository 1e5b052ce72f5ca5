"""A Parquet file of tiny row groups is refused by its footer's size, before the footer is
parsed: parsing one takes about ten times its size in memory (200,000 one-row row groups
make a 108 MB footer that took 1.5 GB to read). Here 20,000 one-row row groups (a 10 MB
footer) through ``shoal ingest``, its peak resident memory measured by the kernel."""
import subprocess
import sys

import pyarrow.parquet as pq

from drills import synthetic_table, write_config


def test_a_parquet_file_of_tiny_row_groups_is_refused_in_bounded_memory(tmp_path):
    path = tmp_path / "one-row-groups.parquet"
    pq.write_table(synthetic_table(0, 20_000, seed=3), path, row_group_size=1)
    assert pq.ParquetFile(path).metadata.num_row_groups == 20_000
    cfg = write_config(tmp_path, warmup_rows=600)
    proc = subprocess.run([sys.executable, "-c", _INGEST_THEN_PEAK, "ingest", "-c", str(cfg),
                           str(path)], capture_output=True, text=True, timeout=120)
    lines = proc.stdout.splitlines()
    assert proc.returncode == 1
    assert lines[0].startswith("quarantined  one-row-groups.parquet (too_much_metadata: "
                               "the Parquet footer is")
    peak_kib = int(lines[-1].split()[1])
    assert peak_kib < 300 * 1024   # under 300 MiB at its peak


# The process's own peak resident memory (VmHWM: of this program since it started, not of
# the test process it was forked from, which ru_maxrss would count too).
_INGEST_THEN_PEAK = """
import sys
from shoal.daemon.cli.main import main
code = main(sys.argv[1:])
peak = [l for l in open("/proc/self/status") if l.startswith("VmHWM:")][0]
print(peak.strip())
sys.exit(code)
"""

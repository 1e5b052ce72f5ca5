"""Messages, not tracebacks: what a user meets at the command line when the output is
cut short, a path is wrong or a setting is mistyped. Each case runs the real command in
a subprocess and reads its stderr."""
import subprocess
import sys

import pytest

from drills import synthetic_table, write_config, write_drop

SEED = 11


def _ingested(tmp_path):
    cfg = write_config(tmp_path)
    (tmp_path / "drops").mkdir()
    drops = [write_drop(synthetic_table(i, 700, SEED), tmp_path / "drops", f"d{i}.parquet", i)
             for i in range(2)]
    r = subprocess.run([sys.executable, "-m", "shoal.daemon.cli.main", "ingest", "-c", str(cfg),
                        *map(str, drops)], capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    return cfg


@pytest.mark.parametrize("args", [("segments",), ("segments", "--json"),
                                  ("alerts",), ("status", "--json")])
def test_a_reader_that_goes_away_gives_no_traceback(tmp_path, args):
    # `shoal segments | head -1`: the pipe's reader is gone before shoal writes.
    cfg = _ingested(tmp_path)
    p = subprocess.Popen([sys.executable, "-m", "shoal.daemon.cli.main", *args, "-c", str(cfg)],
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    p.stdout.close()
    _, err = p.communicate(timeout=120)
    assert b"Traceback" not in err, err.decode()
    assert b"BrokenPipeError" not in err, err.decode()
    assert p.returncode in (0, 141), (p.returncode, err.decode())


def test_label_into_a_missing_folder_is_one_line_exit_2(tmp_path):
    cfg = _ingested(tmp_path)
    (tmp_path / "more").mkdir()
    src = write_drop(synthetic_table(9, 50, SEED), tmp_path / "more", "more.parquet")
    r = subprocess.run([sys.executable, "-m", "shoal.daemon.cli.main", "label", "-c", str(cfg),
                        str(src), "--out", str(tmp_path / "missing" / "dir" / "l.parquet")],
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 2, r.stderr
    assert "Traceback" not in r.stderr
    assert "no such folder" in r.stderr and len(r.stderr.strip().splitlines()) == 1


def test_a_mistyped_key_names_the_near_one(tmp_path):
    cfg = tmp_path / "c.yaml"
    cfg.write_text("features: [a]\nwarmup_row: 100\nwatch:\n  settle_second: 1\n")
    r = subprocess.run([sys.executable, "-m", "shoal.daemon.cli.main", "watch", "-c", str(cfg)],
                       capture_output=True, text=True, timeout=60)
    assert r.returncode == 2
    assert "did you mean warmup_rows?" in r.stderr, r.stderr
    cfg.write_text("features: [a]\nwatch:\n  settle_second: 1\n")
    r = subprocess.run([sys.executable, "-m", "shoal.daemon.cli.main", "watch", "-c", str(cfg)],
                       capture_output=True, text=True, timeout=60)
    assert "did you mean watch.settle_seconds?" in r.stderr, r.stderr
    cfg.write_text("features: [a]\nbanana: 1\n")
    r = subprocess.run([sys.executable, "-m", "shoal.daemon.cli.main", "watch", "-c", str(cfg)],
                       capture_output=True, text=True, timeout=60)
    assert r.returncode == 2 and "did you mean" not in r.stderr, r.stderr

"""A config is trusted, but a hostile or mistaken one must not hang shoal, fill its memory,
print a huge value whole, or change the mode of a folder shoal did not make."""
import json
import os
import resource
import subprocess
import sys
import textwrap

import pytest

from shoal.config import ConfigError, load_config, read_secret_file
from shoal.daemon.cli.main import main
from drills import write_config

# The classic "billion laughs" inside one value: nine levels of ten aliases each, 10**9
# strings once expanded, in a few hundred bytes (common practice as the test of an
# alias bomb). The value is of the wrong type, so its rendering in the error message
# was what expanded it.
ALIAS_BOMB = "features: [f1]\nseed:\n" + "\n".join(
    [f"  - &a0 [{', '.join(['lol'] * 10)}]"]
    + [f"  - &a{i} [{', '.join([f'*a{i - 1}'] * 10)}]" for i in range(1, 9)]) + "\n"

_MEASURE = textwrap.dedent("""
    import json, resource, sys, time, tracemalloc
    resource.setrlimit(resource.RLIMIT_AS, (1 << 30, 1 << 30))   # a regression fails, not swaps
    from shoal.config import ConfigError, load_config
    tracemalloc.start()
    t0 = time.monotonic()
    try:
        load_config(sys.argv[1])
        error = None
    except ConfigError as exc:
        error = str(exc)
    seconds = time.monotonic() - t0
    print(json.dumps({"error": error, "seconds": seconds,
                      "peak": tracemalloc.get_traced_memory()[1]}))
""")


def test_a_yaml_alias_bomb_is_refused_within_2_s_and_50_mib(tmp_path):
    cfg = tmp_path / "bomb.yaml"
    cfg.write_text(ALIAS_BOMB)
    r = subprocess.run([sys.executable, "-c", _MEASURE, str(cfg)], capture_output=True,
                       text=True, timeout=60)
    assert r.returncode == 0, r.stderr[-2000:]
    got = json.loads(r.stdout)
    assert got["error"] is not None and "YAML aliases" in got["error"], got
    assert len(got["error"]) < 400
    # a resource guard with a wide margin: measured 0.007-0.015 s and a 1.0 MiB peak here
    assert got["seconds"] < 2.0 and got["peak"] < 50 * 2**20, got


def test_a_secret_file_that_is_a_device_a_fifo_or_huge_is_refused_without_blocking(tmp_path):
    fifo = tmp_path / "secret.fifo"
    os.mkfifo(fifo)
    big = tmp_path / "big.secret"
    big.write_bytes(b"x" * (1 << 20))
    good = tmp_path / "good.secret"
    good.write_text("s3cret\n")
    for secret, needle in (("/dev/zero", "found a character device"), (fifo, "found a FIFO"),
                           (big, "expected at most 65536 bytes, found 1048576")):
        cfg = write_config(tmp_path, alerts={"webhooks": [
            {"url": "http://127.0.0.1:9/hook", "secret_file": str(secret)}]})
        r = subprocess.run([sys.executable, "-m", "shoal.daemon.cli.main", "config", "-c",
                            str(cfg)], capture_output=True, text=True, timeout=60)
        assert r.returncode == 2, (secret, r.stderr)
        assert f"alerts.webhooks[0].secret_file {str(secret)!r}: " in r.stderr
        assert needle in r.stderr, r.stderr
        with pytest.raises(ConfigError, match=needle):
            read_secret_file(secret)
    assert read_secret_file(good) == b"s3cret"


def test_an_error_message_never_renders_a_huge_value_whole(tmp_path):
    huge = "x" * 500_000                   # within the 1 MiB a config file may have
    for text, needle in (
            (f"features: [f1]\ncovariance: {huge}\n", "(500000 characters)"),
            (f"features: [f1]\n? {huge}\n: 1\n", "(500000 characters): unknown setting"),
            ("features: [f1]\nseed: [" + ", ".join(["1"] * 50000) + "]\n", "(50000 items)"),
            (f"features: [f1]\nalerts:\n  webhooks:\n    - url: ftp://{huge}\n"
             f"      secret_env: X\n", "(500006 characters)")):
        cfg = tmp_path / "c.yaml"
        cfg.write_text(text)
        with pytest.raises(ConfigError) as caught:
            load_config(cfg)
        message = str(caught.value)
        assert needle in message and len(message) < 600, message[:600]


def test_only_folders_shoal_makes_get_their_mode_set(tmp_path, capsys):
    state = tmp_path / "state"
    state.mkdir(mode=0o755)
    os.chmod(state, 0o755)                 # an operator's folder, shared read-only
    cfg = write_config(tmp_path)
    assert main(["segments", "-c", str(cfg)]) == 0
    assert os.stat(state).st_mode & 0o777 == 0o755
    assert os.stat(state / "processed").st_mode & 0o777 == 0o700    # made by shoal
    fresh = write_config(tmp_path / "other")
    old = os.umask(0o022)
    try:
        assert main(["segments", "-c", str(fresh)]) == 0
    finally:
        os.umask(old)
    assert os.stat(tmp_path / "other" / "state").st_mode & 0o777 == 0o700
    capsys.readouterr()


def _limited_memory():
    resource.setrlimit(resource.RLIMIT_AS, (1 << 30, 1 << 30))   # a regression fails, not swaps


def test_the_config_file_itself_must_be_a_bounded_regular_file(tmp_path):
    big = tmp_path / "big.yaml"
    big.write_text("features: [f1]\n" + "#" * (2 << 20) + "\n")
    fifo = tmp_path / "fifo.yaml"
    os.mkfifo(fifo)
    for path, needle in (("/dev/zero", "expected a regular file, found a character device"),
                         (fifo, "expected a regular file, found a FIFO"),
                         (big, "expected at most 1048576 bytes, found 2097168")):
        r = subprocess.run([sys.executable, "-m", "shoal.daemon.cli.main", "config", "-c",
                            str(path)], capture_output=True, text=True, timeout=60,
                           preexec_fn=_limited_memory)
        assert r.returncode == 2 and needle in r.stderr, (path, r.stderr[-1000:])

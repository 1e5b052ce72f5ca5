"""Security review: no pickle anywhere, YAML only through safe loading.

The package and its scripts are scanned as text. A checkpoint, a warm-up buffer or
a backfill piece is numpy ``.npy`` bytes read with ``allow_pickle=False``; a
config, a re-baseline note or any other YAML goes through ``yaml.safe_load``.
"""
import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
SOURCES = ["core", "daemon", "config", "scripts"]

UNSAFE = re.compile(
    r"\bimport\s+(c?pickle|cloudpickle|dill|shelve|marshal)\b"
    r"|\bfrom\s+(c?pickle|cloudpickle|dill|shelve|marshal)\s+import\b"
    r"|\b(pickle|cloudpickle|dill|marshal)\.(loads?|dumps?|Unpickler|Pickler)\b"
    r"|allow_pickle\s*=\s*True"
    r"|\byaml\.(load|load_all|unsafe_load|unsafe_load_all|full_load|full_load_all)\s*\("
    r"|\byaml\.(Unsafe|Full)?Loader\b"
    r"|\bpd\.read_pickle\b|\.read_pickle\(")
NP_LOAD = re.compile(r"\b(np|numpy)\.load\(")


def _files():
    for top in SOURCES:
        for path in sorted((ROOT / top).rglob("*")):
            if path.is_file() and (path.suffix == ".py" or path.parent.name == "scripts"):
                yield path


def scan(text: str) -> list[str]:
    """Unsafe deserialisation in ``text``: matched snippets, and np.load calls that do not
    say ``allow_pickle=False``."""
    found = [m.group(0) for m in UNSAFE.finditer(text)]
    found += [call for call in map(_call, NP_LOAD.finditer(text))
              if "allow_pickle=False" not in call]
    return found


def _call(match: re.Match) -> str:
    """The text of a call from its name to its closing parenthesis."""
    depth, text = 0, match.string
    for i in range(match.end() - 1, len(text)):
        depth += {"(": 1, ")": -1}.get(text[i], 0)
        if depth == 0:
            return text[match.start():i + 1]
    return text[match.start():]


def test_the_scanner_finds_what_it_looks_for():
    bad = ["import pickle", "from cloudpickle import loads", "pickle.loads(blob)",
           "np.load(buf, allow_pickle=True)", "np.load(path)", "yaml.load(text)",
           "yaml.load(text, Loader=yaml.Loader)", "yaml.unsafe_load(t)", "df = pd.read_pickle(p)"]
    for line in bad:
        assert scan(line), line
    good = ["yaml.safe_load(text)", "np.load(io.BytesIO(b), allow_pickle=False)",
            "# checkpoints are never pickled", "yaml.safe_dump(cfg)"]
    for line in good:
        assert not scan(line), line


def test_no_pickle_or_unsafe_yaml_in_the_package():
    files = list(_files())
    assert len(files) > 30 and any(p.name == "store.py" for p in files)
    hits = {str(p.relative_to(ROOT)): scan(p.read_text("utf-8")) for p in files}
    assert {k: v for k, v in hits.items() if v} == {}

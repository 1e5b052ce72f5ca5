"""The repository speaks of shoal alone: no file of the package, the tests, the scripts
or the README tells of the rounds of work that made it (numbered sessions, issues or
acceptance items belong in commit messages)."""
import re
import subprocess
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
PATTERN = re.compile(r"\b(session|issue|acceptance) [0-9]+\b", re.IGNORECASE)


def tracked_files() -> list[Path]:
    try:
        out = subprocess.run(["git", "ls-files", "core", "daemon", "config", "tests",
                              "scripts", "README.md"], cwd=ROOT, capture_output=True,
                             text=True, check=True, timeout=30).stdout.split()
        files = [ROOT / name for name in out]
    except (OSError, subprocess.SubprocessError):
        # Not a git checkout (an unpacked source tree): every file under those folders.
        files = [p for top in ("core", "daemon", "config", "tests", "scripts")
                 for p in (ROOT / top).rglob("*") if p.is_file()] + [ROOT / "README.md"]
    return [p for p in files if p.is_file() and p.resolve() != Path(__file__).resolve()]


def test_no_words_about_how_shoal_was_made():
    hits = []
    for path in tracked_files():
        try:
            text = path.read_text(encoding="utf-8")
        except (UnicodeDecodeError, OSError):
            continue  # binary fixtures
        for number, line in enumerate(text.splitlines(), 1):
            if PATTERN.search(line):
                hits.append(f"{path.relative_to(ROOT)}:{number}: {line.strip()[:100]}")
    assert not hits, "history words in the repository:\n" + "\n".join(hits)


def test_the_pattern_finds_what_it_is_for():
    # The check itself can fail: these lines must be caught, these must not.
    # (built from parts, so that no line of this file is itself such a sentence)
    for word, tail in (("Issue", "9 for the target"), ("acceptance", "3: quarantined"),
                       ("session", "6 was slower")):
        assert PATTERN.search(f"see {word} {tail}")
    assert not PATTERN.search("an issue with the reader")
    assert not PATTERN.search("sessions of 5 minutes")

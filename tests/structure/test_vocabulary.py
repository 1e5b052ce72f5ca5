"""The package, its scripts and its docs speak shoal's own words.

Alert states are ``raised`` / ``cleared`` (ITU-T X.733), the drift snapshot is the
baseline, the configuration command is ``shoal config`` and webhooks are signed by the
Standard Webhooks specification. The earlier words below may appear only in the
migration that reads a store written before (``daemon/state/store_words.py``).
"""
import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
MIGRATION = ROOT / "daemon" / "state" / "store_words.py"

OLD_WORDS = {
    "an alert state firing": re.compile(r"firing", re.I),   # also shoal_alerts_firing
    "an alert state resolved": re.compile(r"\bresolved\b", re.I),
    "check-config": re.compile(r"check[-_]config", re.I),
    "reference_mean": re.compile(r"reference_mean"),
    "current_mean": re.compile(r"current_mean"),
    "reference snapshot": re.compile(r"reference\s+snapshot", re.I),
    "X-Shoal-Signature": re.compile(r"x-shoal-signature", re.I),
}
# "resolved" in the step schedule's sense: its i0 is resolved at warm-up
SCHEDULE_SENSE = re.compile(r"\bresolved\(|\bis (?:not )?resolved\b")


def _texts():
    paths = [ROOT / "README.md", ROOT / "DEVELOPERS.md"]
    for folder in ("core", "daemon", "config", "scripts"):
        paths += [p for p in sorted((ROOT / folder).rglob("*")) if p.is_file()
                  and "__pycache__" not in p.parts and p.suffix not in (".so", ".pyc", ".o")]
    for path in paths:
        try:
            yield path, path.read_text("utf-8")
        except UnicodeDecodeError:
            continue


def _old_words(text: str) -> list[tuple[int, str, str]]:
    hits = []
    for number, line in enumerate(text.splitlines(), 1):
        line = SCHEDULE_SENSE.sub("", line)
        hits += [(number, name, line.strip()) for name, pattern in OLD_WORDS.items()
                 if pattern.search(line)]
    return hits


def test_no_old_alert_or_drift_word_outside_the_migration():
    found = [f"{path.relative_to(ROOT)}:{n}: {name}: {line}"
             for path, text in _texts() if path != MIGRATION
             for n, name, line in _old_words(text)]
    assert not found, "\n".join(found)


def test_the_search_finds_the_old_words_where_they_are():
    # the migration must read them, so the patterns must see them there
    names = {name for _, name, _ in _old_words(MIGRATION.read_text("utf-8"))}
    assert {"an alert state firing", "an alert state resolved", "reference_mean",
            "current_mean"} <= names
    sample = "shoal_alerts_firing{severity}\nRESOLVED warning\nshoal check-config -c x\n" \
             "a Reference  Snapshot\nX-Shoal-Signature: sha256=00\n"
    assert {name for _, name, _ in _old_words(sample)} == set(OLD_WORDS) - {
        "reference_mean", "current_mean"}
    assert _old_words("sched = StepSchedule().resolved(100)  # i0 is resolved at warm-up") == []

"""Modules a newcomer can read at a sitting: no Python module of ``core`` or ``daemon``
over 500 lines (the C kernels aside)."""

from __future__ import annotations

from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
LIMIT = 500


def too_long(paths, limit=LIMIT):
    return sorted(f"{p.relative_to(ROOT)}: {n} lines" for p in paths
                  if (n := len(p.read_text("utf-8").splitlines())) > limit)


def test_no_module_is_over_500_lines():
    paths = [p for part in ("core", "daemon") for p in (ROOT / part).rglob("*.py")]
    assert len(paths) > 50, "the walk reaches the package"
    assert not too_long(paths), too_long(paths)


def test_the_check_sees_a_long_module():
    this = Path(__file__)
    assert too_long([this], limit=5) == [f"{this.relative_to(ROOT)}: "
                                         f"{len(this.read_text().splitlines())} lines"]

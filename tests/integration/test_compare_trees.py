"""scripts/compare_trees.py: a tree exported as another package runs beside this one in
the same process, and the comparison says whether both trees end on the same results."""
import shutil
import subprocess
from pathlib import Path

import pytest

from scripts import compare_trees

ROOT = Path(compare_trees.__file__).resolve().parent.parent


@pytest.mark.skipif(shutil.which("git") is None or not (ROOT / ".git").exists(),
                    reason="needs the repository's git history")
def test_the_base_tree_runs_as_its_own_package_and_the_same_code_agrees(tmp_path, capsys):
    head = subprocess.run(["git", "-C", str(ROOT), "rev-parse", "HEAD"], check=True,
                          capture_output=True, text=True).stdout.strip()
    out = compare_trees.compare(head, repeats=1, rows=20_000)
    assert out["same"] is True
    for tree in (head, "work tree"):
        assert out[tree]["on"] > 0.0 and out[tree]["off"] > 0.0
    import shoalbase.core.mixture as base_mixture   # the export, not this tree
    import shoal.core.mixture as mixture
    assert base_mixture.Mixture is not mixture.Mixture
    assert "shoal-trees-" in base_mixture.__file__
    assert "same model and alerts at the end: yes" in capsys.readouterr().out

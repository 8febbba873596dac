"""The layering of service/ (DEVELOPERS.md §Flow), checked by import-linter's contracts in
pyproject.toml — and shown to fail on a copy of the tree with a forbidden import or a cycle."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]


def _lint_imports(root: Path) -> subprocess.CompletedProcess[str]:
    # The tree under `root` comes first on the path, ahead of the installed (editable) one.
    env = {**os.environ, "PYTHONPATH": str(root)}
    return subprocess.run(
        [sys.executable, "-c", "import sys; from importlinter.cli import lint_imports_command; "
         "sys.exit(lint_imports_command())", "--no-cache"],
        cwd=root, env=env, capture_output=True, text=True, timeout=300,
    )


def _copy(tmp_path: Path) -> Path:
    root = tmp_path / "tree"
    shutil.copytree(REPO / "service", root / "service",
                    ignore=shutil.ignore_patterns("__pycache__", "*.nbi", "*.nbc"))
    shutil.copy(REPO / "pyproject.toml", root / "pyproject.toml")
    return root


def _append(path: Path, line: str) -> None:
    path.write_text(path.read_text(encoding="utf-8") + "\n" + line + "\n", encoding="utf-8")


def test_the_tree_keeps_every_contract() -> None:
    """import-linter (the library's own graph of the imports) finds every contract kept."""
    done = _lint_imports(REPO)
    assert done.returncode == 0, done.stdout + done.stderr
    assert "broken" not in done.stdout.lower().replace("0 broken", "")


@pytest.mark.parametrize(
    ("module", "line", "contract"),
    [
        # stats imports the web stack: the purity contract breaks.
        ("service/stats/diagnostics.py", "import fastapi  # noqa", "engine is pure"),
        # records reaches up into the archive: the layers contract breaks.
        ("service/records/hashing.py", "import service.archive.store  # noqa", "The flow"),
        # a lower layer reaching into the top one.
        ("service/intake/problems.py", "import service.cli.main  # noqa", "The flow"),
        # two modules of one package import each other: the cycle contract breaks.
        ("service/archive/chain.py", "import service.archive.store  # noqa", "No import cycles"),
    ],
)
def test_a_forbidden_import_breaks_a_contract(
    tmp_path: Path, module: str, line: str, contract: str
) -> None:
    """The same contracts on a copy of the tree with one forbidden import added: lint-imports
    exits non-zero and names the contract, so the check can fail."""
    root = _copy(tmp_path)
    _append(root / module, line)
    done = _lint_imports(root)
    assert done.returncode != 0, done.stdout
    broken = [ln for ln in done.stdout.splitlines() if ln.rstrip().endswith("BROKEN")]
    assert any(contract in ln for ln in broken), done.stdout

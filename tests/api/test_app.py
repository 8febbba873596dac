"""The application factory: nothing happens at import, the default archive lands in ./var."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

from service.api.app import create_app
from service.api.settings import ServiceSettings
from service.archive.store import ArchiveError

ROOT = Path(__file__).resolve().parents[2]


def test_import_creates_nothing(tmp_path: Path) -> None:
    """Importing service.api.app opens no database: no ./var appears (app-factory pattern,
    common practice; checked in a fresh interpreter so no earlier import hides it)."""
    environment = {**os.environ, "PYTHONPATH": str(ROOT)}
    environment.pop("BIOPARITY_DATABASE_URL", None)
    completed = subprocess.run(
        [sys.executable, "-c", "import service.api.app"],
        cwd=tmp_path, env=environment, capture_output=True, timeout=60, check=False,
    )
    assert completed.returncode == 0, completed.stderr.decode()
    assert list(tmp_path.iterdir()) == []


def test_default_archive_is_relative_to_cwd(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Without settings the archive is ./var/bioparity.sqlite3 under the current directory
    (SQLAlchemy 2 docs: sqlite:///relative/path is relative to the working directory)."""
    monkeypatch.chdir(tmp_path)
    monkeypatch.delenv("BIOPARITY_DATABASE_URL", raising=False)
    app = create_app()
    try:
        assert (tmp_path / "var" / "bioparity.sqlite3").is_file()
    finally:
        app.state.archive.close()


def test_factory_reads_environment(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """`uvicorn --factory` workers get their archive from BIOPARITY_DATABASE_URL (the
    twelve-factor convention of configuration in the environment, common practice)."""
    target = tmp_path / "from-env.sqlite3"
    monkeypatch.setenv("BIOPARITY_DATABASE_URL", str(target))
    app = create_app()
    try:
        assert target.is_file()
        assert app.state.settings.database_url == f"sqlite:///{target}"
    finally:
        app.state.archive.close()


def test_unusable_database_url_is_a_clear_error() -> None:
    """A URL naming no installed database driver fails with the URL in the message
    (SQLAlchemy raises NoSuchModuleError, wrapped as ArchiveError)."""
    with pytest.raises(ArchiveError, match="nosuch://"):
        create_app(ServiceSettings(database_url="nosuch://somewhere"))


def test_start_up_loads_the_compiled_kernels_before_the_first_request(tmp_path: Path) -> None:
    """`serve` draws every bootstrap with the compiled loops (kernels.py) and must not make the
    first request wait for them (numba dispatchers gain a signature once a loop is compiled or
    loaded from its cache, numba docs). Run in a fresh process so nothing in this test session
    has loaded them already."""
    script = (
        "from fastapi.testclient import TestClient\n"
        "from service.api.app import create_app\n"
        "from service.api.settings import ServiceSettings\n"
        "import sys\n"
        f"app = create_app(ServiceSettings(database_url='sqlite:///{tmp_path / 'a.sqlite3'}'))\n"
        "from service.stats import compiled, kernels\n"
        "assert kernels.SubjectDraws(1, __import__('numpy').zeros((2, 1))).compiled\n"
        "assert not compiled.draw_subjects.signatures\n"
        "with TestClient(app):\n"
        "    assert compiled.draw_subjects.signatures\n"
        "    assert compiled.omission_sums_bits.signatures\n"
        "    assert compiled.omission_sums_bytes.signatures\n"
        "print('warm')\n"
    )
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True,
                          cwd=ROOT, timeout=300)
    assert done.returncode == 0 and "warm" in done.stdout, done.stderr

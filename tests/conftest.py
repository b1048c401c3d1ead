import shutil
from pathlib import Path

import pytest

from agegrid.cli import main


@pytest.fixture(scope="session")
def demo_build(tmp_path_factory) -> Path:
    """The bundled demo, built once per test session."""
    out = tmp_path_factory.mktemp("demo")
    assert main(["demo", "--output", str(out), "--quiet"]) == 0
    return out


@pytest.fixture
def demo_copy(tmp_path) -> Path:
    """A private copy of the demo inputs (for tests that damage them)."""
    from agegrid.cli import DEMO

    target = tmp_path / "demo"
    shutil.copytree(DEMO.parent, target, ignore=shutil.ignore_patterns("*.py", "__pycache__", "out"))
    return target / "build.toml"

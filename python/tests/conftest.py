import os
import pathlib

import pytest

REPO = pathlib.Path(__file__).resolve().parents[2]


@pytest.fixture(autouse=True)
def in_repo(monkeypatch):
    """Every test runs from the repository root, where payoffs/ is."""
    monkeypatch.chdir(REPO)


@pytest.fixture(scope="session")
def cli():
    """The pathfold binary of the same source: PATHFOLD_BIN, or one cargo built."""
    for candidate in (os.environ.get("PATHFOLD_BIN"), REPO / "target/debug/pathfold", REPO / "target/release/pathfold"):
        if candidate and pathlib.Path(candidate).is_file():
            return str(candidate)
    pytest.fail("no pathfold binary: build it with `cargo build --release` or set PATHFOLD_BIN")

"""Shared fixtures: the daymark binary built by `cargo test`/`cargo build`, and worlds."""

import os
import pathlib
import subprocess

import pytest

REPO = pathlib.Path(__file__).resolve().parents[2]


@pytest.fixture(scope="session")
def daymark():
    """Path of the debug daymark binary (tests/run.sh builds it first)."""
    path = pathlib.Path(os.environ.get("DAYMARK_BIN", REPO / "target" / "debug" / "daymark"))
    assert path.exists(), f"{path} is missing: run `cargo build -p daymark-cli` first"
    return path


@pytest.fixture(scope="session")
def world(daymark, tmp_path_factory):
    """A demo world of 3000 customers over 150 days, made by `daymark generate`."""
    out = tmp_path_factory.mktemp("world")
    subprocess.run(
        [str(daymark), "generate", "--out", str(out), "--customers", "3000", "--days", "150",
         "--start", "2026-01-01", "--seed", "3"],
        check=True, capture_output=True,
    )
    return out

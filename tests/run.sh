#!/usr/bin/env bash
# The project's test command (the README gives it; CI runs it as is).
# 1. Rust tests of every crate. 2. Reference checks against tools outside the project
# (DuckDB, scikit-learn), which it installs from PyPI first.
set -euo pipefail
cd "$(dirname "$0")/.."

# Headless Chromium (Debian package) opens the HTML report in tests/reference/test_audit.py.
if ! command -v chromium >/dev/null; then
  apt-get update && apt-get install -y chromium
fi

python3 -m pip install --quiet --disable-pip-version-check --root-user-action=ignore -r tests/requirements.txt

cargo test --workspace

# `cargo test` built the CLI for its integration tests; the reference checks use that
# binary (a separate `cargo build -p daymark-cli` would resolve other features and rebuild
# much of DataFusion).
export DAYMARK_BIN="${CARGO_TARGET_DIR:-$PWD/target}/debug/daymark"
test -x "$DAYMARK_BIN"
python3 -m pytest -q tests/reference

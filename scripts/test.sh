#!/usr/bin/env bash
# The whole test suite, as the README gives it and CI runs it (.ci/run calls this script):
# sets up .venv and Chromium (scripts/setup-test-env.sh), then runs the Rust tests with the
# virtual environment's python3 first on PATH (the tests call `python3` for the reference
# libraries), builds and installs the Python module into .venv and runs its tests and the
# accuracy scorer's checks.
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup-test-env.sh
export VIRTUAL_ENV="$PWD/.venv"
export PATH="$VIRTUAL_ENV/bin:$PATH"
echo "== Rust tests (python3 = $(command -v python3))"
cargo test --workspace --release
echo "== Python module: a wheel built with maturin, installed into .venv, and its tests (crates/py/tests)"
wheel_dir="$(mktemp -d)"
trap 'rm -rf "$wheel_dir"' EXIT
python3 -m maturin build --release --manifest-path crates/py/Cargo.toml --out "$wheel_dir"
python3 -m pip install --quiet --disable-pip-version-check --force-reinstall --no-deps "$wheel_dir"/sinew-*.whl
python3 -m pytest -q -rs crates/py/tests
echo "== the accuracy benchmark's own scorer (exact facts; tests/python)"
python3 -m pytest -q -p no:cacheprovider tests/python

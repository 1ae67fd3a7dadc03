#!/usr/bin/env bash
# Sets up what the tests need, inside the repository, on a machine where Python refuses
# system-wide installs (PEP 668) and Chromium may be missing:
# - .venv/: a Python virtual environment with the pinned reference libraries, the wheel
#   builder and pytest (scripts/requirements.txt);
# - headless Chromium for the report test, installed with apt-get when it is missing and the
#   script runs as root (or with password-less sudo). Where it cannot be installed the script
#   says so, and the report test skips its browser check with that reason (CI refuses to skip).
# Safe to run again: an existing .venv is reused.
set -euo pipefail
cd "$(dirname "$0")/.."
python="${PYTHON:-python3}"
if [ ! -x .venv/bin/python ]; then
    echo "setup-test-env: creating .venv with $python"
    if ! "$python" -m venv .venv; then
        rm -rf .venv
        echo "setup-test-env: '$python -m venv' failed; install the venv module (Debian/Ubuntu: apt-get install python3-venv) and rerun" >&2
        exit 1
    fi
fi
echo "setup-test-env: installing scripts/requirements.txt into .venv"
.venv/bin/python -m pip install --quiet --disable-pip-version-check -r scripts/requirements.txt

have_chromium() { command -v chromium >/dev/null 2>&1 || command -v chromium-browser >/dev/null 2>&1; }
if have_chromium; then
    echo "setup-test-env: chromium found ($(command -v chromium || command -v chromium-browser))"
else
    sudo=""
    if [ "$(id -u)" != 0 ] && command -v sudo >/dev/null 2>&1 && sudo -n true 2>/dev/null; then sudo="sudo"; fi
    if command -v apt-get >/dev/null 2>&1 && { [ "$(id -u)" = 0 ] || [ -n "$sudo" ]; }; then
        echo "setup-test-env: installing Debian's chromium package for the report test"
        $sudo apt-get update -qq
        $sudo env DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium
    fi
    if have_chromium; then
        echo "setup-test-env: chromium installed"
    else
        echo "setup-test-env: chromium is missing and cannot be installed here (needs apt-get and root or password-less sudo);" \
             "the report test will skip its browser check and print why"
    fi
fi

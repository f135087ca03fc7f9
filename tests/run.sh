#!/usr/bin/env bash
# Runs liveshape's whole test suite on a fresh Debian machine: installs what is missing (system
# packages libportaudio2 and jackd2, a virtual environment with the package and its test extras),
# then runs ruff and pytest. Usage: bash tests/run.sh [extra pytest arguments]
set -euo pipefail
cd "$(dirname "$0")/.."

need=()
for pkg in libportaudio2 jackd2; do
    dpkg-query -W -f='${Status}' "$pkg" 2>/dev/null | grep -q "install ok installed" || need+=("$pkg")
done
if ! python3 -c 'import ensurepip, venv' 2>/dev/null; then need+=(python3-venv); fi
if [ ${#need[@]} -gt 0 ]; then
    echo "tests/run.sh: installing system packages: ${need[*]}"
    SUDO=""
    [ "$(id -u)" -eq 0 ] || SUDO="sudo"
    $SUDO apt-get update -qq
    DEBIAN_FRONTEND=noninteractive $SUDO apt-get install -y -qq --no-install-recommends "${need[@]}"
fi

VENV="${LIVESHAPE_VENV:-.venv}"
if [ ! -x "$VENV/bin/python" ]; then
    python3 -m venv "$VENV"
fi
"$VENV/bin/python" -m pip install -q --upgrade pip
"$VENV/bin/python" -m pip install -q -e ".[test]"

"$VENV/bin/python" -m ruff check liveshape tests
"$VENV/bin/python" -m pytest -q "$@"

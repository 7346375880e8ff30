#!/usr/bin/env bash
# Refresh constraints.txt: resolve the newest versions the ranges in requirements*.txt allow, in a fresh
# virtual environment, and pin exactly what was installed. Then re-run the tests with the new pins:
#   pip install -r requirements-dev.txt -c constraints.txt && python -m pytest
set -euo pipefail
cd "$(dirname "$0")/.."
fresh="$(mktemp -d)"
trap 'rm -rf "$fresh"' EXIT
python3 -m venv "$fresh/venv"
"$fresh/venv/bin/pip" install --quiet --upgrade pip
"$fresh/venv/bin/pip" install --quiet -r requirements-dev.txt
{
  echo "# Exact versions the tests passed with (written by scripts/refresh_pins.sh; do not edit by hand)."
  echo "# Used as: pip install -r requirements.txt -c constraints.txt (the ranges stay in requirements*.txt)."
  "$fresh/venv/bin/pip" freeze --all --exclude pip --exclude-editable | LC_ALL=C sort -f
} > constraints.txt
echo "constraints.txt refreshed: $(grep -c '==' constraints.txt) pins. Now run the tests with them."

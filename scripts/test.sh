#!/usr/bin/env bash
# Sets up the environment (with test tools) and runs the full test suite: lint, then pytest
# (unit, property, ROS-over-loopback and colcon layout tests). Extra arguments go to pytest.
set -euo pipefail
repo="$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)"
"$repo/scripts/setup_env.sh" --test
venv="${COVERAGE_FLEET_VENV:-$repo/.venv}"
# Discovery never leaves loopback, and each run gets a domain of its own.
export ROS_AUTOMATIC_DISCOVERY_RANGE=LOCALHOST
export ROS_DOMAIN_ID="${ROS_DOMAIN_ID:-$(( (RANDOM % 90) + 5 ))}"
export MPLBACKEND=Agg
cd "$repo"
echo "test: ruff check"
"$venv/bin/ruff" check .
echo "test: pytest (ROS_DOMAIN_ID=$ROS_DOMAIN_ID)"
exec "$venv/bin/python" -m pytest "$@"

#!/usr/bin/env bash
# Sets up the environment and runs the main job: the most complete demo that exists.
# Extra arguments go to `coverage-fleet demo`.
set -euo pipefail
repo="$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)"
"$repo/scripts/setup_env.sh"
venv="${COVERAGE_FLEET_VENV:-$repo/.venv}"
export ROS_AUTOMATIC_DISCOVERY_RANGE="${ROS_AUTOMATIC_DISCOVERY_RANGE:-LOCALHOST}"
export ROS_DOMAIN_ID="${ROS_DOMAIN_ID:-$(( (RANDOM % 90) + 5 ))}"
export MPLBACKEND=Agg
exec "$venv/bin/coverage-fleet" demo "$@"

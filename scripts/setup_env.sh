#!/usr/bin/env bash
# Creates (or refreshes) the project's virtual environment in .venv with the package, its
# Python dependencies and the ROS 2 wheels. Safe to run again: it only installs what changed.
#   scripts/setup_env.sh          runtime dependencies
#   scripts/setup_env.sh --test   plus test tools (pytest, hypothesis, ruff, colcon)
set -euo pipefail
repo="$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)"
venv="${COVERAGE_FLEET_VENV:-$repo/.venv}"
python_bin="${PYTHON:-}"
if [[ -z "$python_bin" ]]; then
  for candidate in python3.11 python3; do
    if command -v "$candidate" >/dev/null 2>&1; then python_bin="$candidate"; break; fi
  done
fi
if [[ -z "$python_bin" ]]; then
  echo "setup_env: no python3.11 found; the ROS 2 wheels need Python 3.11" >&2; exit 1
fi
version="$("$python_bin" -c 'import sys; print(f"{sys.version_info[0]}.{sys.version_info[1]}")')"
if [[ "$version" != "3.11" ]]; then
  echo "setup_env: $python_bin is Python $version; the ROS 2 wheels need Python 3.11 (set PYTHON=...)" >&2
  exit 1
fi
if [[ ! -x "$venv/bin/python" ]]; then
  echo "setup_env: creating virtual environment in $venv"
  "$python_bin" -m venv "$venv"
fi
stamp="$venv/.coverage_fleet_stamp"
want="$(cat "$repo"/requirements/*.txt "$repo/setup.py" | sha256sum | cut -c1-16)-${1:-runtime}"
if [[ -f "$stamp" && "$(cat "$stamp")" == "$want" ]]; then
  exit 0
fi
pip=("$venv/bin/python" -m pip --disable-pip-version-check -q)
# Some machines list local package folders that do not exist; pip warns per package. Hide that.
quiet() { "$@" 2> >(grep -v "is ignored: it is neither a file nor a directory" >&2); }
echo "setup_env: installing dependencies (first run takes a minute or two)"
quiet "${pip[@]}" install --upgrade pip >/dev/null
quiet "${pip[@]}" install -c "$repo/requirements/ros-kilted-constraints.txt" \
  -r "$repo/requirements/ros-kilted.txt" -r "$repo/requirements/core.txt"
if [[ "${1:-}" == "--test" ]]; then
  quiet "${pip[@]}" install -r "$repo/requirements/test.txt"
fi
quiet "${pip[@]}" install --no-deps -e "$repo"
echo "$want" > "$stamp"
echo "setup_env: ready ($venv)"

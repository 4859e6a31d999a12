#!/usr/bin/env bash
# Sets charflow up on Debian or Ubuntu, then runs the demo or the tests.
#
#   bash scripts/setup.sh demo [-- charflow demo options]    e.g.  ... demo -- --quick
#   bash scripts/setup.sh test [-- pytest options]           e.g.  ... test -- tests/test_cli.py
#
# 1. Installs from the system's packages what is missing: ngspice and libngspice0-dev (for test
#    also yosys and opensta, the tools the tests feed charflow's libraries to), and python3-venv
#    when python3 cannot make a virtual environment. Uses sudo when not run as root.
# 2. Makes the project's virtual environment .venv in this checkout (the system's Python is
#    externally managed, PEP 668: pip does not install into it) and installs charflow into it,
#    editable: demo with its runtime dependencies only, test with the test extras too.
# 3. Runs `charflow demo`, or the linter, the layer and type checks and pytest, from that
#    environment.
#
# Afterwards call .venv/bin/charflow, or `source .venv/bin/activate` and then charflow.
# PYTHON=/path/to/python3 picks the interpreter that makes .venv (default: python3).
set -euo pipefail
cd "$(dirname "$0")/.."

usage() {
  echo "usage: bash scripts/setup.sh demo|test [-- options for charflow demo or pytest]" >&2
  exit 2
}

mode="${1:-}"
[ "$mode" = demo ] || [ "$mode" = test ] || usage
shift
[ "${1:-}" = "--" ] && shift

PYTHON="${PYTHON:-python3}"
VENV=.venv

# --- 1. system packages ---------------------------------------------------------------------
missing=()
# Debian and Ubuntu ship venv's ensurepip apart, in python3-venv.
if ! command -v "$PYTHON" >/dev/null 2>&1; then
  missing+=(python3 python3-venv)
elif [ ! -x "$VENV/bin/python" ] && ! "$PYTHON" -c 'import ensurepip, venv' >/dev/null 2>&1; then
  missing+=(python3-venv)
fi
command -v ngspice >/dev/null 2>&1 || missing+=(ngspice)
# PySpice opens the unversioned libngspice.so, which Debian ships in the -dev package.
ldconfig_bin="$(command -v ldconfig || echo /sbin/ldconfig)"
"$ldconfig_bin" -p | grep -q 'libngspice\.so ' || missing+=(libngspice0-dev)
if [ "$mode" = test ]; then
  command -v yosys >/dev/null 2>&1 || missing+=(yosys)
  command -v sta >/dev/null 2>&1 || missing+=(opensta)
fi
if [ ${#missing[@]} -gt 0 ]; then
  sudo=()
  if [ "$(id -u)" -ne 0 ]; then
    command -v sudo >/dev/null 2>&1 || {
      echo "setup.sh: ${missing[*]} missing; run as root or install sudo" >&2
      exit 1
    }
    sudo=(sudo)
  fi
  echo "setup.sh: installing ${missing[*]} from the system's packages"
  "${sudo[@]}" apt-get update -qq
  "${sudo[@]}" env DEBIAN_FRONTEND=noninteractive \
    apt-get install -y -qq --no-install-recommends "${missing[@]}" >/dev/null
fi

# --- 2. the project's virtual environment ---------------------------------------------------
if [ ! -x "$VENV/bin/python" ]; then
  "$PYTHON" -c 'import sys; sys.exit(sys.version_info < (3, 11))' || {
    echo "setup.sh: charflow needs Python 3.11 or newer; $PYTHON is $("$PYTHON" -V 2>&1)" >&2
    echo "setup.sh: set PYTHON=/path/to/python3.11 (or newer) and run again" >&2
    exit 1
  }
  echo "setup.sh: making the virtual environment $PWD/$VENV"
  "$PYTHON" -m venv "$VENV"
fi
extras=""
[ "$mode" = test ] && extras="[test]"
echo "setup.sh: installing charflow$extras into $PWD/$VENV (minutes the first time)"
"$VENV/bin/python" -m pip install -q --disable-pip-version-check -e ".$extras"

# --- 3. run ---------------------------------------------------------------------------------
if [ "$mode" = demo ]; then
  "$VENV/bin/charflow" demo "$@"
  echo "setup.sh: charflow is installed in $PWD/$VENV; call it as $VENV/bin/charflow," \
    "or run 'source $VENV/bin/activate' first and then charflow"
  exit 0
fi
# The tests start the charflow command: the environment's bin comes first on PATH.
export PATH="$PWD/$VENV/bin:$PATH"
ruff check .
ruff format --check .
# The package's layers (pyproject.toml, [tool.importlinter]) and its types ([tool.mypy]).
lint-imports
mypy
status=0
python -m pytest "$@" || status=$?
if [ "$status" -eq 5 ]; then
  echo "setup.sh: pytest collected no tests: nothing was tested" >&2
fi
exit "$status"

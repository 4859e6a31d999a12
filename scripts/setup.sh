#!/usr/bin/env bash
# Installs what charflow needs on a Debian or Ubuntu machine, then runs the demo or the tests.
#   bash scripts/setup.sh demo [charflow demo options]
#   bash scripts/setup.sh test [pytest options]
set -euo pipefail
cd "$(dirname "$0")/.."

missing=()
command -v ngspice >/dev/null 2>&1 || missing+=(ngspice)
# PySpice opens the unversioned libngspice.so, which Debian ships in the -dev package.
ldconfig -p | grep -q 'libngspice\.so ' || missing+=(libngspice0-dev)
if [ ${#missing[@]} -gt 0 ]; then
  sudo=""
  [ "$(id -u)" -eq 0 ] || sudo=sudo
  echo "installing ${missing[*]} from the system's packages"
  $sudo apt-get update -qq
  DEBIAN_FRONTEND=noninteractive $sudo apt-get install -y -qq "${missing[@]}" >/dev/null
fi

python3 -m pip install -q --disable-pip-version-check -e ".[test]"

case "${1:-}" in
  demo)
    shift
    charflow demo "$@"
    ;;
  test)
    shift
    ruff check .
    ruff format --check .
    python3 -m pytest "$@"
    ;;
  *)
    echo "usage: bash scripts/setup.sh demo|test [options]" >&2
    exit 2
    ;;
esac

#!/bin/sh
# Install everything the tests need and run the whole suite: the README's second command,
# and all that CI runs (.ci/run calls this and nothing else).
#
#   1. a virtual environment in .venv with shiftwatch and its test, demo and sparkplug extras
#      (sparkplug: protobuf, for the Sparkplug B tests);
#   2. the system packages the tests use, each only where it is missing: Mosquitto (the
#      brokers), promtool (Debian's prometheus package, without its recommends: the alerting
#      rules and the dashboard's queries), Chromium and its driver (the report's browser test),
#      systemd-analyze and strace (the tests of the systemd unit), nats-server (the shard
#      tests' NATS cluster).  apt-get runs as is when
#      we are root, through sudo when we are not and sudo exists; otherwise the script says
#      what to install and stops;
#   3. python -m pytest, the whole suite, doctests included, in three worker processes
#      (pytest-xdist), each taking whole test files in the order collected (without
#      --no-loadscope-reorder xdist hands out the files with most tests first, and the
#      few long ones of tests/conftest.py's LONG_FILES last): most tests wait on brokers, clusters,
#      browsers and subprocesses rather than compute, so three workers fit on two cores
#      (about 12 minutes instead of 25 on a 2-core machine).  SHIFTWATCH_TEST_WORKERS sets
#      another number; 0 runs the suite in this one process.
#
# Extra arguments go to pytest (e.g. tests/core -q).
set -eu
cd "$(dirname "$0")/.."

python3 -m venv .venv
. .venv/bin/activate
python -m pip install --quiet -e '.[test,demo,sparkplug]'

have() { command -v "$1" >/dev/null 2>&1 || [ -x "/usr/sbin/$1" ] || [ -x "/usr/bin/$1" ]; }
need=""
lean=""
have mosquitto || need="$need mosquitto"
have promtool || lean="$lean prometheus"
{ have chromium && have chromedriver; } || need="$need chromium chromium-driver"
have systemd-analyze || need="$need systemd"
have strace || need="$need strace"
have nats-server || need="$need nats-server"

if [ -n "$need$lean" ]; then
    if [ "$(id -u)" -eq 0 ]; then
        as_root=""
    elif command -v sudo >/dev/null 2>&1; then
        as_root="sudo"
    else
        echo "install-and-test: missing system packages:$need$lean" >&2
        echo "install-and-test: run this script as root, or install them with your package manager" >&2
        exit 1
    fi
    if ! command -v apt-get >/dev/null 2>&1; then
        echo "install-and-test: missing system packages (Debian names):$need$lean;" >&2
        echo "install-and-test: there is no apt-get here: install them with your package manager" >&2
        exit 1
    fi
    $as_root apt-get update -qq
    if [ -n "$need" ]; then
        # shellcheck disable=SC2086  # the package names are meant to split
        $as_root env DEBIAN_FRONTEND=noninteractive apt-get install -y -qq $need
    fi
    if [ -n "$lean" ]; then
        # shellcheck disable=SC2086
        $as_root env DEBIAN_FRONTEND=noninteractive apt-get install -y -qq --no-install-recommends $lean
    fi
fi

exec python -m pytest -n "${SHIFTWATCH_TEST_WORKERS:-3}" --dist loadfile --no-loadscope-reorder "$@"

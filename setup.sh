#!/usr/bin/env bash
# Set up everything aftershift needs on a fresh Debian/Ubuntu machine, then
#   ./setup.sh demo     simulate, fit and draw the bundled demo into results_demo/
#   ./setup.sh test     run the test suite (display tests use Xvfb + Mesa)
#   ./setup.sh          only set up
# System packages (Xvfb, xdotool, Mesa's software OpenGL; for `test` also
# Chromium, which the report tests open pages in) are installed with apt-get
# when running as root; Python packages with one pip command, psychopy with
# its own dependencies through the "display" extra.  Use a virtual
# environment: python3 -m venv .venv && . .venv/bin/activate && ./setup.sh
set -euo pipefail
cd "$(dirname "$0")"
export PIP_ROOT_USER_ACTION=ignore PIP_DISABLE_PIP_VERSION_CHECK=1

debs=(xvfb xauth xdotool libgl1 libgl1-mesa-dri libglu1-mesa libegl1 fontconfig fonts-dejavu-core)
[ "${1:-}" = test ] && debs+=(chromium)
missing=()
for d in "${debs[@]}"; do dpkg -s "$d" >/dev/null 2>&1 || missing+=("$d"); done
if [ "${#missing[@]}" -gt 0 ]; then
  if [ "$(id -u)" = 0 ]; then
    echo "setup: installing system packages: ${missing[*]}"
    apt-get update -qq
    DEBIAN_FRONTEND=noninteractive apt-get install -y -qq "${missing[@]}" >/dev/null
  else
    echo "setup: please install (as root): apt-get install ${missing[*]}" >&2
  fi
fi

PY=${PYTHON:-python3}
echo "setup: installing Python packages"
"$PY" -m pip install -q -e ".[display,dev,cluster]"

case "${1:-}" in
  demo) shift; exec "$PY" -m runner.cli demo "$@" ;;
  test) shift; exec "$PY" -m pytest -q "$@" ;;
  "") echo "setup: done" ;;
  *) echo "setup: unknown task '$1' (expected demo or test)" >&2; exit 2 ;;
esac

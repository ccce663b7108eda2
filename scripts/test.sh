#!/usr/bin/env bash
# Breakdown's whole test suite on a fresh Debian machine with Rust: installs the system packages the tests use
# (ngspice for the cross-check, Chromium for the report test, the plugin's X11/OpenGL/audio headers, Python's
# pedalboard as a general-purpose VST3 host), then runs every test of the workspace in release mode.
set -euo pipefail
cd "$(dirname "$0")/.."

packages=(ngspice chromium pkg-config libx11-dev libx11-xcb-dev libxcb1-dev libxcb-icccm4-dev libxcb-dri2-0-dev
  libxcursor-dev libxrandr-dev libgl1-mesa-dev libglu1-mesa-dev libasound2-dev libjack-jackd2-dev)
missing=()
for p in "${packages[@]}"; do
  dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q "install ok installed" || missing+=("$p")
done
if [ ${#missing[@]} -gt 0 ]; then
  echo "installing: ${missing[*]}"
  sudo_cmd=""
  [ "$(id -u)" -ne 0 ] && sudo_cmd="sudo"
  $sudo_cmd apt-get update -qq
  DEBIAN_FRONTEND=noninteractive $sudo_cmd apt-get install -y -qq --no-install-recommends "${missing[@]}" >/dev/null
fi
if command -v python3 >/dev/null && ! python3 -c "import pedalboard" 2>/dev/null; then
  python3 -m pip install --quiet "pedalboard==0.9.26" || echo "pedalboard not installed: the VST3 host test will say it is skipped"
fi

# Regenerate the ngspice reference data and compare with the committed copy (about two minutes).
export BREAKDOWN_REGENERATE="${BREAKDOWN_REGENERATE:-1}"
log="$(mktemp)"
status=0
cargo test --release --workspace 2>&1 | tee "$log" || status=$?
# One closing line for the whole run (cargo ends with per-crate doc-test lines that often count 0 tests).
awk '/^test result:/ { for (i = 1; i <= NF; i++) { if ($(i) ~ /^passed/) p += $(i-1); if ($(i) ~ /^failed/) f += $(i-1) } }
     END { printf "%d passed, %d failed\n", p, f }' "$log"
rm -f "$log"
exit "$status"

#!/usr/bin/env bash
# Breakdown's whole test suite on a fresh Debian machine with Rust: installs the system packages the tests use
# (ngspice for the cross-check, Chromium for the report test, the plugin's X11/OpenGL/audio headers, Ardour 7 and
# Python's pedalboard as two real VST3 hosts), then checks formatting and lints (warnings
# denied), runs every test of the workspace in release mode and a short smoke run of the benchmark, printing the
# time of each part.
set -euo pipefail
cd "$(dirname "$0")/.."

packages=(ngspice chromium ardour pkg-config libx11-dev libx11-xcb-dev libxcb1-dev libxcb-icccm4-dev
  libxcb-dri2-0-dev libxcursor-dev libxrandr-dev libgl1-mesa-dev libglu1-mesa-dev libasound2-dev libjack-jackd2-dev)
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

# The Rust tools the checks use (rustfmt and clippy come with rustup's default profile; add them if missing).
if command -v rustup >/dev/null; then
  rustup component add rustfmt clippy >/dev/null 2>&1 || true
fi

# Each part prints its time; the whole run stays well inside CI's limit on a 2-core machine.
log="$(mktemp)"
status=0
started=$SECONDS
part() {
  local name="$1"
  shift
  local t0=$SECONDS
  echo "== $name"
  if "$@" 2>&1 | tee -a "$log"; then
    echo "== $name: ok ($((SECONDS - t0)) s)"
  else
    echo "== $name: FAILED ($((SECONDS - t0)) s)"
    status=1
  fi
}

part "format (cargo fmt --check)" cargo fmt --all -- --check
part "lints (clippy, warnings denied)" cargo clippy --release --workspace --all-targets -- -D warnings
# Regenerate the ngspice reference data and compare with the committed copy (about two minutes).
export BREAKDOWN_REGENERATE="${BREAKDOWN_REGENERATE:-1}"
part "tests (release)" cargo test --release --workspace
part "benchmark smoke run (breakdown bench --quick)" cargo run --release -q -p breakdown-cli -- bench --quick

# One closing line for the whole run (cargo ends with per-crate doc-test lines that often count 0 tests).
awk '/^test result:/ { for (i = 1; i <= NF; i++) { if ($(i) ~ /^passed/) p += $(i-1); if ($(i) ~ /^failed/) f += $(i-1) } }
     END { printf "%d passed, %d failed\n", p, f }' "$log"
echo "whole run: $((SECONDS - started)) s"
rm -f "$log"
exit "$status"

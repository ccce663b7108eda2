#!/bin/sh
# Headless screenshot of the editor: builds the standalone application, runs it with the dummy audio backend
# (no sound card) and a synthetic input tone under Xvfb, and captures its window into docs/editor.png with
# ImageMagick's `import`. Needs (Debian): xvfb, imagemagick, x11-utils, libasound2-dev, libjack-jackd2-dev.
set -eu
cd "$(dirname "$0")/.."
cargo build --release -p breakdown --features standalone --bin breakdown-standalone
mkdir -p docs
out="$(pwd)/docs/editor.png"
BREAKDOWN_DEMO_INPUT=1 xvfb-run -a -s "-screen 0 1400x1000x24" sh -c '
    ./target/release/breakdown-standalone --backend dummy --audio-layout 2 --sample-rate 48000 --period-size 512 &
    pid=$!
    # Wait for the window, then give the scope and the loudness meters a few seconds of signal.
    i=0
    while [ $i -lt 60 ]; do
        id=$(xwininfo -root -tree 2>/dev/null | grep -i "\"Breakdown\"" | head -n 1 | awk "{print \$1}")
        [ -n "$id" ] && break
        sleep 0.5; i=$((i + 1))
    done
    sleep 6
    if [ -n "$id" ]; then
        import -window "$id" "$1"
    else
        echo "editor window not found; capturing the whole screen" >&2
        import -window root "$1"
    fi
    kill $pid 2>/dev/null || true
    wait $pid 2>/dev/null || true
' sh "$out"
echo "wrote $out"

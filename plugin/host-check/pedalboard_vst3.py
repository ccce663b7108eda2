#!/usr/bin/env python3
"""Run the VST3 bundle in a general-purpose host (PyPI `pedalboard`, JUCE's VST3 hosting) and compare its output
with the command-line renderer's output for the same settings. Exits non-zero on any mismatch.

usage: pedalboard_vst3.py BUNDLE_DIR/breakdown.vst3 PATH/TO/breakdown-cli WORK_DIR
Needs: pip install pedalboard numpy
"""
import subprocess
import sys

import numpy as np
import pedalboard
from pedalboard.io import AudioFile

bundle, cli, work = sys.argv[1], sys.argv[2], sys.argv[3]
failures = 0


def cli_render(x, rate, sets):
    src, dst = f"{work}/in_{rate}.wav", f"{work}/cli_{rate}.wav"
    with AudioFile(src, "w", rate, 1, bit_depth=32) as f:
        f.write(x[np.newaxis, :])
    args = [cli, "render", "--input", src, "--output", dst]
    for s in sets:
        args += ["--set", s]
    subprocess.run(args, check=True, capture_output=True)
    with AudioFile(dst) as f:
        return f.read(f.frames)[0]


for rate in (44100, 48000, 96000):
    t = np.arange(int(rate * 0.4)) / rate
    # A decaying 110 Hz tone, 0.6 full scale: the clamp works on the first peaks and lets go as it decays.
    x = (0.6 * np.exp(-3.0 * t) * np.sin(2 * np.pi * 110.0 * t)).astype(np.float32)
    for block in (64, 512, 4096):
        for switch, position in (("Pair 1", 1), ("Pair 2", 2), ("Off", 0)):
            plugin = pedalboard.load_plugin(bundle)
            plugin.switch = switch
            plugin.level = 0.25
            # The plugin reads its parameters as 32-bit floats: hand the renderer the same numbers.
            sets = [f"gain={np.float32(0.8):.17g}", "level=0.25", f"position={position}"]
            y = plugin(x[np.newaxis, :], rate, buffer_size=block)[0]
            ref = cli_render(x, rate, sets)
            diff = float(np.abs(y - ref[: len(y)]).max())
            ok = diff <= 1e-6
            failures += 0 if ok else 1
            print(f"{'ok  ' if ok else 'FAIL'} {rate} Hz block {block} {switch}: max |plugin - renderer| = {diff:.3g}")

sys.exit(1 if failures else 0)

#!/usr/bin/env python3
"""Render a WAV through the Breakdown VST3 bundle in a general-purpose host (PyPI `pedalboard`, which hosts VST3
on Linux) and write the result as a 32-bit float WAV. Used by tests/tests/vst3_host.rs.

usage: pedalboard_render.py BUNDLE.vst3 IN.wav OUT.wav BLOCK [--set NAME=TEXT]... [--raw NAME=NORMALIZED]...
  --set  sets a parameter by its displayed value (e.g. quality=2x)
  --raw  sets a parameter's normalized (0..1) value, exact for linear ranges (e.g. gain=0.6)
Prints one line "latency=N" (the latency the plugin reports to the host).
Needs: pip install pedalboard  (numpy comes with it)
"""
import sys
import time

import numpy as np
import pedalboard
from pedalboard.io import AudioFile


def main(argv):
    if len(argv) < 5:
        print(__doc__, file=sys.stderr)
        return 2
    bundle, src, dst, block = argv[1], argv[2], argv[3], int(argv[4])
    plugin = pedalboard.load_plugin(bundle)
    rest = argv[5:]
    while rest:
        flag, assignment = rest[0], rest[1]
        rest = rest[2:]
        name, _, value = assignment.partition("=")
        if name not in plugin.parameters:
            print(f"no parameter {name!r}; the plugin has {sorted(plugin.parameters)}", file=sys.stderr)
            return 2
        if flag == "--set":
            setattr(plugin, name, value)
        elif flag == "--raw":
            plugin.parameters[name].raw_value = float(value)
        else:
            print(f"unknown option {flag!r}", file=sys.stderr)
            return 2
    with AudioFile(src) as f:
        rate = f.samplerate
        x = f.read(f.frames).astype(np.float32)
    # Warm up as a DAW track that has been playing: a change of quality builds new models on the plugin's
    # background thread and crossfades to them, and in this host such a change made before the first render
    # can land inside that render. Two silent runs with a pause let the build finish and the crossfade end;
    # `reset=True` then starts the measured render from rest.
    silence = np.zeros((x.shape[0], max(block, 8192)), dtype=np.float32)
    plugin.process(silence, rate, buffer_size=block, reset=True)
    time.sleep(0.3)
    plugin.process(silence, rate, buffer_size=block, reset=False)
    y = plugin.process(x, rate, buffer_size=block, reset=True)
    print(f"latency={plugin.reported_latency_samples}")
    with AudioFile(dst, "w", rate, y.shape[0], bit_depth=32) as f:
        f.write(y.astype(np.float32))
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv))

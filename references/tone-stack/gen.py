#!/usr/bin/env python3
"""Regenerate the tone stack's ngspice reference data (Python 3.11+ standard library, plus ngspice on PATH).

Two reference sets, both ngspice AC analyses (small-signal, exact for these linear networks), 20 Hz to 20 kHz
at 100 points a decade (301 points):

  stack-*.csv   the passive three-knob stack alone (docs/model.md section 3.1), driven by an ideal source and
                unloaded (1e12 ohm at the output): what D. T. Yeh and J. O. Smith's closed-form H(s) describes
                ("Discretization of the '59 Fender Bassman tone stack", DAFx-06). Two sets of part values
                (`example`, `builtin`), seven knob settings each.
  loaded-*.csv  the `example` stack driven through the clamp's coupling cap, feed resistor and a 1 M log level
                pot, loaded by its 1 M load resistor, knobs at 0.5, level at 0.3, 0.6 and 0.9.

Pots follow docs/model.md section 3: rotation x, law y(x) (linear y = x, log y = (81^x - 1)/80), legs
R (1 - y) top lug to wiper and R y wiper to bottom lug, each at least 1 ohm.

Every file is described in cases.toml (written here too: part values under Breakdown's [tone_stack] key names,
knob rotations, the resistance of every pot leg as put in the netlist). See README.md in this directory.

Usage: python3 references/tone-stack/gen.py [--out DIR]
With --out, netlists, data and cases.toml go to DIR instead of beside this script (the Rust test uses this to
compare a fresh run with the committed data).
"""

import argparse
import math
import os
import shutil
import subprocess
import sys
import tempfile

HERE = os.path.dirname(os.path.abspath(__file__))

# Smallest resistance of either leg of a pot (ohm), docs/model.md section 3.
POT_END_RESISTANCE = 1.0
# The "open" output of the unloaded stack (ohm): ngspice wants every node to have a DC path, and 1e12 ohm
# against the stack's few hundred kilohms changes the response by about 1e-6 dB.
OPEN_LOAD = 1e12
# AC sweep: points per decade, first and last frequency (Hz).
POINTS_PER_DECADE = 100
F_START = 20.0
F_STOP = 20e3

# Part values, under Breakdown's [tone_stack] keys (docs/model.md section 5).
SETS = {
    # The example values of the issue that asked for the tone stack.
    "example": {
        "slope_resistor": 33e3,
        "treble_cap": 470e-12,
        "bass_cap": 22e-9,
        "middle_cap": 22e-9,
        "treble_pot": (220e3, "log"),
        "bass_pot": (1e6, "log"),
        "middle_pot": (25e3, "linear"),
        "load_resistor": 1e6,
    },
    # The values proposed for Breakdown's built-in stack: typical of the trade [common practice] (slope
    # 33-100 k, treble cap a few hundred pF, bass and middle caps 22-47 nF, treble 220-250 k log, bass 1 M log,
    # middle 10-25 k linear), not any one maker's.
    "builtin": {
        "slope_resistor": 47e3,
        "treble_cap": 330e-12,
        "bass_cap": 33e-9,
        "middle_cap": 22e-9,
        "treble_pot": (250e3, "log"),
        "bass_pot": (1e6, "log"),
        "middle_pot": (20e3, "linear"),
        "load_resistor": 1e6,
    },
}

# Knob rotations (treble, middle, bass) for the unloaded stack: both extremes, mid travel, and mixed settings
# that give every product of t, m and l in the closed form a non-zero weight somewhere.
STACK_SETTINGS = [
    (0.0, 0.0, 0.0),
    (1.0, 1.0, 1.0),
    (0.5, 0.5, 0.5),
    (1.0, 0.0, 0.25),
    (0.2, 0.7, 1.0),
    (0.0, 1.0, 0.0),
    (0.8, 0.3, 0.6),
]

# The stack loaded by the level pot (docs/model.md section 3: clamp coupling cap, feed resistor, level pot).
LOADED = {
    "set": "example",
    "coupling_cap": 100e-9,
    "feed_resistor": 4.7e3,
    "level_pot": (1e6, "log"),
    "knobs": (0.5, 0.5, 0.5),
    "levels": [0.3, 0.6, 0.9],
}


class GenError(Exception):
    pass


def fraction(law, x):
    """Share of the track below the wiper (docs/model.md section 3)."""
    if not 0.0 <= x <= 1.0:
        raise GenError(f"rotation {x} is outside 0..1")
    if law == "linear":
        return x
    if law == "log":
        return (81.0 ** x - 1.0) / 80.0
    raise GenError(f"unknown pot law '{law}' (expected 'log' or 'linear')")


def legs(pot, x):
    """(top lug to wiper, wiper to bottom lug) in ohm, each at least POT_END_RESISTANCE."""
    total, law = pot
    y = fraction(law, x)
    return max(total * (1.0 - y), POT_END_RESISTANCE), max(total * y, POT_END_RESISTANCE)


def num(x):
    """Full-precision number for the netlist and cases.toml."""
    return repr(float(x))


def stack_legs(parts, knobs):
    treble, middle, bass = knobs
    t_top, t_bottom = legs(parts["treble_pot"], treble)
    m_top, m_bottom = legs(parts["middle_pot"], middle)
    # The bass pot is a variable resistor: its top lug and wiper are joined, so only the leg from the wiper to
    # the bottom lug, R y, is in the circuit.
    _, b_bottom = legs(parts["bass_pot"], bass)
    return {
        "treble_top_leg": t_top,
        "treble_bottom_leg": t_bottom,
        "bass_leg": b_bottom,
        "middle_top_leg": m_top,
        "middle_bottom_leg": m_bottom,
    }


def stack_lines(parts, leg, source):
    """The stack of docs/model.md section 3.1, driven from node `source`, output node `tone`."""
    return [
        f"Ctreble {source} treble_top {num(parts['treble_cap'])}",
        f"Rslope {source} slope_node {num(parts['slope_resistor'])}",
        f"Cbass slope_node bass_top {num(parts['bass_cap'])}",
        f"Cmiddle slope_node middle_wiper {num(parts['middle_cap'])}",
        "* treble pot: top lug treble_top, wiper tone (the output), bottom lug bass_top",
        f"Rtreble_top treble_top tone {num(leg['treble_top_leg'])}",
        f"Rtreble_bottom tone bass_top {num(leg['treble_bottom_leg'])}",
        "* bass pot: top lug and wiper joined at bass_top, bottom lug middle_top (variable resistor R y)",
        f"Rbass bass_top middle_top {num(leg['bass_leg'])}",
        "* middle pot: top lug middle_top, wiper middle_wiper, bottom lug ground",
        f"Rmiddle_top middle_top middle_wiper {num(leg['middle_top_leg'])}",
        f"Rmiddle_bottom middle_wiper 0 {num(leg['middle_bottom_leg'])}",
    ]


def control_lines(data_name):
    return [
        ".control",
        "set noaskquit",
        "set wr_singlescale",
        "set wr_vecnames",
        "option numdgt=15",
        f"ac dec {POINTS_PER_DECADE} {num(F_START)} {num(F_STOP)}",
        f"wrdata {data_name} real(v(tone)) imag(v(tone))",
        "quit",
        ".endc",
        ".end",
    ]


def run_ngspice(netlist_text, workdir):
    """Run ngspice -b on the netlist; return [(f, complex H)]."""
    path = os.path.join(workdir, "net.cir")
    with open(path, "w", encoding="utf-8") as f:
        f.write(netlist_text.replace("@DATA@", "ac.txt"))
    proc = subprocess.run(["ngspice", "-b", "net.cir"], cwd=workdir, capture_output=True, text=True)
    data_path = os.path.join(workdir, "ac.txt")
    if proc.returncode != 0 or not os.path.exists(data_path):
        raise GenError(f"ngspice failed (exit {proc.returncode}):\n{proc.stdout}\n{proc.stderr}")
    rows = []
    with open(data_path, encoding="utf-8") as f:
        lines = f.read().split("\n")
    for line in lines[1:]:
        parts = line.split()
        if not parts:
            continue
        freq, re_, im_ = (float(p) for p in parts)
        rows.append((freq, complex(re_, im_)))
    os.remove(data_path)
    expected = int(round(POINTS_PER_DECADE * math.log10(F_STOP / F_START))) + 1
    if len(rows) != expected:
        raise GenError(f"ngspice gave {len(rows)} frequencies, expected {expected}")
    return rows


def csv_text(rows):
    out = ["frequency_hz,magnitude_db,phase_deg"]
    for freq, h in rows:
        out.append(f"{freq:.12e},{20.0 * math.log10(abs(h)):.12e},{math.degrees(math.atan2(h.imag, h.real)):.12e}")
    return "\n".join(out) + "\n"


def knob_tag(knobs):
    t, m, b = knobs
    return f"t{t:.2f}-m{m:.2f}-b{b:.2f}"


def toml_parts(parts):
    lines = []
    for key in ("slope_resistor", "treble_cap", "bass_cap", "middle_cap"):
        lines.append(f"{key} = {num(parts[key])}")
    for key in ("treble_pot", "bass_pot", "middle_pot"):
        total, law = parts[key]
        lines.append(f'{key} = {{ resistance = {num(total)}, law = "{law}" }}')
    lines.append(f"load_resistor = {num(parts['load_resistor'])}")
    return lines


def toml_legs(leg):
    return [f"{k} = {num(v)}" for k, v in leg.items()]


HEAD = """\
* {title}
* Generated by references/tone-stack/gen.py (do not edit by hand); see README.md beside it.
* Pots as docs/model.md section 3: legs R (1 - y) top lug to wiper and R y wiper to bottom lug, each >= 1 ohm.
"""


def generate(out_dir, workdir):
    cases = [
        "# Generated by references/tone-stack/gen.py (do not edit by hand); see README.md beside it.",
        "# Part values under Breakdown's [tone_stack] keys (docs/model.md section 5); rotations 0..1; every",
        "# pot leg (ohm) as put in the netlist (docs/model.md section 3: R (1 - y) and R y, each >= 1 ohm).",
        f"points_per_decade = {POINTS_PER_DECADE}",
        f"f_start = {num(F_START)}",
        f"f_stop = {num(F_STOP)}",
        "",
    ]
    for name, parts in SETS.items():
        cases.append(f"[set.{name}]")
        cases.extend(toml_parts(parts))
        cases.append("")
    written = []
    for name, parts in SETS.items():
        for knobs in STACK_SETTINGS:
            tag = f"stack-{name}-{knob_tag(knobs)}"
            leg = stack_legs(parts, knobs)
            title = (f"Tone stack alone, part set '{name}', treble {knobs[0]}, middle {knobs[1]}, bass {knobs[2]}: "
                     "ideal source, open output")
            lines = HEAD.format(title=title).split("\n")[:-1]
            lines.append("Vin in 0 dc 0 ac 1")
            lines.extend(stack_lines(parts, leg, "in"))
            lines.append(f"Rout tone 0 {num(OPEN_LOAD)}")
            lines.extend(control_lines("@DATA@"))
            netlist = "\n".join(lines) + "\n"
            rows = run_ngspice(netlist, workdir)
            written.append((f"{tag}.cir", netlist.replace("@DATA@", f"{tag}.ac.txt")))
            written.append((f"{tag}.csv", csv_text(rows)))
            cases.append("[[stack]]")
            cases.append(f'file = "{tag}.csv"')
            cases.append(f'netlist = "{tag}.cir"')
            cases.append(f'set = "{name}"')
            cases.append(f"treble = {num(knobs[0])}")
            cases.append(f"middle = {num(knobs[1])}")
            cases.append(f"bass = {num(knobs[2])}")
            cases.append(f"output_load = {num(OPEN_LOAD)}")
            cases.extend(toml_legs(leg))
            cases.append("")
    parts = SETS[LOADED["set"]]
    for level in LOADED["levels"]:
        tag = f"loaded-level{level:.1f}"
        leg = stack_legs(parts, LOADED["knobs"])
        level_top, level_bottom = legs(LOADED["level_pot"], level)
        t, m, b = LOADED["knobs"]
        title = (f"Tone stack '{LOADED['set']}' loaded by the level pot at {level}, treble {t}, middle {m}, bass {b}: "
                 "ideal source, coupling cap, feed resistor, level pot, stack, load resistor")
        lines = HEAD.format(title=title).split("\n")[:-1]
        lines.append("Vin in 0 dc 0 ac 1")
        lines.append(f"Ccoupling in coupling_out {num(LOADED['coupling_cap'])}")
        lines.append(f"Rfeed coupling_out level_top {num(LOADED['feed_resistor'])}")
        lines.append("* level pot: top lug level_top, wiper level_wiper (drives the stack), bottom lug ground")
        lines.append(f"Rlevel_top level_top level_wiper {num(level_top)}")
        lines.append(f"Rlevel_bottom level_wiper 0 {num(level_bottom)}")
        lines.extend(stack_lines(parts, leg, "level_wiper"))
        lines.append(f"Rload tone 0 {num(parts['load_resistor'])}")
        lines.extend(control_lines("@DATA@"))
        netlist = "\n".join(lines) + "\n"
        rows = run_ngspice(netlist, workdir)
        written.append((f"{tag}.cir", netlist.replace("@DATA@", f"{tag}.ac.txt")))
        written.append((f"{tag}.csv", csv_text(rows)))
        total, law = LOADED["level_pot"]
        cases.append("[[loaded]]")
        cases.append(f'file = "{tag}.csv"')
        cases.append(f'netlist = "{tag}.cir"')
        cases.append(f'set = "{LOADED["set"]}"')
        cases.append(f"level = {num(level)}")
        cases.append(f"treble = {num(t)}")
        cases.append(f"middle = {num(m)}")
        cases.append(f"bass = {num(b)}")
        cases.append(f"coupling_cap = {num(LOADED['coupling_cap'])}")
        cases.append(f"feed_resistor = {num(LOADED['feed_resistor'])}")
        cases.append(f'level_pot = {{ resistance = {num(total)}, law = "{law}" }}')
        cases.append(f"level_top_leg = {num(level_top)}")
        cases.append(f"level_bottom_leg = {num(level_bottom)}")
        cases.append(f"output_load = {num(parts['load_resistor'])}")
        cases.extend(toml_legs(leg))
        cases.append("")
    written.append(("cases.toml", "\n".join(cases)))
    # Write everything only once every ngspice run has succeeded: a failure leaves the old files as they were.
    os.makedirs(out_dir, exist_ok=True)
    for name, text in written:
        tmp = os.path.join(out_dir, f".{name}.tmp")
        with open(tmp, "w", encoding="utf-8") as f:
            f.write(text)
        os.replace(tmp, os.path.join(out_dir, name))
    return [name for name, _ in written]


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--out", default=HERE, help="where to write (default: beside this script)")
    args = parser.parse_args()
    if shutil.which("ngspice") is None:
        sys.exit("gen.py: ngspice is not on PATH (Debian: apt-get install ngspice)")
    workdir = tempfile.mkdtemp(prefix="breakdown-tonestack-")
    try:
        names = generate(os.path.abspath(args.out), workdir)
    except GenError as e:
        sys.exit(f"gen.py: {e}")
    finally:
        shutil.rmtree(workdir, ignore_errors=True)
    print(f"wrote {len(names)} files to {os.path.abspath(args.out)}")


if __name__ == "__main__":
    main()

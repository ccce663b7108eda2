#!/usr/bin/env python3
"""Regenerate Breakdown's ngspice reference data (Python 3.11+ standard library, plus ngspice on PATH).

For every case directory under references/ (one holding case.toml and circuit.toml):
  1. read circuit.toml (the circuit-file format of docs/model.md section 5, the circuit of section 3) and
     case.toml (input signal and settings); circuit.toml is the single source of truth for every part value;
  2. write netlist.cir: the same circuit, from the jack through every preamp stage, the gain stage and the
     follower to the clamp (and the tone stack when there is one), with the device equations of docs/model.md
     section 4 as behavioural sources (Koren plate current, Dempwolf-Zoelzer grid current for every valve,
     exponential-breakdown Zener with series resistance);
  3. run `ngspice -b` (trapezoidal rule, tight tolerances, output interpolated on a grid of 1/(48000 k) s,
     internal step at most an eighth of that);
  4. band-limit the fine ngspice output with a zero-phase Kaiser-windowed sinc low-pass (cut-off 22 kHz) and keep
     every k-th sample: reference.csv holds time, clamp node, wiper, every preamp plate, the gain plate (and the
     tone stack output) in volts on the 48 kHz grid. Picking every k-th row without the low-pass would fold the
     clamp's harmonics above 33 kHz onto the harmonics below 15 kHz that the comparison keeps.

Usage: python3 references/gen.py [--out DIR] [--cases NAME,NAME] [--jobs N] [--refine N]
With --out, netlists and data go to DIR/<case>/ instead of beside the case files (the cross-check test uses
this to compare a fresh run with the committed data).

Timing mode for benchmarks (`breakdown bench`): ngspice on a circuit file driven by a DI-like input at
audio-rate settings (output step and maximum step 1/48000 s, reltol 1e-3), nothing written:
  python3 references/gen.py timing --circuit FILE.toml --seconds S [--amplitude V] [--gain G] [--level L]
                                   [--position P] [--treble T] [--middle M] [--bass B] [--netlist FILE.cir]
prints one JSON line on stdout, {"realtime_factor": X, "simulated_seconds": S, "cpu_seconds": T}, with
realtime_factor = S / T and T = ngspice's own CPU time (user + system); exit 1 (message on stderr) on failure.
"""

import argparse
import concurrent.futures
import json
import math
import operator
import os
import re
import shutil
import subprocess
import sys
import tempfile
import time
import tomllib

HERE = os.path.dirname(os.path.abspath(__file__))
PARTS_RS = os.path.join(HERE, "..", "dsp", "src", "parts.rs")

BASE_RATE = 48000.0
# Default ratio of the ngspice output grid to the 48 kHz grid: TSTEP = 1/(48000*16) s (768 kHz), and the
# internal step is limited to TSTEP/8 (about 6 MHz).
DEFAULT_OVERSAMPLE = 16
MAX_STEP_DIVISOR = 8
# Decimation low-pass: Kaiser-windowed sinc (J. F. Kaiser, ISCAS 1974), half length in base-rate samples.
LOWPASS_CUTOFF_HZ = 22000.0
LOWPASS_HALF_SPAN_BASE = 20
LOWPASS_BETA = 10.0
# Extra simulated time after the last kept sample, so the low-pass sees real data at the end (s).
TAIL_SECONDS = 0.0006

# ngspice tolerances (see references/README.md, "tolerances"): reltol 1e-6; the absolute floors sit above the
# double-precision noise of a high-gain multi-stage circuit (a chain gain of 1e4-1e5 carries the rounding of the
# first stages to the last), which tighter floors made ngspice reject as non-convergence until the step collapsed.
TOLERANCES = os.environ.get("BREAKDOWN_NGSPICE_TOLERANCES",
                            "reltol=1e-06 abstol=1e-9 vntol=1e-5 chgtol=1e-8 trtol=1")

# Timing mode: audio-rate step (1/48000 s) and a looser relative tolerance; a DI-like input of plucked notes
# (open-string pitches E2 A2 D3 G3 in Hz, equal temperament from A4 = 440 Hz), each a fundamental and two
# overtones (harmonic, weight, extra decay rate 1/s), scaled so the waveform peaks at --amplitude.
TIMING_RELTOL = 1e-3
TIMING_NOTE_SECONDS = 1.0
TIMING_DECAY_SECONDS = 0.2
TIMING_NOTES = (82.40689, 110.0, 146.83238, 195.99772)
TIMING_PARTIALS = ((1, 1.0, 0.0), (2, 0.5, 10.0), (3, 0.3, 20.0))

# Thermal voltage used by the Zener fit and model (docs/model.md section 4).
VT = 0.025852

# Koren 1996 parameter sets (docs/model.md section 4): mu, ex, kg1, kp, kvb.
TUBES = {
    "12AX7": (100.0, 1.4, 1060.0, 600.0, 300.0),
    "12AT7": (60.0, 1.35, 460.0, 300.0, 300.0),
    "12AU7": (21.5, 1.3, 1180.0, 84.0, 300.0),
}

# Smallest resistance of either pot leg (ohm), as dsp/src/pot.rs POT_END_RESISTANCE.
POT_END_RESISTANCE = 1.0
# Default jack-to-ground resistor when [input] gives none (as dsp/src/circuit/mod.rs).
DEFAULT_INPUT_RESISTOR = 1e6
# Tone knobs not given in case.toml (as dsp/src/circuit/mod.rs Settings).
DEFAULT_TONE = 0.5


class CaseError(Exception):
    pass


def pot_fraction(law, x):
    """Share of the track below the wiper: linear y = x, log y = (81^x - 1)/80 (docs/model.md section 3)."""
    x = min(max(x, 0.0), 1.0)
    if law == "linear":
        return x
    if law == "log":
        return (81.0 ** x - 1.0) / 80.0
    raise CaseError(f"unknown pot law '{law}' (expected 'log' or 'linear')")


def pot_legs(law, total, x):
    """(top lug to wiper, wiper to bottom lug) = (R (1 - y), R y), each at least 1 ohm."""
    y = pot_fraction(law, x)
    return max(total * (1.0 - y), POT_END_RESISTANCE), max(total * y, POT_END_RESISTANCE)


def family_table():
    """1N47xxA rows (volts -> (izt, zzt, izk, zzk) in A and ohm) as typed in dsp/src/parts.rs."""
    rows = {}
    with open(PARTS_RS, encoding="utf-8") as f:
        text = f.read()
    pattern = re.compile(r'"(1N47\d\dA)"\s+([0-9.]+)\s+([0-9.]+)\s+([0-9.]+)\s+([0-9.]+)\s+([0-9.]+)\s*;')
    for m in pattern.finditer(text):
        v, izt, zzt, izk, zzk = (float(g) for g in m.groups()[1:])
        rows[v] = (izt * 1e-3, zzt, izk * 1e-3, zzk)
    if len(rows) < 30:
        raise CaseError(f"could not read the 1N47xxA table from {PARTS_RS}")
    return rows


def zener_fit(spec, table, what):
    """Fit of docs/model.md section 4: nbv = (Zzk - Zzt)/(Vt (1/Izk - 1/Izt)), rs = Zzt - nbv Vt/Izt;
    rs < 0 -> rs = 0, nbv = Zzk Izk / Vt; Vzj = Vz - Izt rs."""
    volts = float(need(spec, "volts", what))
    keys = ("izt", "zzt", "izk", "zzk")
    given = [k for k in keys if k in spec]
    if len(given) == 4:
        izt, zzt, izk, zzk = (float(spec[k]) for k in keys)
    elif not given:
        row = next((r for v, r in table.items() if abs(v - volts) < 1e-6), None)
        if row is None:
            raise CaseError(f"{what}: {volts} V is not a 1N47xxA row; give izt, zzt, izk, zzk explicitly")
        izt, zzt, izk, zzk = row
    else:
        raise CaseError(f"{what}: give all four knee figures (izt, zzt, izk, zzk) or none")
    nbv = (zzk - zzt) / (VT * (1.0 / izk - 1.0 / izt))
    rs = zzt - nbv * VT / izt
    if rs < 0.0:
        rs = 0.0
        nbv = zzk * izk / VT
    return {"volts": volts, "izt": izt, "nbv": nbv, "rs": rs, "vzj": volts - izt * rs}


NETLIST_HEAD = """\
* Reference netlist for cross-checking Breakdown's model with ngspice (generated by references/gen.py
* from {source}; do not edit by hand).
* Circuit of docs/model.md section 3; device equations of docs/model.md section 4, as behavioural sources:
* Koren 1996 plate current, Dempwolf-Zoelzer (DAFx-11) grid current (every valve), exponential-breakdown Zener
* with series resistance fitted to datasheet knee data.
* Numerical notes (none of these changes a device current anywhere in the physical range):
* - ln(1+exp(x)) is written as the overflow-free softplus: x + ln(1+exp(-x)) for x > 0 (same value and slope).
* - Zener exponentials continue linearly (C1) beyond a junction forward voltage of 1.0 V and a breakdown
*   exponent of 12, as the model does; the circuits here stay far inside those limits.
* - the breakdown term has its zero-bias value subtracted, so the junction passes no current at 0 V.
* - a 1e12 ohm GMIN-style resistor across each Zener junction, as SPICE puts across every pn junction.
* Nodes: in = the sine source; gs = the ideal attenuator's output (the jack when the gain setting is the
* attenuator); s<k>grid, s<k>plate, s<k>cath, s<k>net (after the coupling cap), s<k>wiper or s<k>div (the
* network's output), s<k>bplus = preamp stage k; g1, p1, k1 = gain stage grid, plate, cathode (gbplus its own
* B+ when it has one); k2 = follower cathode; c1 = coupling cap output; top, w = level pot top and wiper;
* m = between the two Zeners; tt, tone, bt, mt, mw, sn = tone stack (treble top, output, bass top, middle top,
* middle wiper, slope node); bplus = the top-level supply.
.param vt={vt}
.param gg=6.177e-4 xi=1.314 cg=9.901 ig0=8.025e-8
.param vfx=1.0 abx=12
.func softplus(x) {{x > 0 ? x + ln(1 + exp(-x)) : ln(1 + exp(x))}}
.subckt triode p g k mu=100 ex=1.4 kg1=1060 kp=600 kvb=300
Bp p k I = {{ V(p,k) > 0 ? 2*pwr(V(p,k)/kp*softplus(kp*(1/mu + V(g,k)/sqrt(kvb + V(p,k)*V(p,k)))), ex)/kg1 : 0 }}
Bg g k I = {{ gg*pwr(softplus(cg*V(g,k))/cg, xi) + ig0 }}
.ends
* zener: anode a, cathode c. Junction (a->j) with forward Shockley and exponential breakdown, then series rs (j->c)
.subckt zener a c vzj=20 izt=12.5m nbv=7 rs=7
Bj a j I = {{ 1e-14*(V(a,j) < vfx ? exp(V(a,j)/vt) - 1 : exp(vfx/vt)*(1 + (V(a,j) - vfx)/vt) - 1)
+ - izt*(-(V(a,j) + vzj)/(nbv*vt) < abx ? exp(-(V(a,j) + vzj)/(nbv*vt)) : exp(abx)*(1 - (V(a,j) + vzj)/(nbv*vt) - abx)) + izt*exp(-vzj/(nbv*vt)) }}
Rgmin a j 1e12
Rz j c {{rs}}
.ends
* the same part with rs = 0 (ngspice would silently turn a 0 ohm resistor into 1 mohm)
.subckt zener0 a c vzj=20 izt=12.5m nbv=7
Bj a c I = {{ 1e-14*(V(a,c) < vfx ? exp(V(a,c)/vt) - 1 : exp(vfx/vt)*(1 + (V(a,c) - vfx)/vt) - 1)
+ - izt*(-(V(a,c) + vzj)/(nbv*vt) < abx ? exp(-(V(a,c) + vzj)/(nbv*vt)) : exp(abx)*(1 - (V(a,c) + vzj)/(nbv*vt) - abx)) + izt*exp(-vzj/(nbv*vt)) }}
Rgmin a c 1e12
.ends
"""


def r(x):
    """Full-precision number for the netlist."""
    return repr(float(x))


def zener_line(name, anode, cathode, z):
    if z["rs"] > 0.0:
        return (f"{name} {anode} {cathode} zener vzj={r(z['vzj'])} izt={r(z['izt'])} nbv={r(z['nbv'])} "
                f"rs={r(z['rs'])}")
    return f"{name} {anode} {cathode} zener0 vzj={r(z['vzj'])} izt={r(z['izt'])} nbv={r(z['nbv'])}"


def need(table, key, what):
    if key not in table:
        raise CaseError(f"{what}: missing key '{key}'")
    return table[key]


def number(table, key, what, low=None, high=None):
    """A number from a TOML table, with a message naming the key, value and range when it is wrong."""
    value = need(table, key, what)
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise CaseError(f"{what}: {key} = {value!r}: expected a number")
    value = float(value)
    if not math.isfinite(value) or (low is not None and value < low) or (high is not None and value > high):
        raise CaseError(f"{what}: {key} = {value!r}: must be within {low} .. {high}")
    return value


def optional_number(table, key, what, default, low=None, high=None):
    return number(table, key, what, low, high) if key in table else default


def choice(table, key, what, allowed):
    value = need(table, key, what)
    if value not in allowed:
        raise CaseError(f"{what}: {key} = {value!r}: expected one of {', '.join(repr(a) for a in allowed)}")
    return value


def only_keys(table, allowed, what):
    unknown = sorted(k for k in table if k not in allowed)
    if unknown:
        raise CaseError(f"{what}: unknown key(s) {', '.join(unknown)} (known: {', '.join(sorted(allowed))})")


def read_input(circuit, what):
    """The [input] section, or the old [drive] one (input_resistor only under [input], as the Rust reader)."""
    if "input" in circuit and "drive" in circuit:
        raise CaseError(f"{what}: both [input] and [drive]: [drive] is the old name of [input]; keep one")
    if "input" in circuit:
        section = circuit["input"]
        only_keys(section, ("volts_at_full_scale", "input_resistor"), f"{what} [input]")
        return optional_number(section, "input_resistor", f"{what} [input]", DEFAULT_INPUT_RESISTOR, 1.0)
    if "drive" in circuit:
        only_keys(circuit["drive"], ("volts_at_full_scale",), f"{what} [drive]")
        return DEFAULT_INPUT_RESISTOR
    raise CaseError(f"{what}: missing section [input]")


def settings_of(table, what):
    """gain, level, position and the tone knobs (0..1, default 0.5) from a settings table."""
    s = {
        "gain": number(table, "gain", what, 0.0, 1.0),
        "level": number(table, "level", what, 0.0, 1.0),
        "treble": optional_number(table, "treble", what, DEFAULT_TONE, 0.0, 1.0),
        "middle": optional_number(table, "middle", what, DEFAULT_TONE, 0.0, 1.0),
        "bass": optional_number(table, "bass", what, DEFAULT_TONE, 0.0, 1.0),
    }
    position = need(table, "position", what)
    if isinstance(position, bool) or not isinstance(position, int) or position < 0:
        raise CaseError(f"{what}: position = {position!r}: expected a switch index counted from 0")
    s["position"] = position
    return s


def triode_line(label, p, gr, k, tube):
    mu, ex, kg1, kp, kvb = TUBES[tube]
    return f"{label} {p} {gr} {k} triode mu={r(mu)} ex={r(ex)} kg1={r(kg1)} kp={r(kp)} kvb={r(kvb)}"


def tube_of(table, what):
    return choice(table, "tube", what, tuple(TUBES))


def common_cathode_lines(labels, source, nodes, supply, stage, what, tube):
    """The netlist lines of one common-cathode stage (a [[preamp]] stage or the gain stage): the grid stopper
    from `source`, the triode, the plate resistor from `supply`, the cathode resistor and, when it is above 0,
    the cathode bypass. `labels` = (stopper, triode, plate resistor, cathode resistor, bypass) element names,
    `nodes` = (grid, plate, cathode)."""
    stopper, triode, plate_r, cathode_r, bypass_c = labels
    grid, plate, cath = nodes
    lines = [
        f"{stopper} {source} {grid} {r(number(stage, 'grid_stopper', what, 1.0))}",
        triode_line(triode, plate, grid, cath, tube),
        f"{plate_r} {supply} {plate} {r(number(stage, 'plate_resistor', what, 1.0))}",
        f"{cathode_r} {cath} 0 {r(number(stage, 'cathode_resistor', what, 1.0))}",
    ]
    bypass = number(stage, "cathode_bypass", what, 0.0)
    if bypass > 0.0:
        lines.append(f"{bypass_c} {cath} 0 {r(bypass)}")
    else:
        lines.append("* cathode unbypassed (cathode_bypass = 0)")
    return lines


def build_circuit(name, circuit, settings, amplitude, frequency, table):
    """The circuit's element lines (docs/model.md section 3) driven by a sine of `amplitude` volts peak at
    the jack, and the probes to write as [(column name, node)]."""
    what = f"{name} circuit.toml"
    top_keys = ("name", "supply_volts", "input", "drive", "preamp", "gain_stage", "follower", "clamp",
                "tone_stack", "listen")
    only_keys(circuit, top_keys, what)
    supply = number(circuit, "supply_volts", what, 50.0, 500.0)
    input_resistor = read_input(circuit, what)
    stages = circuit.get("preamp", [])
    if not isinstance(stages, list):
        raise CaseError(f"{what}: preamp must be an array of tables ([[preamp]])")
    g = need(circuit, "gain_stage", what)
    fo = need(circuit, "follower", what)
    c = need(circuit, "clamp", what)
    stack = circuit.get("tone_stack")
    only_keys(g, ("tube", "supply_volts", "gain_pot_law", "grid_stopper", "plate_resistor", "cathode_resistor",
                  "cathode_bypass"), f"{what} [gain_stage]")
    only_keys(fo, ("tube", "cathode_resistor"), f"{what} [follower]")
    only_keys(c, ("coupling_cap", "feed_resistor", "level_pot", "level_pot_law", "placement", "load_resistor",
                  "position"), f"{what} [clamp]")

    # Where the gain setting acts (docs/model.md section 3, "gain control").
    controls = [k for k, s in enumerate(stages)
                if isinstance(s.get("volume"), dict) and s["volume"].get("control") == "gain"]
    if len(controls) > 1:
        raise CaseError(f"{what}: preamp stages {[k + 1 for k in controls]} all say control = \"gain\": "
                        "at most one pot can be the gain control")
    gain_law = None
    if not controls:
        gain_law = choice(g, "gain_pot_law", f"{what} [gain_stage] (no preamp volume has control = \"gain\")",
                          ("log", "linear"))

    positions = c.get("position", [])
    position = settings["position"]
    if not 0 <= position < len(positions):
        raise CaseError(f"{name}: position {position} is past the switch list ({len(positions)} positions)")
    sw = positions[position]
    placement = choice(c, "placement", f"{what} [clamp]", ("across-pot", "at-wiper"))
    level_law = choice(c, "level_pot_law", f"{what} [clamp]", ("log", "linear"))
    level_top, level_bottom = pot_legs(level_law, number(c, "level_pot", f"{what} [clamp]", 1.0),
                                       settings["level"])
    gain, level = settings["gain"], settings["level"]

    lines = []
    if gain_law is not None:
        attenuation = pot_fraction(gain_law, gain)
        gain_text = f"gain {gain} ({gain_law} law, attenuation {attenuation!r})"
    else:
        gain_text = f"gain {gain} turns preamp stage {controls[0] + 1}'s volume"
    lines.append(f"* switch position {position} '{sw.get('name', '')}', {gain_text}, level {level} "
                 f"({level_law} law), placement {placement}")
    lines.append(f"* input: {amplitude} V peak, {frequency} Hz sine at the jack, starting at t = 0")

    # Supplies: every stage that gives supply_volts has its own ideal DC source; the others (and the
    # follower's plate) hang from bplus, the top-level supply.
    lines.append(f"VBP bplus 0 DC {r(supply)}")
    stage_supply = []
    for k, s in enumerate(stages, start=1):
        if "supply_volts" in s:
            node = f"s{k}bplus"
            lines.append(f"VS{k} {node} 0 DC {r(number(s, 'supply_volts', f'{what} preamp stage {k}', 50.0, 500.0))}")
        else:
            node = "bplus"
        stage_supply.append(node)
    if "supply_volts" in g:
        gain_supply = "gbplus"
        lines.append(f"VBG gbplus 0 DC {r(number(g, 'supply_volts', f'{what} [gain_stage]', 50.0, 500.0))}")
    else:
        gain_supply = "bplus"

    lines.append(f"VIN in 0 DC 0 SIN(0 {r(amplitude)} {r(frequency)} 0 0 0)")
    if gain_law is not None:
        lines.append("* gain pot as an ideal attenuator (voltage-controlled source)")
        lines.append(f"EG gs 0 in 0 {r(attenuation)}")
        source = "gs"
    else:
        lines.append("* the jack gets the sine directly (the gain setting turns a preamp volume pot)")
        source = "in"
    if stages:
        lines.append(f"RIN {source} 0 {r(input_resistor)}")

    probes = []
    for k, s in enumerate(stages, start=1):
        sw_what = f"{what} preamp stage {k}"
        only_keys(s, ("tube", "supply_volts", "grid_stopper", "plate_resistor", "cathode_resistor",
                      "cathode_bypass", "coupling_cap", "grid_leak", "volume", "divider"), sw_what)
        tube = tube_of(s, sw_what)
        networks = [key for key in ("grid_leak", "volume", "divider") if key in s]
        if len(networks) != 1:
            raise CaseError(f"{sw_what}: give exactly one of grid_leak, volume, divider after the coupling cap "
                            f"(found {' and '.join(networks) or 'none'})")
        network = networks[0]
        desc = f"{tube}, B+ {r(number(s, 'supply_volts', sw_what)) if 'supply_volts' in s else r(supply)} V"
        body = []
        grid, plate, cath, net = f"s{k}grid", f"s{k}plate", f"s{k}cath", f"s{k}net"
        body += common_cathode_lines((f"RS{k}STOP", f"XS{k}", f"RS{k}PLATE", f"RS{k}CATH", f"CS{k}BYP"),
                                     source, (grid, plate, cath), stage_supply[k - 1], s, sw_what, tube)
        body.append(f"CS{k}COUP {plate} {net} {r(number(s, 'coupling_cap', sw_what, 1e-15))}")
        if network == "grid_leak":
            leak = number(s, "grid_leak", sw_what, 1.0)
            desc += f", grid leak {r(leak)} ohm"
            body.append(f"RS{k}LEAK {net} 0 {r(leak)}")
            out = net
        elif network == "volume":
            v = s["volume"]
            vw = f"{sw_what} volume"
            if not isinstance(v, dict):
                raise CaseError(f"{vw}: expected a table {{ resistance, law, ... }}")
            only_keys(v, ("resistance", "law", "bright_cap", "control", "rotation"), vw)
            law = choice(v, "law", vw, ("log", "linear"))
            if "control" in v:
                choice(v, "control", vw, ("gain",))
                if "rotation" in v:
                    raise CaseError(f"{vw}: control = \"gain\" and rotation both given: drop rotation")
                rotation, turned = gain, "the gain setting"
            elif "rotation" in v:
                rotation, turned = number(v, "rotation", vw, 0.0, 1.0), "fixed"
            else:
                raise CaseError(f"{vw}: give control = \"gain\" or rotation = 0..1")
            total = number(v, "resistance", vw, 1.0)
            upper, lower = pot_legs(law, total, rotation)
            out = f"s{k}wiper"
            desc += (f", volume {r(total)} ohm {law} at {rotation} ({turned}; y = {pot_fraction(law, rotation)!r})")
            body.append(f"RS{k}TOP {net} {out} {r(upper)}")
            body.append(f"RS{k}BOT {out} 0 {r(lower)}")
            bright = number(v, "bright_cap", vw, 0.0)  # required, 0 = none (as the Rust reader)
            if bright > 0.0:
                desc += f", bright cap {r(bright)} F"
                body.append(f"CS{k}BRIGHT {net} {out} {r(bright)}")
        else:
            d = s["divider"]
            dw = f"{sw_what} divider"
            if not isinstance(d, dict):
                raise CaseError(f"{dw}: expected a table {{ series, shunt, series_cap? }}")
            only_keys(d, ("series", "series_cap", "shunt"), dw)
            out = f"s{k}div"
            series, shunt = number(d, "series", dw, 1.0), number(d, "shunt", dw, 1.0)
            desc += f", divider {r(series)} / {r(shunt)} ohm"
            body.append(f"RS{k}SER {net} {out} {r(series)}")
            cap = number(d, "series_cap", dw, 0.0)  # required, 0 = none (as the Rust reader)
            if cap > 0.0:
                desc += f", {r(cap)} F across the series leg"
                body.append(f"CS{k}SER {net} {out} {r(cap)}")
            body.append(f"RS{k}SHUNT {out} 0 {r(shunt)}")
        lines.append(f"* preamp stage {k}: {desc}")
        lines.extend(body)
        probes.append((f"plate{k}", plate))
        source = out

    gw = f"{what} [gain_stage]"
    fw = f"{what} [follower]"
    lines += common_cathode_lines(("RGS", "X1", "RP1", "RK1", "CK1"), source, ("g1", "p1", "k1"), gain_supply, g,
                                  gw, tube_of(g, gw))
    lines.append(triode_line("X2", "bplus", "p1", "k2", tube_of(fo, fw)))
    lines.append(f"RK2 k2 0 {r(number(fo, 'cathode_resistor', fw, 1.0))}")
    cw = f"{what} [clamp]"
    lines.append(f"CC k2 c1 {r(number(c, 'coupling_cap', cw, 1e-15))}")
    # Level pot: top leg from its top to the wiper w, bottom leg from w to ground. The Zeners sit at the top
    # ("across-pot") or at the wiper ("at-wiper"); either way the clamp node is where they connect.
    clamp = "top" if placement == "across-pot" else "w"
    lines.append(f"RS c1 top {r(number(c, 'feed_resistor', cw, 1.0))}")
    lines.append(f"RPA top w {r(level_top)}")
    lines.append(f"RPB w 0 {r(level_bottom)}")
    if "load_resistor" in c:
        lines.append(f"RL w 0 {r(number(c, 'load_resistor', cw, 1.0))}")
    elif stack is None:
        raise CaseError(f"{cw}: load_resistor is missing: without a [tone_stack] something must load the wiper")
    else:
        lines.append("* no load resistor at the wiper: the tone stack alone loads it")
    pos = sw.get("positive")
    neg = sw.get("negative")
    zp = zener_fit(pos, table, f"{name} positive part") if pos else None
    zn = zener_fit(neg, table, f"{name} negative part") if neg else None
    for label, z in (("positive", zp), ("negative", zn)):
        if z:
            lines.append(f"* {label} part: {z['volts']} V, Izt {z['izt']} A -> nbv {z['nbv']!r}, rs {z['rs']!r} ohm")
    if zp and zn:
        lines.append(zener_line("XZP", "m", clamp, zp))
        lines.append(zener_line("XZN", "m", "0", zn))
    elif zp:
        lines.append(zener_line("XZP", "0", clamp, zp))
    elif zn:
        lines.append(zener_line("XZN", clamp, "0", zn))
    else:
        lines.append("* switch position with no parts: clamp node left open")
    if stack is not None:
        lines.extend(tone_stack_lines(stack, settings, f"{what} [tone_stack]"))

    probes = [("clamp", clamp), ("wiper", "w")] + probes + [("gain_plate", "p1")]
    if stack is not None:
        probes.append(("tone", "tone"))
    return lines, probes


def tone_stack_lines(t, settings, what):
    """The passive three-knob stack of docs/model.md section 3.1, driven by the level pot's wiper w."""
    only_keys(t, ("slope_resistor", "treble_cap", "bass_cap", "middle_cap", "treble_pot", "bass_pot",
                  "middle_pot", "load_resistor"), what)

    def pot(key):
        p = need(t, key, what)
        if not isinstance(p, dict):
            raise CaseError(f"{what}: {key}: expected {{ resistance = ..., law = \"log\" }}")
        only_keys(p, ("resistance", "law"), f"{what} {key}")
        return number(p, "resistance", f"{what} {key}", 1.0), choice(p, "law", f"{what} {key}", ("log", "linear"))

    tr, tl = pot("treble_pot")
    br, bl = pot("bass_pot")
    mr, ml = pot("middle_pot")
    t_up, t_down = pot_legs(tl, tr, settings["treble"])
    _, b_leg = pot_legs(bl, br, settings["bass"])
    m_up, m_down = pot_legs(ml, mr, settings["middle"])
    return [
        f"* tone stack (docs/model.md section 3.1): treble {settings['treble']}, middle {settings['middle']}, "
        f"bass {settings['bass']}",
        f"CTREB w tt {r(number(t, 'treble_cap', what, 1e-15))}",
        f"RTREBA tt tone {r(t_up)}",
        f"RTREBB tone bt {r(t_down)}",
        f"RSLOPE w sn {r(number(t, 'slope_resistor', what, 1.0))}",
        f"CBASS sn bt {r(number(t, 'bass_cap', what, 1e-15))}",
        "* bass pot as a variable resistor: top lug and wiper joined at bt, the leg R y to mt",
        f"RBASS bt mt {r(b_leg)}",
        f"CMID sn mw {r(number(t, 'middle_cap', what, 1e-15))}",
        f"RMIDA mt mw {r(m_up)}",
        f"RMIDB mw 0 {r(m_down)}",
        f"RTONE tone 0 {r(number(t, 'load_resistor', what, 1.0))}",
    ]


def build_netlist(name, circuit, case, table, refine, raw_name):
    """Netlist text, the probe columns [(name, node)], the number of 48 kHz samples to keep and the output grid
    factor (TSTEP = 1/(48000 factor)). case.toml may set [ngspice] oversample (the output grid factor, default
    16) and step_divisor (internal step at most TSTEP/step_divisor, default 8); refine multiplies oversample
    (refine 2 halves both the output grid and the internal step, for checking that the step is fine enough)."""
    signal = need(case, "signal", "case.toml")
    amplitude = number(signal, "amplitude_volts", "case.toml [signal]", 0.0)
    frequency = number(signal, "frequency", "case.toml [signal]", 1.0, 20000.0)
    duration = number(signal, "duration", "case.toml [signal]", 1.0 / BASE_RATE, 10.0)
    settings = settings_of(need(case, "settings", "case.toml"), "case.toml [settings]")
    spice = case.get("ngspice", {})
    only_keys(spice, ("oversample", "step_divisor"), "case.toml [ngspice]")
    oversample = spice.get("oversample", DEFAULT_OVERSAMPLE)
    divisor = spice.get("step_divisor", MAX_STEP_DIVISOR)
    for key, value in (("oversample", oversample), ("step_divisor", divisor)):
        if isinstance(value, bool) or not isinstance(value, int) or not 1 <= value <= 256:
            raise CaseError(f"case.toml [ngspice]: {key} = {value!r}: expected a whole number 1 .. 256 "
                            "(output grid 1/(48000 oversample) s, internal step at most output step / step_divisor)")
    oversample *= refine

    tstep = 1.0 / (BASE_RATE * oversample)
    samples = int(round(duration * BASE_RATE))
    # Stop on the output grid, a little after the last kept sample (the low-pass needs the tail).
    tstop = (oversample * (samples - 1) + math.ceil(TAIL_SECONDS * BASE_RATE * oversample)) * tstep

    body, probes = build_circuit(name, circuit, settings, amplitude, frequency, table)
    lines = [NETLIST_HEAD.format(vt=VT, source="circuit.toml and case.toml in this directory")]
    lines.append(f"* case '{name}': {case.get('description', '')}")
    lines.extend(body)
    lines.append(f"* trapezoidal rule, internal step at most TSTEP/{divisor}; interp writes the output on "
                 f"the exact TSTEP grid (1/{int(BASE_RATE * oversample)} s)")
    lines.append(f".options method=trap {TOLERANCES} itl4=50 interp")
    lines.append(f".tran {r(tstep)} {r(tstop)} 0 {r(tstep / divisor)}")
    lines.append(".control")
    lines.append("set numdgt=15")
    lines.append("set wr_singlescale")
    lines.append("run")
    lines.append(f"wrdata {raw_name} " + " ".join(f"v({node})" for _, node in probes))
    lines.append("quit")
    lines.append(".endc")
    lines.append(".end")
    return "\n".join(lines) + "\n", probes, samples, oversample


def di_source_line(amplitude, seconds):
    """A DI-like input at the jack: a plucked note every TIMING_NOTE_SECONDS, cycling through four open-string
    pitches, each a fundamental with two decaying overtones, a 1 ms attack and a 0.2 s decay (a behavioural
    source of `time`; it reaches amplitude volts peak near the start of each note)."""
    period = TIMING_NOTE_SECONDS
    tn = f"(time - {r(period)}*floor(time/{r(period)}))"
    index = f"(floor(time/{r(period)}) - 4*floor(time/{r(4 * period)}))"
    f0 = " : ".join(f"{index} < {i + 0.5} ? {r(f)}" for i, f in enumerate(TIMING_NOTES[:-1]))
    f0 = f"({f0} : {r(TIMING_NOTES[-1])})"
    env = f"(1 - exp(-{tn}/1e-3))*exp(-{tn}/{r(TIMING_DECAY_SECONDS)})"
    partials = " + ".join(f"{r(w)}*exp(-{tn}*{r(d)})*sin({r(2 * math.pi * h)}*{f0}*{tn})"
                          for h, w, d in TIMING_PARTIALS)
    return f"BIN in 0 V = {{ {r(amplitude / di_peak())}*{env}*({partials}) }}"


def di_peak():
    """Largest magnitude of the DI-like waveform before scaling, sampled at 48 kHz over one cycle of notes."""
    peak = 0.0
    for i, f0 in enumerate(TIMING_NOTES):
        for n in range(int(TIMING_NOTE_SECONDS * BASE_RATE)):
            tn = n / BASE_RATE
            env = (1 - math.exp(-tn / 1e-3)) * math.exp(-tn / TIMING_DECAY_SECONDS)
            v = env * sum(w * math.exp(-tn * d) * math.sin(2 * math.pi * h * f0 * tn) for h, w, d in TIMING_PARTIALS)
            peak = max(peak, abs(v))
    return peak


def timing_netlist(path, circuit, settings, amplitude, seconds, table):
    """The circuit of `path` driven by a DI-like input (di_source_line) at audio-rate settings: output step and
    maximum step 1/48000 s, reltol 1e-3, ngspice's other tolerances at their defaults; only the clamp node is kept."""
    name = os.path.basename(path)
    body, probes = build_circuit(name, circuit, settings, amplitude, TIMING_NOTES[0], table)
    # build_circuit drives the jack with a sine source VIN; the timing netlist drives it with the DI-like source.
    body = [di_source_line(amplitude, seconds) if line.startswith("VIN ") else line for line in body]
    body = [line for line in body if not line.startswith("* input: ")]
    step = 1.0 / BASE_RATE
    lines = [NETLIST_HEAD.format(vt=VT, source=f"{name} by gen.py timing, for benchmarks")]
    lines.append(f"* timing netlist: {seconds} s of a DI-like input ({amplitude} V peak, a note every "
                 f"{TIMING_NOTE_SECONDS} s), output step and maximum step 1/{int(BASE_RATE)} s, "
                 f"reltol {TIMING_RELTOL}")
    lines.extend(body)
    lines.append(f".options method=trap reltol={TIMING_RELTOL} itl4=50")
    lines.append(f".save v({dict(probes)['clamp']})")
    lines.append(f".tran {r(step)} {r(seconds)} 0 {r(step)}")
    lines.append(".control")
    lines.append("run")
    lines.append("quit")
    lines.append(".endc")
    lines.append(".end")
    return "\n".join(lines) + "\n"


def bessel_i0(x):
    total, term, half = 1.0, 1.0, x / 2.0
    for k in range(1, 200):
        term *= (half / k) ** 2
        total += term
        if term < 1e-17 * total:
            break
    return total


def lowpass_taps(oversample):
    """Zero-phase Kaiser-windowed sinc at the fine rate, unity DC gain; 2 M + 1 taps, M = 20 k."""
    m_half = LOWPASS_HALF_SPAN_BASE * oversample
    fc = LOWPASS_CUTOFF_HZ / (BASE_RATE * oversample)
    norm = bessel_i0(LOWPASS_BETA)
    taps = []
    for n in range(-m_half, m_half + 1):
        sinc = 2.0 * fc if n == 0 else math.sin(2.0 * math.pi * fc * n) / (math.pi * n)
        w = bessel_i0(LOWPASS_BETA * math.sqrt(max(0.0, 1.0 - (n / m_half) ** 2))) / norm
        taps.append(sinc * w)
    s = sum(taps)
    return [t / s for t in taps]


def read_wrdata(path, tstep, columns):
    """Rows of (time, column 1, ..., column n) from a wrdata file written with wr_singlescale."""
    rows = []
    width = 1 + columns
    with open(path, encoding="utf-8") as f:
        for line in f:
            parts = line.split()
            if len(parts) < width:
                continue
            try:
                rows.append([float(p) for p in parts[:width]])
            except ValueError:
                continue
    if not rows:
        raise CaseError(f"{path}: ngspice wrote no data")
    # interp puts every row on the TSTEP grid; check it.
    for i in (0, len(rows) // 2, len(rows) - 1):
        if abs(rows[i][0] - i * tstep) > 1e-3 * tstep:
            raise CaseError(f"{path}: row {i} at t = {rows[i][0]} is not on the {tstep} s grid")
    return rows


def decimate(values, oversample, samples, taps):
    """Low-pass and keep every oversample-th value; before t = 0 the circuit rests at its operating point."""
    m_half = (len(taps) - 1) // 2
    if oversample * (samples - 1) + m_half > len(values) - 1:
        raise CaseError("ngspice output ends before the low-pass tail")
    padded = [values[0]] * m_half + list(values)
    out = []
    for n in range(samples):
        base = n * oversample
        # fsum: correctly rounded, so the result does not depend on the Python version's summation order.
        out.append(math.fsum(map(operator.mul, taps, padded[base:base + len(taps)])))
    return out


def write_atomically(path, text):
    """Write text beside path, then rename over it: no half-written file is ever left behind."""
    tmp = f"{path}.tmp{os.getpid()}"
    try:
        with open(tmp, "w", encoding="utf-8") as f:
            f.write(text)
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.remove(tmp)


def run_case(name, out_root, refine, ngspice):
    case_dir = os.path.join(HERE, name)
    with open(os.path.join(case_dir, "circuit.toml"), "rb") as f:
        circuit = tomllib.load(f)
    with open(os.path.join(case_dir, "case.toml"), "rb") as f:
        case = tomllib.load(f)
    table = family_table()
    started = time.monotonic()
    netlist, probes, samples, oversample = build_netlist(name, circuit, case, table, refine, "raw.txt")
    with tempfile.TemporaryDirectory(prefix=f"breakdown-ngspice-{name}-") as work:
        raw = os.path.join(work, "raw.txt")
        with open(os.path.join(work, "netlist.cir"), "w", encoding="utf-8") as f:
            f.write(netlist)
        log_path = os.path.join(work, "ngspice.log")
        with open(log_path, "w", encoding="utf-8") as log:
            proc = subprocess.Popen([ngspice, "-b", "netlist.cir"], cwd=work, stdout=log,
                                    stderr=subprocess.STDOUT)
            # os.wait4 gives this child's own CPU time (the machine may be busy with other work).
            _, status, usage = os.wait4(proc.pid, 0)
            proc.returncode = os.waitstatus_to_exitcode(status)
        cpu_seconds = usage.ru_utime + usage.ru_stime
        rows = []
        if proc.returncode == 0 and os.path.exists(raw):
            rows = read_wrdata(raw, 1.0 / (BASE_RATE * oversample), len(probes))
        # ngspice ends with exit 0 even when it gives up half-way ("Timestep too small"): check the data is whole.
        needed = oversample * (samples - 1) + LOWPASS_HALF_SPAN_BASE * oversample + 1
        if len(rows) < needed:
            with open(log_path, encoding="utf-8", errors="replace") as log:
                tail = "\n".join(line for line in log.read().splitlines()[-30:] if line.strip())
            raise CaseError(f"{name}: ngspice stopped early (exit {proc.returncode}, {len(rows)} of {needed} "
                            f"output rows):\n{tail}")
    spice_seconds = time.monotonic() - started
    taps = lowpass_taps(oversample)
    columns = [decimate([row[1 + i] for row in rows], oversample, samples, taps) for i in range(len(probes))]
    names = [column for column, _ in probes]
    text = [f"# ngspice reference (references/gen.py): volts at {', '.join(names)}, band-limited to 22 kHz, "
            "48 kHz grid\n", "time," + ",".join(names) + "\n"]
    for n in range(samples):
        text.append(f"{n / BASE_RATE:.9e}," + ",".join(f"{col[n]:.9e}" for col in columns) + "\n")
    dest = os.path.join(out_root, name)
    os.makedirs(dest, exist_ok=True)
    write_atomically(os.path.join(dest, "netlist.cir"), netlist)
    write_atomically(os.path.join(dest, "reference.csv"), "".join(text))
    peaks = [(column, min(col), max(col)) for column, col in zip(names, columns)]
    return name, spice_seconds, cpu_seconds, time.monotonic() - started, peaks


def timing_main(argv):
    """gen.py timing: run ngspice on a circuit file at audio-rate settings and print one JSON line."""
    ap = argparse.ArgumentParser(
        prog="gen.py timing",
        description="Time ngspice on a circuit file driven by a DI-like input at audio-rate settings (output step "
                    "and maximum step 1/48000 s, reltol 1e-3). Prints one JSON line: "
                    '{"realtime_factor": X, "simulated_seconds": S, "cpu_seconds": T}, '
                    "realtime_factor = simulated seconds / ngspice CPU seconds.")
    ap.add_argument("--circuit", required=True, help="circuit file (docs/model.md section 5)")
    ap.add_argument("--seconds", type=float, required=True, help="simulated seconds (0 < S <= 600)")
    ap.add_argument("--amplitude", type=float, default=0.3, help="DI peak volts at the jack (default 0.3)")
    ap.add_argument("--gain", type=float, default=0.8, help="gain setting 0..1 (default 0.8)")
    ap.add_argument("--level", type=float, default=0.5, help="level setting 0..1 (default 0.5)")
    ap.add_argument("--position", type=int, help="switch position (default: the first that holds parts)")
    for knob in ("treble", "middle", "bass"):
        ap.add_argument(f"--{knob}", type=float, default=DEFAULT_TONE, help=f"{knob} setting 0..1 (default 0.5)")
    ap.add_argument("--netlist", help="also keep the netlist at this path (for reading; not needed to time)")
    args = ap.parse_args(argv)

    def fail(message, code=1):
        print(f"gen.py timing: {message}", file=sys.stderr)
        return code

    if not math.isfinite(args.seconds) or not 0.0 < args.seconds <= 600.0:
        return fail(f"--seconds {args.seconds}: expected 0 < S <= 600 (simulated seconds)", 2)
    if not math.isfinite(args.amplitude) or not 0.0 <= args.amplitude <= 20.0:
        return fail(f"--amplitude {args.amplitude}: expected 0 .. 20 V peak at the jack", 2)
    ngspice = shutil.which("ngspice")
    if ngspice is None:
        return fail("ngspice is not on PATH (Debian: apt-get install ngspice)", 2)
    try:
        with open(args.circuit, "rb") as f:
            circuit = tomllib.load(f)
        settings = {"gain": args.gain, "level": args.level, "treble": args.treble, "middle": args.middle,
                    "bass": args.bass}
        for key, value in settings.items():
            if not 0.0 <= value <= 1.0:
                raise CaseError(f"--{key} {value}: a pot rotation must be within 0 .. 1")
        positions = circuit.get("clamp", {}).get("position", [])
        position = args.position
        if position is None:
            # As the model's default: the first switch position that holds parts (0 when none does).
            position = next((i for i, p in enumerate(positions) if "positive" in p or "negative" in p), 0)
        settings["position"] = position
        text = timing_netlist(args.circuit, circuit, settings, args.amplitude, args.seconds, family_table())
        if args.netlist:
            write_atomically(args.netlist, text)
    except (CaseError, OSError, tomllib.TOMLDecodeError) as e:
        return fail(str(e))
    except (KeyError, ValueError, TypeError, AttributeError) as e:
        return fail(f"{args.circuit}: not a circuit this script can read ({type(e).__name__}: {e})")
    with tempfile.TemporaryDirectory(prefix="breakdown-ngspice-timing-") as work:
        with open(os.path.join(work, "timing.cir"), "w", encoding="utf-8") as f:
            f.write(text)
        log_path = os.path.join(work, "ngspice.log")
        with open(log_path, "w", encoding="utf-8") as log:
            proc = subprocess.Popen([ngspice, "-b", "timing.cir"], cwd=work, stdout=log, stderr=subprocess.STDOUT)
            # os.wait4 gives this child's own CPU time (user + system), whatever else the machine is doing.
            _, status, usage = os.wait4(proc.pid, 0)
        code = os.waitstatus_to_exitcode(status)
        with open(log_path, encoding="utf-8", errors="replace") as log:
            log_text = log.read()
    cpu = usage.ru_utime + usage.ru_stime
    # ngspice may exit 0 after giving up half-way: look for its own failure messages too.
    bad = [line for line in log_text.splitlines()
           if "timestep too small" in line.lower() or "simulation(s) aborted" in line.lower()
           or line.lower().startswith("error")]
    if code != 0 or bad:
        tail = "\n".join(line for line in log_text.splitlines()[-20:] if line.strip())
        return fail(f"ngspice failed on {args.circuit} (exit {code}):\n{tail}")
    if cpu <= 0.0:
        return fail("ngspice reported no CPU time; cannot form a real-time factor")
    print(json.dumps({"realtime_factor": args.seconds / cpu, "simulated_seconds": args.seconds,
                      "cpu_seconds": cpu}))
    return 0


def main():
    if sys.argv[1:2] == ["timing"]:
        return timing_main(sys.argv[2:])
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0],
                                 epilog="python3 references/gen.py timing --help: the timing mode for benchmarks")
    ap.add_argument("--out", default=HERE,
                    help="directory for <case>/netlist.cir and <case>/reference.csv")
    ap.add_argument("--cases", default="", help="comma-separated case names (default: every case)")
    ap.add_argument("--jobs", type=int, default=2, help="ngspice runs in parallel (default 2)")
    ap.add_argument("--refine", type=int, default=1,
                    help="multiply every case's output grid and internal step rate by N (default 1; 2 halves the "
                         "step, to check it is fine enough)")
    args = ap.parse_args()
    ngspice = shutil.which("ngspice")
    if ngspice is None:
        print("gen.py: ngspice is not on PATH (Debian: apt-get install ngspice)", file=sys.stderr)
        return 2
    if not 1 <= args.refine <= 16:
        print(f"gen.py: --refine {args.refine}: expected 1 .. 16", file=sys.stderr)
        return 2
    all_cases = sorted(d for d in os.listdir(HERE)
                       if os.path.isfile(os.path.join(HERE, d, "case.toml")))
    cases = [c for c in args.cases.split(",") if c] or all_cases
    unknown = [c for c in cases if c not in all_cases]
    if unknown:
        print(f"gen.py: unknown case(s) {', '.join(unknown)} (known: {', '.join(all_cases)})", file=sys.stderr)
        return 2
    started = time.monotonic()
    failed = False
    total_cpu = 0.0
    with concurrent.futures.ThreadPoolExecutor(max_workers=max(1, args.jobs)) as pool:
        futures = [pool.submit(run_case, c, args.out, args.refine, ngspice) for c in cases]
        for fut in futures:
            try:
                name, spice, cpu, seconds, peaks = fut.result()
                total_cpu += cpu
                print(f"{name:18s} ngspice {spice:6.1f} s ({cpu:5.1f} s CPU), with post-processing {seconds:6.1f} s")
                for column, lo, hi in peaks:
                    print(f"    {column:12s} {lo:+9.3f} .. {hi:+9.3f} V")
            except (CaseError, OSError, tomllib.TOMLDecodeError, KeyError, ValueError, TypeError) as e:
                print(f"gen.py: {e}", file=sys.stderr)
                failed = True
    print(f"total {time.monotonic() - started:.1f} s (ngspice CPU {total_cpu:.1f} s)")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())

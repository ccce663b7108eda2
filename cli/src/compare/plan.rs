//! Comparison plans: our own TOML format, read and checked completely before anything is rendered.
//!
//! ```toml
//! di = ["take1.wav", "take2.wav"]   # DI files, relative to this plan
//! circuit = "builtin"               # or a circuit file, relative to this plan
//! output = "compare-out"            # output folder, relative to this plan
//! target_lufs = -18.0               # loudness target of the matched files (EBU R128)
//! listen = "chain"                  # what the clips play: "chain" (tone stack, then cabinet) or "wiper"
//! cabinet = "builtin"               # the chain's cabinet: "builtin", "none" or an impulse-response WAV
//!
//! [input]                           # the input calibration; overrides the circuit file's [input]
//! volts_at_full_scale = 1.0         # peak volts at the input jack for a 0 dBFS sample ...
//! # dbu_at_full_scale = 4.0         # ... or the same as "0 dBFS = X dBu" (one of the two)
//! tone_peak_volts = 0.3             # 1 kHz test tone for the THD_F readout, peak volts at the jack
//!
//! [ab]
//! segment_seconds = 4.0             # each variant plays this long in the A/B clip
//! marker = "tick"                   # "tick" or "silence" between segments
//!
//! [[variant]]
//! name = "switch at 1"
//! position = 1                      # a switch position of the circuit (counted from 0) ...
//!
//! [[variant]]
//! name = "18 V / 5.6 V"
//! positive = 18.0                   # ... or an explicit pair by Vz (knee data from the 1N47xxA table)
//! negative = 5.6                    # (or a part with its own datasheet knee data, as in circuit files:
//!                                   #  positive = { volts = 18.0, izt = 0.014, zzt = 20.0, izk = 2.5e-4, zzk = 750.0 })
//! gain = 0.8                        # pot positions above 0 up to 1 (defaults: the plan's `gain`/`level`, else 0.8/0.5)
//! level = 0.5
//! quality = 4                       # oversampling 1, 2, 4, 8 or 16
//! ```
//!
//! Every problem is reported as one message naming the plan file, the line, the key with the value given,
//! and what was expected. The command line's --volts-at-full-scale / --input-dbu override the plan's
//! calibration, which overrides the circuit file's.

use crate::listening::Listening;
use crate::options::{check_calibration_dbu, check_calibration_volts, parse_circuit, Calibration};
use breakdown_dsp::circuit::{SwitchPosition, ZenerSpec, ZENER_VOLTS};
use breakdown_dsp::units::{clip, si};
use breakdown_dsp::{Circuit, Quality, Settings};
use serde::Deserialize;
use std::collections::HashMap;
use std::ops::Range;
use std::path::{Path, PathBuf};
use toml::{Spanned, Value};

/// Default loudness target of the matched files (LUFS).
pub const DEFAULT_TARGET_LUFS: f64 = -18.0;
/// Default peak volts of the 1 kHz test tone: a typical passive single-coil/humbucker level [common practice].
pub const DEFAULT_TONE_PEAK_VOLTS: f64 = 0.3;
/// Default A/B segment length (s): two bars at 120 bpm.
pub const DEFAULT_SEGMENT_SECONDS: f64 = 4.0;
/// Longest plan file read (bytes): a plan is a page of text.
pub const MAX_PLAN_BYTES: u64 = 1 << 20;
/// Longest user text echoed in a message (characters).
const ECHO: usize = 40;

/// A value as the plan gives it, with where it is.
type Leaf = Spanned<Value>;

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawPlan {
    di: Option<Leaf>,
    circuit: Option<Leaf>,
    output: Option<Leaf>,
    target_lufs: Option<Leaf>,
    listen: Option<Leaf>,
    cabinet: Option<Leaf>,
    gain: Option<Leaf>,
    level: Option<Leaf>,
    quality: Option<Leaf>,
    input: Option<RawInput>,
    ab: Option<RawAb>,
    #[serde(default)]
    variant: Vec<RawVariant>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawInput {
    volts_at_full_scale: Option<Leaf>,
    dbu_at_full_scale: Option<Leaf>,
    tone_peak_volts: Option<Leaf>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawAb {
    segment_seconds: Option<Leaf>,
    marker: Option<Leaf>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawVariant {
    name: Option<Leaf>,
    position: Option<Leaf>,
    positive: Option<Leaf>,
    negative: Option<Leaf>,
    gain: Option<Leaf>,
    level: Option<Leaf>,
    quality: Option<Leaf>,
}

/// What sits between segments of the A/B clip.
#[derive(Clone, Copy, Debug, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Marker {
    /// A short soft tick in the middle of the gap.
    Tick,
    /// Only the gap of silence.
    Silence,
}

/// One DI file named by the plan.
#[derive(Clone, Debug)]
pub struct DiEntry {
    pub path: PathBuf,
    /// The name as the plan gives it.
    pub name: String,
    /// File-name stem used in output names.
    pub stem: String,
    /// Plan line that names it.
    pub line: usize,
}

/// Which parts a variant uses.
#[derive(Clone, Debug, PartialEq)]
pub enum Parts {
    /// A position of the circuit's switch.
    Position { index: usize, name: String },
    /// An explicit pair, added to the circuit as an extra switch position.
    Pair {
        positive: Option<ZenerSpec>,
        negative: Option<ZenerSpec>,
    },
}

/// One variant, ready to render.
#[derive(Clone, Debug)]
pub struct Variant {
    pub name: String,
    /// Safe file-name form of the name.
    pub file_stem: String,
    /// The circuit as rendered (input calibration applied; explicit pairs added as the last position).
    pub circuit: Circuit,
    pub settings: Settings,
    pub quality: Quality,
    pub parts: Parts,
}

impl Variant {
    /// Human description of the parts.
    pub fn parts_description(&self) -> String {
        let part = |v: &Option<ZenerSpec>| match v {
            Some(z) if z.izt.is_some() => format!("Vz {} (own knee data)", si(z.volts, "V")),
            Some(z) => format!("Vz {} (1N47xxA knee data)", si(z.volts, "V")),
            None => "none".to_string(),
        };
        match &self.parts {
            Parts::Position { index, name } => format!("switch position {index} ({name})"),
            Parts::Pair { positive, negative } => format!(
                "explicit pair: positive {}, negative {}",
                part(positive),
                part(negative)
            ),
        }
    }
}

/// A checked plan.
#[derive(Clone, Debug)]
pub struct Plan {
    pub path: PathBuf,
    pub di: Vec<DiEntry>,
    /// "built-in preamp" or the circuit file's path.
    pub circuit_label: String,
    /// The circuit file, when the plan names one.
    pub circuit_path: Option<PathBuf>,
    pub output: PathBuf,
    /// Where the plan names the output folder (None when it was given on the command line).
    pub output_line: Option<usize>,
    pub target_lufs: f64,
    /// What every clip plays (the listening point and the cabinet).
    pub listening: Listening,
    pub calibration: Calibration,
    pub tone_peak_volts: f64,
    pub segment_seconds: f64,
    pub marker: Marker,
    pub variants: Vec<Variant>,
}

impl Plan {
    /// Replace the input calibration (the command line's overrides the plan's).
    pub fn set_calibration(&mut self, calibration: Calibration) -> Result<(), String> {
        check_tone_against_calibration(self.tone_peak_volts, &calibration)
            .map_err(|m| format!("{}: {m}", self.path.display()))?;
        for v in &mut self.variants {
            v.circuit.input.volts_at_full_scale = calibration.volts_at_full_scale;
        }
        self.calibration = calibration;
        Ok(())
    }
}

fn check_tone_against_calibration(tone: f64, c: &Calibration) -> Result<(), String> {
    if tone > c.volts_at_full_scale {
        return Err(format!(
            "input.tone_peak_volts = {} cannot be made with {}: the test tone would exceed 0 dBFS; lower \
             tone_peak_volts or raise the calibration",
            si(tone, "V"),
            c.describe()
        ));
    }
    Ok(())
}

/// 1-based line of a byte offset.
pub fn line_of(text: &str, offset: usize) -> usize {
    text.as_bytes()[..offset.min(text.len())]
        .iter()
        .filter(|b| **b == b'\n')
        .count()
        + 1
}

struct Ctx<'a> {
    shown: String,
    text: &'a str,
}

impl Ctx<'_> {
    fn at(&self, span: Range<usize>, message: impl std::fmt::Display) -> String {
        format!(
            "{} line {}: {message}",
            self.shown,
            line_of(self.text, span.start)
        )
    }
    fn line(&self, span: &Range<usize>) -> usize {
        line_of(self.text, span.start)
    }
    /// "key = VALUE: expected ..." at the value's line.
    fn expected(&self, what: &str, v: &Leaf, expected: &str) -> String {
        self.at(
            v.span(),
            format!("{what} = {}: expected {expected}", shown_value(v.get_ref())),
        )
    }
}

/// A value as TOML writes it, clipped.
fn shown_value(v: &Value) -> String {
    clip(&v.to_string(), ECHO)
}

/// Safe file-name stem: lower case letters, digits, '.', '-' and '_'; other runs become one '-'.
pub fn file_stem(name: &str) -> String {
    let mut out = String::new();
    for c in name.trim().chars() {
        let c = c.to_ascii_lowercase();
        if c.is_ascii_alphanumeric() || c == '.' || c == '_' {
            out.push(c);
        } else if !out.ends_with('-') {
            out.push('-');
        }
    }
    let out = out.trim_matches(|c| c == '-' || c == '.').to_string();
    let out: String = out.chars().take(80).collect();
    if out.is_empty() {
        "variant".into()
    } else {
        out
    }
}

/// A number (integer or float) in `low ..= high`, or a message naming key, value, range and reason.
fn number_in(
    ctx: &Ctx,
    what: &str,
    v: &Leaf,
    (low, high): (f64, f64),
    unit: &str,
    why: &str,
) -> Result<f64, String> {
    let show = |x: f64| {
        if unit.is_empty() {
            breakdown_dsp::units::significant(x, 4)
        } else {
            si(x, unit)
        }
    };
    let range = format!("{} .. {}", show(low), show(high));
    let x = match v.get_ref() {
        Value::Float(x) => *x,
        Value::Integer(i) => *i as f64,
        _ => return Err(ctx.expected(what, v, &format!("a number, {range} ({why})"))),
    };
    if !x.is_finite() || x < low || x > high {
        return Err(ctx.at(
            v.span(),
            format!("{what} = {}: must lie in {range} ({why})", show(x)),
        ));
    }
    Ok(x)
}

fn text_of<'v>(ctx: &Ctx, what: &str, v: &'v Leaf, expected: &str) -> Result<&'v str, String> {
    match v.get_ref() {
        Value::String(s) => Ok(s),
        _ => Err(ctx.expected(what, v, expected)),
    }
}

fn quality_of(ctx: &Ctx, what: &str, q: &Leaf) -> Result<Quality, String> {
    let expected = "an oversampling factor: 1, 2, 4, 8 or 16";
    let factor = match q.get_ref() {
        Value::Integer(i) => usize::try_from(*i).ok(),
        Value::Float(x) if x.fract() == 0.0 && *x >= 0.0 && *x <= 64.0 => Some(*x as usize),
        _ => None,
    };
    factor
        .and_then(Quality::from_factor)
        .ok_or_else(|| ctx.expected(what, q, expected))
}

/// A pot rotation for a plan: above 0 (a pot at 0 silences the stage, and a silent clip has no loudness to
/// match) up to 1.
fn pot_of(ctx: &Ctx, what: &str, v: &Leaf) -> Result<f64, String> {
    let x = number_in(
        ctx,
        what,
        v,
        (0.0, 1.0),
        "",
        "a pot rotation, 0 fully down to 1 fully up",
    )?;
    if x == 0.0 {
        return Err(ctx.at(
            v.span(),
            format!(
                "{what} = 0: the pot fully down silences the stage, so the clip would be silent (loudness -inf \
                 LUFS) and could not be matched; give a rotation above 0 up to 1"
            ),
        ));
    }
    Ok(x)
}

/// A Zener as a plan gives it: its Vz in volts, or a circuit-file part table.
fn zener_of(ctx: &Ctx, what: &str, v: &Leaf) -> Result<ZenerSpec, String> {
    let expected = format!(
        "a Vz in volts ({}) or a part table {{ volts, izt, zzt, izk, zzk }}",
        ZENER_VOLTS.describe()
    );
    let spec = match v.get_ref() {
        Value::Float(_) | Value::Integer(_) => {
            let volts = number_in(
                ctx,
                what,
                v,
                (ZENER_VOLTS.low, ZENER_VOLTS.high),
                "V",
                ZENER_VOLTS.why,
            )?;
            ZenerSpec::volts(volts)
        }
        Value::Table(t) => {
            let mut spec = ZenerSpec::volts(f64::NAN);
            for (key, value) in t {
                let x = match value {
                    Value::Float(x) => *x,
                    Value::Integer(i) => *i as f64,
                    other => {
                        return Err(ctx.at(
                            v.span(),
                            format!(
                                "{what}.{} = {}: expected a number (SI units: V, A, ohm)",
                                clip(key, ECHO),
                                shown_value(other)
                            ),
                        ))
                    }
                };
                match key.as_str() {
                    "volts" => spec.volts = x,
                    "izt" => spec.izt = Some(x),
                    "zzt" => spec.zzt = Some(x),
                    "izk" => spec.izk = Some(x),
                    "zzk" => spec.zzk = Some(x),
                    other => {
                        return Err(ctx.at(
                            v.span(),
                            format!(
                                "{what}: unknown key '{}' in the part table (keys: volts, izt, zzt, izk, zzk)",
                                clip(other, ECHO)
                            ),
                        ))
                    }
                }
            }
            if spec.volts.is_nan() {
                return Err(ctx.at(
                    v.span(),
                    format!(
                        "{what}: the part table needs volts = Vz (its Zener voltage, {})",
                        ZENER_VOLTS.describe()
                    ),
                ));
            }
            spec.validate(what).map_err(|e| ctx.at(v.span(), e.0))?;
            spec
        }
        _ => return Err(ctx.expected(what, v, &expected)),
    };
    Ok(spec)
}

/// Read and check a plan file. `output_override` replaces the plan's output folder (used by `demo`).
pub fn load(path: &Path, output_override: Option<&Path>) -> Result<Plan, String> {
    let shown = path.display().to_string();
    if path.is_dir() {
        return Err(format!("plan '{shown}' is a folder, not a plan file"));
    }
    if std::fs::metadata(path).is_ok_and(|m| m.len() > MAX_PLAN_BYTES) {
        return Err(format!(
            "plan '{shown}' is longer than {MAX_PLAN_BYTES} bytes: not a plan file"
        ));
    }
    let text = std::fs::read_to_string(path).map_err(|e| match e.kind() {
        std::io::ErrorKind::NotFound => format!("plan '{shown}' not found"),
        std::io::ErrorKind::InvalidData => format!("plan '{shown}' is not a text file (not UTF-8)"),
        _ => format!("cannot read plan '{shown}': {e}"),
    })?;
    parse(path, &text, output_override)
}

/// The parser's message in the plan's words: its own struct names replaced by what the plan calls them.
fn friendly(message: &str) -> String {
    let mut m = message
        .lines()
        .map(str::trim)
        .filter(|l| !l.is_empty())
        .collect::<Vec<_>>()
        .join(": ");
    for (from, to) in [
        (
            "struct RawInput",
            "an [input] table (keys volts_at_full_scale or dbu_at_full_scale, tone_peak_volts)",
        ),
        ("struct RawAb", "an [ab] table (keys segment_seconds, marker)"),
        (
            "struct RawVariant",
            "a [[variant]] table (keys name, position or positive/negative, gain, level, quality)",
        ),
        (
            "struct RawPlan",
            "a plan (keys di, circuit, output, target_lufs, listen, cabinet, gain, level, quality, [input], [ab], \
             [[variant]])",
        ),
        ("a sequence", "a list of [[variant]] tables"),
    ] {
        m = m.replace(from, to);
    }
    m = m.replace("unknown field", "unknown key").replace("`", "'");
    clip(&m, 300)
}

fn parse_raw(ctx: &Ctx) -> Result<RawPlan, String> {
    toml::from_str(ctx.text).map_err(|e| {
        let message = friendly(e.message());
        match e.span() {
            Some(span) => ctx.at(span, message),
            None => format!("{}: {message}", ctx.shown),
        }
    })
}

fn read_di(ctx: &Ctx, dir: &Path, raw: Option<&Leaf>) -> Result<Vec<DiEntry>, String> {
    let expected = "a list of DI file names, e.g. di = [\"take1.wav\", \"take2.wav\"]";
    let Some(list) = raw else {
        return Err(format!(
            "{}: the plan names no DI files; add {expected}",
            ctx.shown
        ));
    };
    let Value::Array(items) = list.get_ref() else {
        return Err(ctx.expected("di", list, expected));
    };
    if items.is_empty() {
        return Err(ctx.at(list.span(), "di = []: name at least one DI file"));
    }
    let line = ctx.line(&list.span());
    let mut di = Vec::new();
    let mut stems: HashMap<String, usize> = HashMap::new();
    for item in items {
        let Value::String(name) = item else {
            return Err(ctx.at(
                list.span(),
                format!(
                    "di: {} is not a file name; expected {expected}",
                    shown_value(item)
                ),
            ));
        };
        let shown = clip(name, ECHO);
        if name.trim().is_empty() {
            return Err(ctx.at(list.span(), "di: a DI file name is empty"));
        }
        let full = dir.join(name);
        if !full.exists() {
            return Err(ctx.at(
                list.span(),
                format!(
                    "DI file '{shown}' not found (looked for '{}')",
                    full.display()
                ),
            ));
        }
        if full.is_dir() {
            return Err(ctx.at(
                list.span(),
                format!("DI '{shown}' is a folder, not a WAV file"),
            ));
        }
        let stem = file_stem(
            &full
                .file_stem()
                .map(|s| s.to_string_lossy().into_owned())
                .unwrap_or_default(),
        );
        if let Some(first) = stems.insert(stem.clone(), di.len() + 1) {
            return Err(ctx.at(
                list.span(),
                format!(
                    "DI '{shown}' has the same output name '{stem}' as DI {first} of the list; rename one file"
                ),
            ));
        }
        di.push(DiEntry {
            path: full,
            name: name.clone(),
            stem,
            line,
        });
    }
    Ok(di)
}

/// The circuit: built in, or a circuit file relative to the plan (its messages from the circuit reader).
fn read_circuit(
    ctx: &Ctx,
    dir: &Path,
    raw: Option<&Leaf>,
) -> Result<(Circuit, String, Option<PathBuf>), String> {
    let builtin = || (Circuit::builtin(), "built-in preamp".to_string(), None);
    let Some(c) = raw else {
        return Ok(builtin());
    };
    let name = text_of(ctx, "circuit", c, "\"builtin\" or a circuit file name")?;
    if name == "builtin" || name == "built-in" {
        return Ok(builtin());
    }
    let full = dir.join(name);
    let shown = clip(name, ECHO);
    if full.is_dir() {
        return Err(ctx.at(
            c.span(),
            format!("circuit = '{shown}' is a folder, not a circuit file"),
        ));
    }
    let text = std::fs::read_to_string(&full).map_err(|e| {
        let reason = match e.kind() {
            std::io::ErrorKind::NotFound => "not found".to_string(),
            std::io::ErrorKind::InvalidData => "is not a text file".to_string(),
            _ => e.to_string(),
        };
        ctx.at(
            c.span(),
            format!(
                "circuit file '{shown}' {reason} (looked for '{}')",
                full.display()
            ),
        )
    })?;
    let circuit = parse_circuit(&text, &shown).map_err(|e| ctx.at(c.span(), e))?;
    Ok((circuit, full.display().to_string(), Some(full)))
}

fn read_output(
    ctx: &Ctx,
    dir: &Path,
    raw: Option<&Leaf>,
    output_override: Option<&Path>,
) -> Result<(PathBuf, Option<usize>), String> {
    let (output, line) = match (output_override, raw) {
        (Some(o), _) => (o.to_path_buf(), None),
        (None, None) => {
            return Err(format!(
                "{}: the plan names no output folder; add output = \"FOLDER\"",
                ctx.shown
            ))
        }
        (None, Some(o)) => {
            let name = text_of(
                ctx,
                "output",
                o,
                "an output folder name, e.g. output = \"compare-out\"",
            )?;
            if name.trim().is_empty() {
                return Err(ctx.at(o.span(), "output = \"\": name an output folder"));
            }
            (dir.join(name), Some(ctx.line(&o.span())))
        }
    };
    if output.is_file() {
        let message = format!(
            "output '{}' is a file; the output must be a folder",
            output.display()
        );
        return Err(match (line, raw) {
            (Some(_), Some(o)) => ctx.at(o.span(), message),
            _ => message,
        });
    }
    Ok((output, line))
}

/// The calibration and the test tone from `[input]`, over the circuit's calibration.
fn read_input(
    ctx: &Ctx,
    raw: Option<&RawInput>,
    circuit: &Circuit,
    circuit_label: &str,
) -> Result<(Calibration, f64), String> {
    let mut calibration = Calibration {
        volts_at_full_scale: circuit.input.volts_at_full_scale,
        source: format!("the {circuit_label}'s [input] volts_at_full_scale"),
    };
    let mut tone = DEFAULT_TONE_PEAK_VOLTS;
    let Some(input) = raw else {
        return Ok((calibration, tone));
    };
    let in_plan = |m: String, v: &Leaf| ctx.at(v.span(), m);
    match (&input.volts_at_full_scale, &input.dbu_at_full_scale) {
        (Some(_), Some(d)) => return Err(ctx.at(
            d.span(),
            "[input] gives both volts_at_full_scale and dbu_at_full_scale: they state the same \
                 calibration; keep one",
        )),
        (Some(v), None) => {
            let x = number_in(
                ctx,
                "input.volts_at_full_scale",
                v,
                (f64::MIN, f64::MAX),
                "V",
                "",
            )?;
            calibration = Calibration {
                volts_at_full_scale: check_calibration_volts("input.volts_at_full_scale", x)
                    .map_err(|m| in_plan(m, v))?,
                source: "the plan's [input] volts_at_full_scale".into(),
            };
        }
        (None, Some(d)) => {
            let x = number_in(
                ctx,
                "input.dbu_at_full_scale",
                d,
                (f64::MIN, f64::MAX),
                "",
                "",
            )?;
            calibration = Calibration {
                volts_at_full_scale: check_calibration_dbu("input.dbu_at_full_scale", x)
                    .map_err(|m| in_plan(m, d))?,
                source: format!("the plan's [input] dbu_at_full_scale = {x}"),
            };
        }
        (None, None) => {}
    }
    if let Some(t) = &input.tone_peak_volts {
        tone = number_in(
            ctx,
            "input.tone_peak_volts",
            t,
            (1e-4, 100.0),
            "V",
            "the test tone's peak volts at the jack",
        )?;
        check_tone_against_calibration(tone, &calibration).map_err(|m| ctx.at(t.span(), m))?;
    } else {
        check_tone_against_calibration(tone, &calibration)
            .map_err(|m| format!("{}: {m} (the default test tone)", ctx.shown))?;
    }
    Ok((calibration, tone))
}

fn read_ab(ctx: &Ctx, raw: Option<&RawAb>) -> Result<(f64, Marker), String> {
    let (mut segment_seconds, mut marker) = (DEFAULT_SEGMENT_SECONDS, Marker::Tick);
    let Some(ab) = raw else {
        return Ok((segment_seconds, marker));
    };
    if let Some(s) = &ab.segment_seconds {
        segment_seconds = number_in(
            ctx,
            "ab.segment_seconds",
            s,
            (1.0, 60.0),
            "s",
            "how long each variant plays in the A/B clip",
        )?;
    }
    if let Some(m) = &ab.marker {
        let expected = "\"tick\" or \"silence\"";
        marker = match text_of(ctx, "ab.marker", m, expected)? {
            "tick" => Marker::Tick,
            "silence" => Marker::Silence,
            _ => return Err(ctx.expected("ab.marker", m, expected)),
        };
    }
    Ok((segment_seconds, marker))
}

/// The plan-wide gain, level and quality every variant starts from.
struct Defaults {
    gain: f64,
    level: f64,
    quality: Quality,
}

fn read_defaults(ctx: &Ctx, raw: &RawPlan) -> Result<Defaults, String> {
    let s = Settings::default();
    Ok(Defaults {
        gain: raw
            .gain
            .as_ref()
            .map(|g| pot_of(ctx, "gain", g))
            .transpose()?
            .unwrap_or(s.gain),
        level: raw
            .level
            .as_ref()
            .map(|l| pot_of(ctx, "level", l))
            .transpose()?
            .unwrap_or(s.level),
        quality: raw
            .quality
            .as_ref()
            .map(|q| quality_of(ctx, "quality", q))
            .transpose()?
            .unwrap_or_default(),
    })
}

/// One [[variant]] (number `k`, from 1).
fn read_variant(
    ctx: &Ctx,
    k: usize,
    v: &RawVariant,
    circuit: &Circuit,
    defaults: &Defaults,
) -> Result<(Variant, usize), String> {
    let what = |key: &str| format!("variant {k} {key}");
    let Some(name_leaf) = &v.name else {
        return Err(format!(
            "{}: variant {k} has no name; add name = \"...\" (it names the clip and the report row)",
            ctx.shown
        ));
    };
    let name = text_of(
        ctx,
        &what("name"),
        name_leaf,
        "the variant's name in quotes",
    )?
    .trim();
    let name_line = ctx.line(&name_leaf.span());
    if name.is_empty() {
        return Err(ctx.at(name_leaf.span(), format!("variant {k}: the name is empty")));
    }
    if name.chars().count() > 80 {
        return Err(ctx.at(
            name_leaf.span(),
            format!(
                "variant {k} name '{}': at most 80 characters (it names files and report rows)",
                clip(name, ECHO)
            ),
        ));
    }
    let gain = v
        .gain
        .as_ref()
        .map(|g| pot_of(ctx, &what("gain"), g))
        .transpose()?
        .unwrap_or(defaults.gain);
    let level = v
        .level
        .as_ref()
        .map(|l| pot_of(ctx, &what("level"), l))
        .transpose()?
        .unwrap_or(defaults.level);
    let quality = v
        .quality
        .as_ref()
        .map(|q| quality_of(ctx, &what("quality"), q))
        .transpose()?
        .unwrap_or(defaults.quality);
    let mut variant_circuit = circuit.clone();
    let shown_name = clip(name, ECHO);
    let (position, parts) = match (&v.position, &v.positive, &v.negative) {
        (Some(p), None, None) => {
            let count = circuit.clamp.position.len();
            let expected = format!(
                "a switch position counted from 0, 0 .. {} ({})",
                count - 1,
                circuit.position_list()
            );
            let index = match p.get_ref() {
                Value::Integer(i) => usize::try_from(*i).ok().filter(|i| *i < count),
                _ => None,
            }
            .ok_or_else(|| ctx.expected(&what("position"), p, &expected))?;
            let pname = circuit.clamp.position[index].name.clone();
            (index, Parts::Position { index, name: pname })
        }
        (Some(p), _, _) => {
            return Err(ctx.at(
                p.span(),
                format!(
                    "variant {k} ('{shown_name}'): give either position or an explicit pair (positive/negative), not both"
                ),
            ))
        }
        (None, None, None) => {
            return Err(ctx.at(
                name_leaf.span(),
                format!(
                    "variant {k} ('{shown_name}') names no parts: add position = N or positive = Vz, negative = Vz"
                ),
            ))
        }
        (None, pos, neg) => {
            let positive = pos.as_ref().map(|s| zener_of(ctx, &what("positive"), s)).transpose()?;
            let negative = neg.as_ref().map(|s| zener_of(ctx, &what("negative"), s)).transpose()?;
            variant_circuit.clamp.position.push(SwitchPosition {
                name: format!("plan variant {name}"),
                positive,
                negative,
            });
            (
                variant_circuit.clamp.position.len() - 1,
                Parts::Pair { positive, negative },
            )
        }
    };
    variant_circuit.validate().map_err(|e| {
        ctx.at(
            name_leaf.span(),
            format!("variant {k} ('{shown_name}'): {e}"),
        )
    })?;
    let variant = Variant {
        name: name.to_string(),
        file_stem: file_stem(name),
        circuit: variant_circuit,
        settings: Settings {
            gain,
            level,
            position,
            ..Default::default()
        },
        quality,
        parts,
    };
    Ok((variant, name_line))
}

fn read_variants(ctx: &Ctx, raw: &RawPlan, circuit: &Circuit) -> Result<Vec<Variant>, String> {
    if raw.variant.is_empty() {
        return Err(format!(
            "{}: the plan has no [[variant]] tables; add at least one (name plus position or positive/negative)",
            ctx.shown
        ));
    }
    let defaults = read_defaults(ctx, raw)?;
    let mut variants: Vec<Variant> = Vec::new();
    let mut names: HashMap<String, usize> = HashMap::new();
    let mut stems: HashMap<String, usize> = HashMap::new();
    for (k, v) in raw.variant.iter().enumerate() {
        let (variant, line) = read_variant(ctx, k + 1, v, circuit, &defaults)?;
        let shown = clip(&variant.name, ECHO);
        if let Some(first) = names.insert(variant.name.to_lowercase(), line) {
            return Err(format!(
                "{} line {line}: variant name '{shown}' is used twice (first on line {first}); names must differ",
                ctx.shown
            ));
        }
        if let Some(first) = stems.insert(variant.file_stem.clone(), line) {
            return Err(format!(
                "{} line {line}: variant name '{shown}' gives the same file name '{}' as the variant on line \
                 {first}; names must differ in letters or digits",
                ctx.shown, variant.file_stem
            ));
        }
        variants.push(variant);
    }
    Ok(variants)
}

/// `listen` and `cabinet` (a cabinet file relative to the plan), with the line of whichever is wrong.
fn read_listening(
    ctx: &Ctx,
    dir: &Path,
    listen: Option<&Leaf>,
    cabinet: Option<&Leaf>,
) -> Result<Listening, String> {
    let listen_text = listen
        .map(|l| text_of(ctx, "listen", l, "\"chain\" or \"wiper\""))
        .transpose()?;
    let cabinet_text = cabinet
        .map(|c| {
            text_of(
                ctx,
                "cabinet",
                c,
                "\"builtin\", \"none\" or an impulse-response WAV file name",
            )
        })
        .transpose()?;
    Listening::parse(listen_text, cabinet_text, dir, "listen =", "cabinet =").map_err(|e| {
        let span = if e.starts_with("listen") {
            listen.map(|l| l.span())
        } else {
            cabinet.or(listen).map(|c| c.span())
        };
        match span {
            Some(span) => ctx.at(span, e),
            None => format!("{}: {e}", ctx.shown),
        }
    })
}

/// Check a plan's text; relative paths resolve against the folder of `path`.
pub fn parse(path: &Path, text: &str, output_override: Option<&Path>) -> Result<Plan, String> {
    let ctx = Ctx {
        shown: path.display().to_string(),
        text,
    };
    let raw = parse_raw(&ctx)?;
    let dir = crate::files::folder_of(path);
    let di = read_di(&ctx, &dir, raw.di.as_ref())?;
    let (mut circuit, circuit_label, circuit_path) =
        read_circuit(&ctx, &dir, raw.circuit.as_ref())?;
    let (output, output_line) = read_output(&ctx, &dir, raw.output.as_ref(), output_override)?;
    let target_lufs = raw
        .target_lufs
        .as_ref()
        .map(|t| {
            number_in(
                &ctx,
                "target_lufs",
                t,
                (-60.0, -5.0),
                "LUFS",
                "the matched clips' integrated loudness",
            )
        })
        .transpose()?
        .unwrap_or(DEFAULT_TARGET_LUFS);
    let listening = read_listening(&ctx, &dir, raw.listen.as_ref(), raw.cabinet.as_ref())?;
    let label = if circuit_path.is_some() {
        "circuit file".to_string()
    } else {
        "built-in circuit".to_string()
    };
    let (calibration, tone_peak_volts) = read_input(&ctx, raw.input.as_ref(), &circuit, &label)?;
    circuit.input.volts_at_full_scale = calibration.volts_at_full_scale;
    let (segment_seconds, marker) = read_ab(&ctx, raw.ab.as_ref())?;
    let variants = read_variants(&ctx, &raw, &circuit)?;
    Ok(Plan {
        path: path.to_path_buf(),
        di,
        circuit_label,
        circuit_path,
        output,
        output_line,
        target_lufs,
        listening,
        calibration,
        tone_peak_volts,
        segment_seconds,
        marker,
        variants,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn plan_in(dir: &Path, body: &str) -> Result<Plan, String> {
        std::fs::write(dir.join("di.wav"), b"RIFF").unwrap();
        let path = dir.join("plan.toml");
        std::fs::write(&path, body).unwrap();
        load(&path, None)
    }

    fn temp(tag: &str) -> PathBuf {
        let d = std::env::temp_dir().join(format!("breakdown-plan-{tag}-{}", std::process::id()));
        std::fs::create_dir_all(&d).unwrap();
        d
    }

    const GOOD: &str = "di = [\"di.wav\"]\noutput = \"out\"\n\n[[variant]]\nname = \"off\"\nposition = 0\n\n\
                        [[variant]]\nname = \"asym\"\npositive = 18.0\nnegative = 5.6\ngain = 0.9\n";

    #[test]
    fn parts_printed_by_suggest_paste_into_a_plan() {
        // `breakdown suggest` prints each part as a circuit-file table; a plan must take it unchanged, knee
        // data included (1N52xxB parts carry their own, 1N47xxA parts take the family table).
        use crate::analysis::suggest::e24_parts;
        use breakdown_dsp::parts::{FAMILY_1N47XXA, FAMILY_1N52XXB};
        let pick = |family, volts: f64| {
            e24_parts(family)
                .into_iter()
                .find(|p| (p.volts - volts).abs() < 1e-9)
                .unwrap()
        };
        let (pos, neg) = (pick(&FAMILY_1N52XXB, 12.0), pick(&FAMILY_1N47XXA, 6.8));
        let d = temp("pasted");
        let body = format!(
            "di = [\"di.wav\"]\noutput = \"out\"\n\n[[variant]]\nname = \"pasted\"\npositive = {}\nnegative = {}\n",
            pos.toml(),
            neg.toml()
        );
        let plan = plan_in(&d, &body).unwrap();
        match &plan.variants[0].parts {
            Parts::Pair {
                positive: Some(p),
                negative: Some(n),
            } => {
                assert_eq!(p.volts, 12.0);
                assert_eq!(p.izt, pos.spec.izt);
                assert_eq!(p.zzk, pos.spec.zzk);
                assert_eq!(n.volts, 6.8);
                assert_eq!(n.datasheet(), neg.spec.datasheet());
            }
            other => panic!("expected an explicit pair, got {other:?}"),
        }
    }

    #[test]
    fn good_plan_reads_and_adds_explicit_pair_as_position() {
        let d = temp("good");
        let plan = plan_in(&d, GOOD).unwrap();
        assert_eq!(plan.variants.len(), 2);
        assert_eq!(plan.target_lufs, DEFAULT_TARGET_LUFS);
        let asym = &plan.variants[1];
        let reference = Circuit::builtin();
        assert_eq!(
            asym.circuit.clamp.position.len(),
            reference.clamp.position.len() + 1
        );
        assert_eq!(asym.settings.position, reference.clamp.position.len());
        assert_eq!(asym.settings.gain, 0.9);
        std::fs::remove_dir_all(d).unwrap();
    }

    #[test]
    fn errors_name_the_line() {
        let d = temp("errors");
        let unknown = GOOD.replace("gain = 0.9", "gian = 0.9");
        let e = plan_in(&d, &unknown).unwrap_err();
        assert!(e.contains("line 12") && e.contains("gian"), "{e}");
        let dup = GOOD.replace("\"asym\"", "\"off\"");
        let e = plan_in(&d, &dup).unwrap_err();
        assert!(e.contains("line 9") && e.contains("twice"), "{e}");
        let missing = GOOD.replace("di.wav\"]", "nope.wav\"]");
        let e = plan_in(&d, &missing).unwrap_err();
        assert!(e.contains("line 1") && e.contains("not found"), "{e}");
        let bad = GOOD.replace("gain = 0.9", "gain = 1.5");
        let e = plan_in(&d, &bad).unwrap_err();
        assert!(
            e.contains("line 12") && e.contains("variant 2 gain = 1.5: must lie in 0 .. 1"),
            "{e}"
        );
        let bad = GOOD.replace("position = 0", "position = 7");
        let e = plan_in(&d, &bad).unwrap_err();
        assert!(
            e.contains("line 6") && e.contains("variant 1 position = 7") && e.contains("0 .. 2"),
            "{e}"
        );
        std::fs::remove_dir_all(d).unwrap();
    }

    /// Any text as a plan: a plan or one clear line naming the plan file, never a panic (proptest).
    mod fuzz {
        use super::*;
        use proptest::prelude::*;

        fn lines() -> impl Strategy<Value = String> {
            let key = prop::sample::select(vec![
                "di",
                "circuit",
                "output",
                "target_lufs",
                "gain",
                "level",
                "quality",
                "name",
                "position",
                "positive",
                "negative",
                "volts_at_full_scale",
                "dbu_at_full_scale",
                "tone_peak_volts",
                "segment_seconds",
                "marker",
                "volts",
                "izt",
                "zzk",
            ]);
            let value = prop::sample::select(vec![
                "1",
                "0",
                "-1",
                "1e308",
                "nan",
                "inf",
                "\"abc\"",
                "[\"di.wav\"]",
                "[]",
                "{ volts = 5.1 }",
                "{ volts = \"x\" }",
                "true",
                "2.5",
                "\"builtin\"",
                "\"out\"",
                "[1, 2]",
                "{}",
            ]);
            let header = prop::sample::select(vec![
                "",
                "[input]",
                "[ab]",
                "[[variant]]",
                "[variant]",
                "[[input]]",
            ]);
            prop::collection::vec((header, key, value), 0..14).prop_map(|rows| {
                let mut t = String::new();
                for (h, k, v) in rows {
                    if !h.is_empty() {
                        t.push_str(h);
                        t.push('\n');
                    }
                    t.push_str(&format!("{k} = {v}\n"));
                }
                t
            })
        }

        fn check(text: &str) -> Result<(), TestCaseError> {
            let d = temp("fuzz");
            std::fs::write(d.join("di.wav"), b"RIFF").unwrap();
            match parse(&d.join("plan.toml"), text, None) {
                Ok(plan) => prop_assert!(!plan.variants.is_empty() && !plan.di.is_empty()),
                Err(e) => {
                    prop_assert!(e.contains("plan.toml"), "{e}");
                    prop_assert!(!e.contains('\n'), "several lines: {e}");
                    prop_assert!(e.len() < 1200, "{} characters: {e}", e.len());
                }
            }
            Ok(())
        }

        proptest! {
            #![proptest_config(ProptestConfig { cases: 400, failure_persistence: None, ..ProptestConfig::default() })]
            #[test]
            fn any_text(text in ".{0,400}") {
                check(&text)?;
            }
            #[test]
            fn plan_like_text(text in lines()) {
                check(&format!("di = [\"di.wav\"]\noutput = \"out\"\n{text}"))?;
            }
        }
    }
}

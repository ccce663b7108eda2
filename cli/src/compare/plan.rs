//! Comparison plans: our own TOML format, read and checked completely before anything is rendered.
//!
//! ```toml
//! di = ["take1.wav", "take2.wav"]   # DI files, relative to this plan
//! circuit = "builtin"               # or a circuit file, relative to this plan
//! output = "compare-out"            # output folder, relative to this plan
//! target_lufs = -18.0               # loudness target of the matched files (EBU R128)
//!
//! [input]
//! volts_at_full_scale = 1.0         # peak volts at the input jack for a 0 dBFS sample
//! tone_peak_volts = 0.3             # 1 kHz test tone for the THD readout, peak volts at the jack
//!
//! [ab]
//! segment_seconds = 4.0             # each variant plays this long in the A/B clip
//! marker = "tick"                   # "tick" or "silence" between segments
//!
//! [[variant]]
//! name = "stock"
//! position = 1                      # a switch position of the circuit ...
//!
//! [[variant]]
//! name = "18 V / 5.6 V"
//! positive = 18.0                   # ... or an explicit pair (volts; knee data from the 1N47xxA table)
//! negative = 5.6                    # (or a part with its own datasheet knee data, as in circuit files:
//!                                   #  positive = { volts = 18.0, izt = 0.014, zzt = 20.0, izk = 2.5e-4, zzk = 750.0 })
//! gain = 0.8                        # pot positions 0..1 (defaults: the plan's `gain`/`level`, else 0.8/0.5)
//! level = 0.5
//! quality = 4                       # oversampling 1, 2, 4, 8 or 16
//! ```
//!
//! Every problem is reported as one message naming the plan file and line.

use breakdown_dsp::circuit::{SwitchPosition, ZenerSpec};
use breakdown_dsp::{Circuit, Quality, Settings};
use serde::Deserialize;
use std::collections::HashMap;
use std::ops::Range;
use std::path::{Path, PathBuf};
use toml::Spanned;

/// Default loudness target of the matched files (LUFS).
pub const DEFAULT_TARGET_LUFS: f64 = -18.0;
/// Default peak volts of the 1 kHz test tone: a typical passive single-coil/humbucker level [common practice].
pub const DEFAULT_TONE_PEAK_VOLTS: f64 = 0.3;
/// Default A/B segment length (s): two bars at 120 bpm.
pub const DEFAULT_SEGMENT_SECONDS: f64 = 4.0;
/// Nominal voltage range of the 1 W 1N47xxA family (V).
const ZENER_RANGE: (f64, f64) = (3.3, 100.0);

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawPlan {
    di: Spanned<Vec<Spanned<String>>>,
    circuit: Option<Spanned<String>>,
    output: Spanned<String>,
    target_lufs: Option<Spanned<f64>>,
    gain: Option<Spanned<f64>>,
    level: Option<Spanned<f64>>,
    quality: Option<Spanned<i64>>,
    input: Option<RawInput>,
    ab: Option<RawAb>,
    #[serde(default)]
    variant: Vec<RawVariant>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawInput {
    volts_at_full_scale: Option<Spanned<f64>>,
    tone_peak_volts: Option<Spanned<f64>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawAb {
    segment_seconds: Option<Spanned<f64>>,
    marker: Option<Spanned<String>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawVariant {
    name: Spanned<String>,
    position: Option<Spanned<i64>>,
    positive: Option<Spanned<RawPart>>,
    negative: Option<Spanned<RawPart>>,
    gain: Option<Spanned<f64>>,
    level: Option<Spanned<f64>>,
    quality: Option<Spanned<i64>>,
}

/// A Zener in a plan: its voltage (knee data from the 1N47xxA table) or a circuit-file part table.
#[derive(Deserialize)]
#[serde(untagged)]
enum RawPart {
    Volts(f64),
    Spec(ZenerSpec),
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
            Some(z) if z.izt.is_some() => format!("{} V (own knee data)", z.volts),
            Some(z) => format!("{} V (1N47xxA knee data)", z.volts),
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
    /// "built-in reference circuit" or the circuit file's path.
    pub circuit_label: String,
    pub output: PathBuf,
    /// Where the plan names the output folder (None when it was given on the command line).
    pub output_line: Option<usize>,
    pub target_lufs: f64,
    pub volts_at_full_scale: f64,
    pub tone_peak_volts: f64,
    pub segment_seconds: f64,
    pub marker: Marker,
    pub variants: Vec<Variant>,
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
    if out.is_empty() {
        "variant".into()
    } else {
        out
    }
}

fn quality_of(ctx: &Ctx, q: &Spanned<i64>) -> Result<Quality, String> {
    let v = *q.get_ref();
    usize::try_from(v)
        .ok()
        .and_then(Quality::from_factor)
        .ok_or_else(|| {
            ctx.at(
                q.span(),
                format!("quality = {v} is impossible: the oversampling factor is 1, 2, 4, 8 or 16"),
            )
        })
}

fn pot_of(ctx: &Ctx, key: &str, v: &Spanned<f64>) -> Result<f64, String> {
    let x = *v.get_ref();
    if !(0.0..=1.0).contains(&x) {
        return Err(ctx.at(
            v.span(),
            format!("{key} = {x} is impossible: a pot position runs from 0 (fully down) to 1 (fully up)"),
        ));
    }
    Ok(x)
}

fn range_of(
    ctx: &Ctx,
    key: &str,
    v: &Spanned<f64>,
    low: f64,
    high: f64,
    unit: &str,
) -> Result<f64, String> {
    let x = *v.get_ref();
    if !x.is_finite() || x < low || x > high {
        return Err(ctx.at(
            v.span(),
            format!("{key} = {x} is impossible: it must lie between {low} and {high} {unit}"),
        ));
    }
    Ok(x)
}

fn zener_of(ctx: &Ctx, key: &str, v: &Spanned<RawPart>) -> Result<ZenerSpec, String> {
    let spec = match v.get_ref() {
        RawPart::Volts(x) => ZenerSpec::volts(*x),
        RawPart::Spec(spec) => *spec,
    };
    let x = spec.volts;
    if spec.izt.is_some() {
        // A part with its own knee data: the circuit check (Circuit::validate) judges the figures.
        return Ok(spec);
    }
    if !x.is_finite() || x < ZENER_RANGE.0 || x > ZENER_RANGE.1 {
        return Err(ctx.at(
            v.span(),
            format!(
                "{key} = {x} V is impossible here: the 1 W 1N47xxA family runs from {} V to {} V",
                ZENER_RANGE.0, ZENER_RANGE.1
            ),
        ));
    }
    Ok(spec)
}

/// Read and check a plan file. `output_override` replaces the plan's output folder (used by `demo`).
pub fn load(path: &Path, output_override: Option<&Path>) -> Result<Plan, String> {
    let shown = path.display().to_string();
    if path.is_dir() {
        return Err(format!("plan '{shown}' is a folder, not a plan file"));
    }
    let text = std::fs::read_to_string(path).map_err(|e| match e.kind() {
        std::io::ErrorKind::NotFound => format!("plan '{shown}' not found"),
        _ => format!("cannot read plan '{shown}': {e}"),
    })?;
    parse(path, &text, output_override)
}

/// Check a plan's text; relative paths resolve against the folder of `path`.
pub fn parse(path: &Path, text: &str, output_override: Option<&Path>) -> Result<Plan, String> {
    let ctx = Ctx {
        shown: path.display().to_string(),
        text,
    };
    let raw: RawPlan = toml::from_str(text).map_err(|e| {
        let mut message = e.message().trim().to_string();
        if message.contains("expected a sequence") {
            message.push_str(" (write a list, e.g. di = [\"take.wav\"])");
        }
        match e.span() {
            Some(span) => ctx.at(span, message),
            None => format!("{}: {message}", ctx.shown),
        }
    })?;
    let dir = path
        .parent()
        .map(Path::to_path_buf)
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or_else(|| PathBuf::from("."));

    // DI files: present, readable later, distinct names.
    if raw.di.get_ref().is_empty() {
        return Err(ctx.at(raw.di.span(), "di = []: name at least one DI file"));
    }
    let mut di = Vec::new();
    let mut stems: HashMap<String, usize> = HashMap::new();
    for entry in raw.di.get_ref() {
        let name = entry.get_ref();
        let full = dir.join(name);
        if name.trim().is_empty() {
            return Err(ctx.at(entry.span(), "a DI file name is empty"));
        }
        if !full.exists() {
            return Err(ctx.at(
                entry.span(),
                format!(
                    "DI file '{name}' not found (looked for '{}')",
                    full.display()
                ),
            ));
        }
        if full.is_dir() {
            return Err(ctx.at(
                entry.span(),
                format!("DI '{name}' is a folder, not a WAV file"),
            ));
        }
        let stem = file_stem(
            &full
                .file_stem()
                .map(|s| s.to_string_lossy().into_owned())
                .unwrap_or_default(),
        );
        if let Some(first) = stems.insert(stem.clone(), ctx.line(&entry.span())) {
            return Err(ctx.at(
                entry.span(),
                format!(
                    "DI '{name}' has the same output name '{stem}' as the DI on line {first}; rename one file"
                ),
            ));
        }
        di.push(DiEntry {
            path: full,
            name: name.clone(),
            stem,
            line: ctx.line(&entry.span()),
        });
    }

    // Circuit.
    let (mut circuit, circuit_label) = match &raw.circuit {
        None => (Circuit::builtin(), "built-in reference circuit".to_string()),
        Some(c) if c.get_ref() == "builtin" || c.get_ref() == "built-in" => {
            (Circuit::builtin(), "built-in reference circuit".to_string())
        }
        Some(c) => {
            let full = dir.join(c.get_ref());
            let circuit_text = std::fs::read_to_string(&full).map_err(|e| {
                let reason = if e.kind() == std::io::ErrorKind::NotFound {
                    "not found".to_string()
                } else {
                    e.to_string()
                };
                ctx.at(
                    c.span(),
                    format!(
                        "circuit file '{}' {reason} (looked for '{}')",
                        c.get_ref(),
                        full.display()
                    ),
                )
            })?;
            let circuit = Circuit::from_toml(&circuit_text)
                .map_err(|e| ctx.at(c.span(), format!("circuit file '{}': {e}", c.get_ref())))?;
            (circuit, full.display().to_string())
        }
    };

    // Output folder.
    let output = match output_override {
        Some(o) => o.to_path_buf(),
        None => {
            let o = raw.output.get_ref();
            if o.trim().is_empty() {
                return Err(ctx.at(raw.output.span(), "output = \"\": name an output folder"));
            }
            dir.join(o)
        }
    };
    if output.is_file() {
        let message = format!(
            "output '{}' is a file; the output must be a folder",
            output.display()
        );
        return Err(if output_override.is_some() {
            message
        } else {
            ctx.at(raw.output.span(), message)
        });
    }

    let target_lufs = match &raw.target_lufs {
        Some(t) => range_of(&ctx, "target_lufs", t, -60.0, -5.0, "LUFS")?,
        None => DEFAULT_TARGET_LUFS,
    };
    let (mut volts_at_full_scale, mut tone_peak_volts) =
        (circuit.input.volts_at_full_scale, DEFAULT_TONE_PEAK_VOLTS);
    if let Some(input) = &raw.input {
        if let Some(v) = &input.volts_at_full_scale {
            volts_at_full_scale = range_of(&ctx, "input.volts_at_full_scale", v, 1e-3, 100.0, "V")?;
        }
        if let Some(v) = &input.tone_peak_volts {
            tone_peak_volts = range_of(&ctx, "input.tone_peak_volts", v, 1e-4, 100.0, "V")?;
        }
    }
    if tone_peak_volts > volts_at_full_scale {
        let message = format!(
            "input.tone_peak_volts = {tone_peak_volts} V is impossible with volts_at_full_scale = \
             {volts_at_full_scale} V: the test tone would exceed 0 dBFS"
        );
        return Err(
            match raw.input.as_ref().and_then(|i| i.tone_peak_volts.as_ref()) {
                Some(s) => ctx.at(s.span(), message),
                None => format!("{}: {message}", ctx.shown),
            },
        );
    }
    circuit.input.volts_at_full_scale = volts_at_full_scale;

    let (mut segment_seconds, mut marker) = (DEFAULT_SEGMENT_SECONDS, Marker::Tick);
    if let Some(ab) = &raw.ab {
        if let Some(s) = &ab.segment_seconds {
            segment_seconds = range_of(&ctx, "ab.segment_seconds", s, 1.0, 60.0, "s")?;
        }
        if let Some(m) = &ab.marker {
            marker = match m.get_ref().as_str() {
                "tick" => Marker::Tick,
                "silence" => Marker::Silence,
                other => {
                    return Err(ctx.at(
                        m.span(),
                        format!("ab.marker = \"{other}\" is unknown: use \"tick\" or \"silence\""),
                    ))
                }
            }
        }
    }

    let defaults = Settings::default();
    let default_gain = match &raw.gain {
        Some(g) => pot_of(&ctx, "gain", g)?,
        None => defaults.gain,
    };
    let default_level = match &raw.level {
        Some(l) => pot_of(&ctx, "level", l)?,
        None => defaults.level,
    };
    let default_quality = match &raw.quality {
        Some(q) => quality_of(&ctx, q)?,
        None => Quality::default(),
    };

    if raw.variant.is_empty() {
        return Err(format!(
            "{}: the plan has no [[variant]] tables; add at least one (name plus position or positive/negative)",
            ctx.shown
        ));
    }
    let mut variants = Vec::new();
    let mut names: HashMap<String, usize> = HashMap::new();
    let mut file_stems: HashMap<String, usize> = HashMap::new();
    for v in &raw.variant {
        let name = v.name.get_ref().trim().to_string();
        let name_line = ctx.line(&v.name.span());
        if name.is_empty() {
            return Err(ctx.at(v.name.span(), "a variant name is empty"));
        }
        if let Some(first) = names.insert(name.to_lowercase(), name_line) {
            return Err(ctx.at(
                v.name.span(),
                format!("variant name '{name}' is used twice (first on line {first}); names must differ"),
            ));
        }
        let stem = file_stem(&name);
        if let Some(first) = file_stems.insert(stem.clone(), name_line) {
            return Err(ctx.at(
                v.name.span(),
                format!(
                    "variant name '{name}' gives the same file name '{stem}' as the variant on line {first}; \
                     names must differ in letters or digits"
                ),
            ));
        }
        let gain = match &v.gain {
            Some(g) => pot_of(&ctx, "gain", g)?,
            None => default_gain,
        };
        let level = match &v.level {
            Some(l) => pot_of(&ctx, "level", l)?,
            None => default_level,
        };
        let quality = match &v.quality {
            Some(q) => quality_of(&ctx, q)?,
            None => default_quality,
        };
        let mut variant_circuit = circuit.clone();
        let (position, parts) = match (&v.position, &v.positive, &v.negative) {
            (Some(p), None, None) => {
                let count = circuit.clamp.position.len();
                let index = usize::try_from(*p.get_ref()).ok().filter(|i| *i < count).ok_or_else(|| {
                    ctx.at(
                        p.span(),
                        format!(
                            "position = {} is impossible: the switch has {count} positions ({})",
                            p.get_ref(),
                            circuit.position_list()
                        ),
                    )
                })?;
                let pname = circuit.clamp.position[index].name.clone();
                (index, Parts::Position { index, name: pname })
            }
            (Some(p), _, _) => {
                return Err(ctx.at(
                    p.span(),
                    format!(
                        "variant '{name}': give either position or an explicit pair (positive/negative), not both"
                    ),
                ))
            }
            (None, None, None) => {
                return Err(ctx.at(
                    v.name.span(),
                    format!(
                        "variant '{name}' names no parts: add position = N or positive = VOLTS, negative = VOLTS"
                    ),
                ))
            }
            (None, pos, neg) => {
                let positive = pos.as_ref().map(|s| zener_of(&ctx, "positive", s)).transpose()?;
                let negative = neg.as_ref().map(|s| zener_of(&ctx, "negative", s)).transpose()?;
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
        variant_circuit
            .validate()
            .map_err(|e| ctx.at(v.name.span(), format!("variant '{name}': {e}")))?;
        variants.push(Variant {
            name,
            file_stem: stem,
            circuit: variant_circuit,
            settings: Settings {
                gain,
                level,
                position,
                ..Default::default()
            },
            quality,
            parts,
        });
    }

    Ok(Plan {
        path: path.to_path_buf(),
        di,
        circuit_label,
        output,
        output_line: output_override
            .is_none()
            .then(|| ctx.line(&raw.output.span())),
        target_lufs,
        volts_at_full_scale,
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
        let reference = Circuit::one_stage();
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
        assert!(e.contains("line 12") && e.contains("impossible"), "{e}");
        let bad = GOOD.replace("position = 0", "position = 7");
        let e = plan_in(&d, &bad).unwrap_err();
        assert!(e.contains("line 6") && e.contains("3 positions"), "{e}");
        std::fs::remove_dir_all(d).unwrap();
    }
}

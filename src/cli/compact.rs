//! `receptor compact MODEL --out SMALLER.json [--tensors SMALLER.safetensors]`: the model
//! without its provably dead units and unused input features, checked to give the same
//! outputs before it is written.

use super::ProbeArgs;
use super::output::{f32_text, f64_text};
use crate::analysis::Silent;
use crate::analysis::compact::{
    CompactOptions, Compaction, Comparison, DEFAULT_CHECK_TOLERANCE, DEFAULT_FOLD_TOLERANCE,
    compact, compare,
};
use crate::analysis::screen::{ScreenOptions, Status, screen};
use crate::error::{Error, Result};
use crate::model::{Activation, Network};
use crate::probe;
use clap::{Args, ValueEnum};
use std::path::{Path, PathBuf};
use std::process::ExitCode;

/// Weaker reasons for removing a unit, only used when asked for.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum Also {
    /// relu units never active on the --probe data (lossy outside that data).
    DeadOnProbe,
}

/// Arguments of `compact`.
#[derive(Debug, Clone, Args)]
pub struct CompactArgs {
    /// The model file (receptor-model/1 JSON).
    #[arg(value_name = "MODEL")]
    pub model: PathBuf,

    /// Where to write the smaller model (receptor-model/1 JSON). Must differ from MODEL.
    /// Written to a temporary file and renamed, so it is never half-written.
    #[arg(long, value_name = "FILE")]
    pub out: PathBuf,

    /// Store the smaller model's weights and biases in this safetensors file (F32) instead
    /// of inline in the JSON. It must be in the same folder as --out.
    #[arg(long, value_name = "FILE")]
    pub tensors: Option<PathBuf>,

    /// Where the reference data comes from.
    #[command(flatten)]
    pub probe: ProbeArgs,

    /// Also remove units on a weaker argument: `dead-on-probe` removes relu units never
    /// active on the --probe data (exact on that data, lossy elsewhere in the box).
    #[arg(long, value_enum, value_name = "REASON", value_delimiter = ',')]
    pub also: Vec<Also>,

    /// Also fold units that are constant over the whole input box (activation interval no
    /// wider than --fold-tolerance, e.g. a saturated tanh) into the next layer's bias.
    #[arg(long)]
    pub fold_constant: bool,

    /// Widest activation interval (over the box) that --fold-constant treats as constant;
    /// the unit is replaced by the interval's midpoint.
    #[arg(long, value_name = "T", allow_negative_numbers = true, default_value_t = DEFAULT_FOLD_TOLERANCE)]
    pub fold_tolerance: f64,

    /// Largest |difference| of any output between the original and the smaller model
    /// allowed on the reference data; above it nothing is written.
    #[arg(long, value_name = "T", allow_negative_numbers = true, default_value_t = DEFAULT_CHECK_TOLERANCE)]
    pub check_tolerance: f64,

    /// Allow the model's side files (safetensors, ONNX external data) to be absolute paths
    /// or to lie outside the model's folder.
    #[arg(long)]
    pub allow_outside_paths: bool,

    /// The input box (ONNX models carry none).
    #[command(flatten)]
    pub input_box: super::BoxArgs,
}

/// True when `a` and `b` name the same existing file (or the same path).
pub(crate) fn same_file(a: &Path, b: &Path) -> bool {
    match (std::fs::canonicalize(a), std::fs::canonicalize(b)) {
        (Ok(x), Ok(y)) => x == y,
        _ => a == b,
    }
}

/// The safetensors side files the model file at `model` refers to, resolved against its
/// folder (best effort: an unreadable or malformed file gives none; loading reports it).
fn side_files(model: &Path) -> Vec<PathBuf> {
    let Ok(text) = std::fs::read(model) else {
        return Vec::new();
    };
    let Ok(v) = serde_json::from_slice::<serde_json::Value>(&text) else {
        return Vec::new();
    };
    let base = match model.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    };
    let mut out = Vec::new();
    for layer in v["layers"].as_array().map(Vec::as_slice).unwrap_or(&[]) {
        for key in ["weights", "bias"] {
            if let Some(rel) = layer[key]["safetensors"].as_str() {
                out.push(base.join(rel));
            }
        }
    }
    out
}

/// Refuses an output path that is the input model itself or one of its side files.
pub(crate) fn refuse_overwriting_input(model: &Path, out: &Path, flag: &str) -> Result<()> {
    if same_file(model, out) {
        return Err(Error::usage(format!(
            "{}: {flag} is the input model itself; choose another file (the input is never overwritten)",
            out.display()
        )));
    }
    if side_files(model).iter().any(|s| same_file(s, out)) {
        return Err(Error::usage(format!(
            "{}: {flag} is a side file of the input model {}; choose another file (the input is never overwritten)",
            out.display(),
            model.display()
        )));
    }
    Ok(())
}

fn check_tolerance_arg(name: &str, v: f64) -> Result<()> {
    if v.is_finite() && v >= 0.0 {
        Ok(())
    } else {
        Err(Error::usage(format!(
            "{name} must be a number >= 0, got {v}"
        )))
    }
}

/// Runs `compact`.
pub fn run(args: &CompactArgs) -> Result<ExitCode> {
    refuse_overwriting_input(&args.model, &args.out, "--out")?;
    if let Some(t) = &args.tensors {
        refuse_overwriting_input(&args.model, t, "--tensors")?;
        crate::model::check_side_file_location(&args.out, t)?;
    }
    check_tolerance_arg("--fold-tolerance", args.fold_tolerance)?;
    check_tolerance_arg("--check-tolerance", args.check_tolerance)?;
    let dead_on_probe = args.also.contains(&Also::DeadOnProbe);
    if dead_on_probe && args.probe.probe.is_none() {
        return Err(Error::usage(
            "--also dead-on-probe needs --probe DATA: the units removed are those never active on that data",
        ));
    }
    let net = super::load_model(&args.model, args.allow_outside_paths, &args.input_box)?;
    let never_active = match (&args.probe.probe, dead_on_probe) {
        (Some(p), true) => Some(never_active_on(&net, p)?),
        _ => None,
    };
    let opts = CompactOptions {
        fold_tolerance: args.fold_constant.then_some(args.fold_tolerance),
        never_active,
    };
    let origin = args.out.display().to_string();
    let c = compact(&net, &opts, &origin)?;

    // The check: the reference data (the probe, else uniform box samples) always; uniform
    // box samples as well when a probe was given.
    let (mut source, _seed) = args.probe.open(&net)?;
    let on_ref = compare(&net, &c.network, &c.kept_inputs, &mut *source)?;
    let on_box = match &args.probe.probe {
        Some(_) => {
            let mut u = probe::uniform(&net, args.probe.samples.get(), args.probe.probe_seed);
            Some((
                u.describe(),
                compare(&net, &c.network, &c.kept_inputs, &mut *u)?,
            ))
        }
        None => None,
    };
    let ref_name = match &args.probe.probe {
        Some(p) => p.display().to_string(),
        None => format!("the input box (uniform, seed {})", args.probe.probe_seed),
    };
    require_within(&args.model, &ref_name, &on_ref, args.check_tolerance)?;
    if !dead_on_probe && let Some((name, cmp)) = &on_box {
        require_within(&args.model, name, cmp, args.check_tolerance)?;
    }

    match &args.tensors {
        Some(t) => crate::model::write_json_with_tensors(&c.network, &args.out, t)?,
        None => crate::model::write_json(&c.network, &args.out)?,
    }
    for line in summary_lines(&net, &c) {
        eprintln!("receptor: {line}");
    }
    eprintln!(
        "receptor: {}",
        check_line(&ref_name, &on_ref, args.check_tolerance)
    );
    if let Some((name, cmp)) = &on_box {
        let mut line = check_line(name, cmp, args.check_tolerance);
        if dead_on_probe && cmp.max_abs_diff > args.check_tolerance {
            line.push_str(" (expected: dead-on-probe removals are lossy outside the probe)");
        }
        eprintln!("receptor: {line}");
    }
    if let Some((before, after)) = on_ref.correct {
        let n = on_ref.samples as f64;
        eprintln!(
            "receptor: accuracy on {ref_name}: {} before, {} after",
            f64_text(before as f64 / n),
            f64_text(after as f64 / n)
        );
    }
    match &args.tensors {
        Some(t) => eprintln!("receptor: wrote {} and {}", args.out.display(), t.display()),
        None => eprintln!("receptor: wrote {}", args.out.display()),
    }
    Ok(ExitCode::SUCCESS)
}

/// Per hidden layer, per unit: a relu unit never active on the probe at `path` (screened
/// as `screen` does; `dead_proven` units are never active either).
fn never_active_on(net: &Network, path: &Path) -> Result<Vec<Vec<bool>>> {
    let mut source = probe::open(path, net)?;
    let report = screen(net, &mut *source, &ScreenOptions::default(), &Silent)?;
    let hidden = net.layers().len() - 1;
    let mut out: Vec<Vec<bool>> = net.layers()[..hidden]
        .iter()
        .map(|l| vec![false; l.units()])
        .collect();
    for u in &report.units {
        let relu = net.layers()[u.layer_index].activation == Activation::Relu;
        out[u.layer_index][u.unit] =
            relu && matches!(u.status, Status::DeadOnProbe | Status::DeadProven);
    }
    Ok(out)
}

/// Refuses (nothing written) when the outputs differ by more than `tol` on `data`.
fn require_within(model: &Path, data: &str, cmp: &Comparison, tol: f64) -> Result<()> {
    if cmp.max_abs_diff <= tol {
        return Ok(());
    }
    let outside = if cmp.outside_box > 0 {
        format!(
            "; {} of its {} rows lie outside the input box, where the removals are not proven",
            cmp.outside_box, cmp.samples
        )
    } else {
        String::new()
    };
    Err(Error::model(
        model,
        format!(
            "the compacted model's outputs differ from the original's by {} (more than --check-tolerance {}) at row {} of {data}{outside}; nothing was written",
            f64_text(cmp.max_abs_diff),
            f64_text(tol),
            cmp.worst_row
        ),
    ))
}

/// The line reporting one output check.
fn check_line(data: &str, cmp: &Comparison, tol: f64) -> String {
    let verdict = if cmp.max_abs_diff <= tol {
        "equal within"
    } else {
        "more than"
    };
    format!(
        "outputs checked on {} samples of {data}: largest |difference| {} ({verdict} {}); {} predictions changed",
        cmp.samples,
        f64_text(cmp.max_abs_diff),
        f64_text(tol),
        cmp.changed_predictions
    )
}

/// `name 3, other 2` from per-reason counts.
fn reasons_text(counts: &[(&str, usize)]) -> String {
    counts
        .iter()
        .map(|(n, c)| format!("{n} {c}"))
        .collect::<Vec<_>>()
        .join(", ")
}

/// The summary of what was removed, one line per layer plus the input and the totals.
pub fn summary_lines(original: &Network, c: &Compaction) -> Vec<String> {
    let mut lines = Vec::new();
    let counts = c.counts(None);
    let gone: usize = counts.iter().map(|x| x.1).sum();
    let mut line = format!(
        "input: {} -> {} features",
        original.input().size,
        c.network.input().size
    );
    if gone > 0 {
        line.push_str(&format!(" (removed {gone}: {})", reasons_text(&counts)));
    }
    if c.zero_inputs_kept > 0 {
        line.push_str(&format!(
            "; {} features with only zero outgoing weights kept (image layout)",
            c.zero_inputs_kept
        ));
    }
    lines.push(line);
    for (l, (a, b)) in original.layers().iter().zip(c.network.layers()).enumerate() {
        let counts = c.counts(Some(l));
        let gone: usize = counts.iter().map(|x| x.1).sum();
        let mut line = format!(
            "layer '{}' ({}): {} -> {} units",
            a.name,
            a.activation.name(),
            a.units(),
            b.units()
        );
        if gone > 0 {
            line.push_str(&format!(" (removed {gone}: {})", reasons_text(&counts)));
        }
        if l + 1 == original.layers().len() {
            line.push_str(" (output layer: never pruned)");
        }
        lines.push(line);
    }
    let constants: Vec<String> = c
        .removed
        .iter()
        .filter_map(|r| match (r.layer, r.reason) {
            (Some(l), crate::analysis::compact::Reason::Constant { value }) => Some(format!(
                "{}[{}] = {}",
                original.layers()[l].name,
                r.index,
                f32_text(value as f32)
            )),
            _ => None,
        })
        .collect();
    if !constants.is_empty() {
        lines.push(format!(
            "folded into the next layer's bias: {}",
            constants.join(", ")
        ));
    }
    lines.push(format!(
        "parameters: {} -> {}",
        original.parameter_count(),
        c.network.parameter_count()
    ));
    lines
}

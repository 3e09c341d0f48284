//! `receptor compact MODEL --out SMALLER.json [--tensors SMALLER.safetensors]`: the model
//! without its provably dead units and unused input features, checked to give the same
//! outputs before it is written.

use super::ProbeArgs;
use super::output::{f32_text, f64_text};
use crate::analysis::Silent;
use crate::analysis::compact::{
    CheckData, CompactRequest, Compaction, Comparison, DEFAULT_CHECK_TOLERANCE,
    DEFAULT_FOLD_TOLERANCE, LayerSummary, Reason, compact_checked,
};
use crate::error::{Error, Result};
use crate::model::Network;
use crate::probe::{self, ProbeSource};
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
    crate::model::refuse_overwriting_model(&args.model, &args.out, "--out")?;
    if let Some(t) = &args.tensors {
        crate::model::refuse_overwriting_model(&args.model, t, "--tensors")?;
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
    let request = CompactRequest {
        dead_on_probe,
        fold_tolerance: args.fold_constant.then_some(args.fold_tolerance),
    };
    let origin = args.out.display().to_string();
    // The check: the reference data (the probe, else uniform box samples) always; uniform
    // box samples as well when a probe was given.
    let mut uniform = args
        .probe
        .probe
        .as_ref()
        .map(|_| probe::uniform(&net, args.probe.samples.get(), args.probe.probe_seed));
    let box_name = uniform.as_ref().map(|u| u.describe());
    let checked = compact_checked(
        &net,
        &request,
        &mut || Ok(args.probe.open(&net)?.0),
        uniform.as_deref_mut().map(|u| u as &mut dyn ProbeSource),
        &origin,
        &Silent,
    )?;
    let c = &checked.compaction;
    let on_ref = &checked.reference;
    let on_box = box_name.zip(checked.on_box.as_ref());
    let ref_name = match &args.probe.probe {
        Some(p) => p.display().to_string(),
        None => format!("the input box (uniform, seed {})", args.probe.probe_seed),
    };
    if let Some((which, cmp)) = checked.refusal(args.check_tolerance) {
        let data = match (which, &on_box) {
            (CheckData::Box, Some((name, _))) => name.as_str(),
            _ => ref_name.as_str(),
        };
        return Err(refused(&args.model, data, cmp, args.check_tolerance));
    }

    match &args.tensors {
        Some(t) => crate::model::write_json_with_tensors(&c.network, &args.out, t)?,
        None => crate::model::write_json(&c.network, &args.out)?,
    }
    for line in summary_lines(&net, c) {
        eprintln!("receptor: {line}");
    }
    eprintln!(
        "receptor: {}",
        check_line(&ref_name, on_ref, args.check_tolerance)
    );
    if let Some((name, cmp)) = &on_box {
        let mut line = check_line(name, cmp, args.check_tolerance);
        if dead_on_probe && cmp.max_abs_diff > args.check_tolerance {
            line.push_str(" (expected: dead-on-probe removals are lossy outside the probe)");
        }
        eprintln!("receptor: {line}");
    }
    if let Some((before, after)) = on_ref.accuracy() {
        eprintln!(
            "receptor: accuracy on {ref_name}: {} before, {} after",
            f64_text(before),
            f64_text(after)
        );
    }
    match &args.tensors {
        Some(t) => eprintln!("receptor: wrote {} and {}", args.out.display(), t.display()),
        None => eprintln!("receptor: wrote {}", args.out.display()),
    }
    Ok(ExitCode::SUCCESS)
}

/// The refusal (nothing written) when the outputs differ by more than `tol` on `data`.
fn refused(model: &Path, data: &str, cmp: &Comparison, tol: f64) -> Error {
    let outside = if cmp.outside_box > 0 {
        format!(
            "; {} of its {} rows lie outside the input box, where the removals are not proven",
            cmp.outside_box, cmp.samples
        )
    } else {
        String::new()
    };
    Error::model(
        model,
        format!(
            "the compacted model's outputs differ from the original's by {} (more than --check-tolerance {}) at row {} of {data}{outside}; nothing was written",
            f64_text(cmp.max_abs_diff),
            f64_text(tol),
            cmp.worst_row
        ),
    )
}

/// The line reporting one output check.
fn check_line(data: &str, cmp: &Comparison, tol: f64) -> String {
    let verdict = if cmp.within(tol) {
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
    let summaries = c.layer_summaries(original);
    let last = summaries.len() - 1;
    for (i, s) in summaries.iter().enumerate() {
        lines.push(summary_line(s, i == last, c.zero_inputs_kept));
    }
    let constants: Vec<String> = c
        .removed
        .iter()
        .filter_map(|r| match (r.layer, r.reason) {
            (Some(l), Reason::Constant { value }) => Some(format!(
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

/// One line of the summary: the input (`zero_inputs_kept` features kept with only zero
/// weights) or one layer (`output` for the last).
fn summary_line(s: &LayerSummary, output: bool, zero_inputs_kept: usize) -> String {
    let gone = s.removed_count();
    let mut line = match s.activation {
        None => format!("input: {} -> {} features", s.before, s.after),
        Some(act) => format!(
            "layer '{}' ({}): {} -> {} units",
            s.name,
            act.name(),
            s.before,
            s.after
        ),
    };
    if gone > 0 {
        line.push_str(&format!(" (removed {gone}: {})", reasons_text(&s.counts)));
    }
    if s.layer.is_none() && zero_inputs_kept > 0 {
        line.push_str(&format!(
            "; {zero_inputs_kept} features with only zero outgoing weights kept (image layout)"
        ));
    }
    if output {
        line.push_str(" (output layer: never pruned)");
    }
    line
}

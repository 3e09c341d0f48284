//! `receptor check MODEL [--probe DATA] [--max-dead FRAC]`: a pass/fail gate for training
//! pipelines on the fraction of dead rectifier units per hidden layer.

use super::output::{Cell, Format, Stop, TableWriter, emit};
use super::screen::load_and_screen;
use super::{CommonArgs, EXIT_CHECK_FAILED, ProbeArgs, parse_count, parse_fraction};
use crate::analysis::screen::{DEFAULT_RARE_FRACTION, ScreenReport, Status};
use crate::error::Result;
use crate::model::Network;
use crate::probe;
use clap::{Args, ValueEnum};
use std::num::NonZeroUsize;
use std::path::PathBuf;
use std::process::ExitCode;

/// Output format of `check`: readable lines by default, or rows.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum CheckFormat {
    /// One line per layer: `layer NAME: D of N rectifier units dead`.
    Text,
    /// Rows with a header line.
    Csv,
    /// One JSON object: {"rows": [...], "passed": ...}.
    Json,
}

/// Arguments of `check`.
#[derive(Debug, Clone, Args)]
pub struct CheckArgs {
    /// The model file (receptor-model/1 JSON).
    #[arg(value_name = "MODEL")]
    pub model: PathBuf,

    /// Where the reference data comes from.
    #[command(flatten)]
    pub probe: ProbeArgs,

    /// Largest allowed fraction of dead rectifier units in any hidden layer.
    #[arg(
        long,
        allow_negative_numbers = true,
        value_name = "FRAC",
        value_parser = parse_fraction,
        default_value_t = 0.1
    )]
    pub max_dead: f64,

    /// The --rare fraction of the screening (it does not change which units are dead).
    #[arg(
        long,
        allow_negative_numbers = true,
        value_name = "FRAC",
        default_value_t = DEFAULT_RARE_FRACTION
    )]
    pub rare: f64,

    /// Probe rows read and screened at a time (memory use grows with it).
    #[arg(long, value_name = "N", value_parser = parse_count,
          default_value_t = probe::DEFAULT_CHUNK_ROWS_NONZERO)]
    pub chunk_rows: NonZeroUsize,

    /// Output format.
    #[arg(long, value_enum, default_value_t = CheckFormat::Text)]
    pub format: CheckFormat,

    /// Write the output to FILE instead of standard output (atomically).
    #[arg(long, value_name = "FILE")]
    pub out: Option<PathBuf>,

    /// Allow the model's side files (safetensors, ONNX external data) to be absolute paths
    /// or to lie outside the model's folder.
    #[arg(long)]
    pub allow_outside_paths: bool,

    /// The input box (ONNX models carry none).
    #[command(flatten)]
    pub input_box: super::BoxArgs,
}

/// The verdict on one hidden layer with rectifier units.
#[derive(Debug, Clone, PartialEq)]
pub struct LayerVerdict {
    /// Layer name.
    pub layer: String,
    /// Dead units (`dead_proven` or `dead_on_probe`).
    pub dead: usize,
    /// Rectifier units in the layer.
    pub units: usize,
    /// `dead / units`.
    pub dead_frac: f64,
    /// True when `dead_frac` exceeds the limit.
    pub over_limit: bool,
}

/// Counts dead rectifier units per hidden layer of `net` in a screening report.
pub fn verdicts(net: &Network, report: &ScreenReport, max_dead: f64) -> Vec<LayerVerdict> {
    let hidden = net.layers().len().saturating_sub(1);
    let mut out = Vec::new();
    for (li, layer) in net.layers().iter().enumerate().take(hidden) {
        if !layer.activation.is_rectifier() {
            continue;
        }
        let rows: Vec<_> = report
            .units
            .iter()
            .filter(|u| u.layer_index == li)
            .collect();
        let units = rows.len();
        let dead = rows
            .iter()
            .filter(|u| matches!(u.status, Status::DeadProven | Status::DeadOnProbe))
            .count();
        let dead_frac = if units == 0 {
            0.0
        } else {
            dead as f64 / units as f64
        };
        out.push(LayerVerdict {
            layer: layer.name.clone(),
            dead,
            units,
            dead_frac,
            over_limit: dead_frac > max_dead,
        });
    }
    out
}

/// The text line for one layer.
pub fn line(v: &LayerVerdict, max_dead: f64) -> String {
    let mut s = format!(
        "layer {}: {} of {} rectifier units dead",
        v.layer, v.dead, v.units
    );
    if v.over_limit {
        s.push_str(&format!(
            " (over the limit of {})",
            super::output::f64_text(max_dead)
        ));
    }
    s
}

/// Runs `check`: exit 0 when every hidden rectifier layer is within `--max-dead`, else 3.
pub fn run(args: &CheckArgs) -> Result<ExitCode> {
    let common = CommonArgs {
        format: Format::Csv,
        out: args.out.clone(),
        allow_outside_paths: args.allow_outside_paths,
        input_box: args.input_box.clone(),
    };
    let (net, report, seed) = load_and_screen(
        &common,
        &args.model,
        &args.probe,
        args.rare,
        args.chunk_rows,
    )?;
    let verdicts = verdicts(&net, &report, args.max_dead);
    let passed = verdicts.iter().all(|v| !v.over_limit);
    emit(&common.destination(), |w| {
        match args.format {
            CheckFormat::Text => {
                if verdicts.is_empty() {
                    writeln!(w, "no hidden layer has rectifier units: nothing to check")?;
                }
                for v in &verdicts {
                    writeln!(w, "{}", line(v, args.max_dead))?;
                }
            }
            CheckFormat::Csv | CheckFormat::Json => {
                let format = if args.format == CheckFormat::Csv {
                    Format::Csv
                } else {
                    Format::Json
                };
                let columns: Vec<String> = [
                    "layer",
                    "dead",
                    "units",
                    "dead_frac",
                    "max_dead",
                    "over_limit",
                ]
                .iter()
                .map(|c| c.to_string())
                .collect();
                let mut t = TableWriter::begin(format, w, columns.clone(), columns)?;
                for v in &verdicts {
                    t.row(&[
                        Cell::from(v.layer.as_str()),
                        Cell::from(v.dead),
                        Cell::from(v.units),
                        Cell::F64(v.dead_frac),
                        Cell::F64(args.max_dead),
                        Cell::Bool(v.over_limit),
                    ])?;
                }
                let mut extra = vec![
                    ("passed", Cell::Bool(passed)),
                    ("samples", Cell::from(report.samples)),
                    ("probe", Cell::from(report.probe.as_str())),
                ];
                if let Some(s) = seed {
                    extra.push(("seed", Cell::UInt(s)));
                }
                t.finish(&extra)?;
            }
        }
        Ok::<(), Stop>(())
    })?;
    Ok(if passed {
        ExitCode::SUCCESS
    } else {
        ExitCode::from(EXIT_CHECK_FAILED)
    })
}

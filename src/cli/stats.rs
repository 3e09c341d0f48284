//! `receptor stats MODEL`: sparsity statistics of every unit's incoming weights.

use super::CommonArgs;
use super::output::{Cell, Format, Stop, TableWriter, emit};
use crate::analysis::sparsity::{LayerSummary, UnitStats, all_stats};
use crate::error::{Error, Result};
use clap::Args;
use std::io::Write;
use std::path::PathBuf;
use std::process::ExitCode;

/// Arguments of `stats`.
#[derive(Debug, Clone, Args)]
pub struct StatsArgs {
    /// The model file (receptor-model/1 JSON).
    #[arg(value_name = "MODEL")]
    pub model: PathBuf,

    /// Absolute tolerance for near_zero_frac: a weight counts as near zero when |w| <= ABS.
    /// Default: 0.01 x the largest |w| of the unit's layer.
    #[arg(long, allow_negative_numbers = true, value_name = "ABS")]
    pub zero_tol: Option<f64>,

    #[command(flatten)]
    pub common: CommonArgs,
}

/// The CSV/JSON columns of `stats`, in order.
pub const COLUMNS: [&str; 10] = [
    "layer",
    "unit",
    "fan_in",
    "l1",
    "l2",
    "max_abs",
    "near_zero_frac",
    "hoyer",
    "gini",
    "bias",
];

/// Runs `stats`.
pub fn run(args: &StatsArgs) -> Result<ExitCode> {
    if let Some(t) = args.zero_tol
        && !(t.is_finite() && t >= 0.0)
    {
        return Err(Error::bad_option(
            "zero_tol",
            t,
            "must be a finite number >= 0",
        ));
    }
    let net = args.common.load(&args.model)?;
    let (units, layers) = all_stats(&net, args.zero_tol);
    emit(&args.common.destination(), |w| {
        write_table(args.common.format, w, &units, &layers)?;
        Ok::<(), Stop>(())
    })?;
    Ok(ExitCode::SUCCESS)
}

/// Writes the `stats` table (one row per unit, [`COLUMNS`]; JSON adds the per-layer
/// summaries under `"layers"`). Shared by the command and the app's export.
pub fn write_table<'a>(
    format: Format,
    w: &mut dyn Write,
    units: impl IntoIterator<Item = &'a UnitStats>,
    layers: &[LayerSummary],
) -> std::io::Result<()> {
    let columns: Vec<String> = COLUMNS.iter().map(|c| c.to_string()).collect();
    let mut t = TableWriter::begin(format, w, columns.clone(), columns)?;
    for u in units {
        t.row(&[
            Cell::from(u.layer.as_str()),
            Cell::from(u.unit),
            Cell::from(u.fan_in),
            Cell::F64(u.l1),
            Cell::F64(u.l2),
            Cell::F64(u.max_abs),
            Cell::F64(u.near_zero_frac),
            Cell::F64(u.hoyer),
            Cell::F64(u.gini),
            Cell::F32(u.bias),
        ])?;
    }
    let summaries = layers
        .iter()
        .map(|l| {
            vec![
                ("layer".to_string(), Cell::from(l.layer.as_str())),
                ("units".to_string(), Cell::from(l.units)),
                ("fan_in".to_string(), Cell::from(l.fan_in)),
                ("zero_tol".to_string(), Cell::F64(l.zero_tol)),
                ("mean_hoyer".to_string(), Cell::F64(l.mean_hoyer)),
                ("mean_gini".to_string(), Cell::F64(l.mean_gini)),
                ("near_zero_frac".to_string(), Cell::F64(l.near_zero_frac)),
                ("max_abs".to_string(), Cell::F64(l.max_abs)),
            ]
        })
        .collect();
    t.finish(&[("layers", Cell::Objects(summaries))])
}

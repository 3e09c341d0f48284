//! `receptor stats MODEL`: sparsity statistics of every unit's incoming weights.

use super::CommonArgs;
use crate::analysis::sparsity::all_stats;
use crate::error::{Error, Result};
use crate::report::table::{Stop, emit};
use crate::report::tables;
use clap::Args;
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

    /// Output and loading options shared by every command.
    #[command(flatten)]
    pub common: CommonArgs,
}

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
        tables::write_stats(args.common.format, w, &units, &layers)?;
        Ok::<(), Stop>(())
    })?;
    Ok(ExitCode::SUCCESS)
}

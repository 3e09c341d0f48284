//! `receptor screen MODEL [--probe DATA]`: dead, rarely active, always active and saturated
//! hidden units, on probe data and by interval bound propagation.

use super::{CommonArgs, ProbeArgs, parse_count};
use crate::analysis::Silent;
use crate::analysis::screen::{DEFAULT_RARE_FRACTION, ScreenOptions, ScreenReport, screen};
use crate::error::Result;
use crate::model::Network;
use crate::probe;
use crate::report::table::{Stop, emit};
use crate::report::tables;
use clap::Args;
use std::num::NonZeroUsize;
use std::path::PathBuf;
use std::process::ExitCode;

/// Arguments of `screen`.
#[derive(Debug, Clone, Args)]
pub struct ScreenArgs {
    /// The model file (receptor-model/1 JSON).
    #[arg(value_name = "MODEL")]
    pub model: PathBuf,

    /// Where the reference data comes from.
    #[command(flatten)]
    pub probe: ProbeArgs,

    /// A unit active on fewer than this fraction of the probe samples is rarely_active
    /// (rectifiers) or saturated (sigmoid, tanh).
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

    /// Output and loading options shared by every command.
    #[command(flatten)]
    pub common: CommonArgs,
}

/// Loads the model, opens the probe and screens; shared by `screen` and `check`.
/// Returns the network, the report and the uniform probe's seed when one was used.
pub fn load_and_screen(
    common: &CommonArgs,
    model: &std::path::Path,
    probe_args: &ProbeArgs,
    rare: f64,
    chunk_rows: NonZeroUsize,
) -> Result<(Network, ScreenReport, Option<u64>)> {
    let opts = ScreenOptions::new(rare, chunk_rows)?;
    let net = common.load(model)?;
    let (mut source, seed) = probe_args.open(&net)?;
    let report = screen(&net, &mut *source, &opts, &Silent)?;
    Ok((net, report, seed))
}

/// Runs `screen`.
pub fn run(args: &ScreenArgs) -> Result<ExitCode> {
    let (_net, report, seed) = load_and_screen(
        &args.common,
        &args.model,
        &args.probe,
        args.rare,
        args.chunk_rows,
    )?;
    emit(&args.common.destination(), |w| {
        let extra = tables::screen_extra(report.samples, &report.probe, args.rare, seed);
        tables::write_screen(args.common.format, w, &report.units, &extra)?;
        Ok::<(), Stop>(())
    })?;
    Ok(ExitCode::SUCCESS)
}

//! `receptor timeline CKPT... [--probe DATA] [--per unit|checkpoint]`: how the units of a
//! network change over the checkpoints of one training run.

use super::{CommonArgs, parse_count};
use crate::analysis::Silent;
use crate::analysis::screen::{DEFAULT_RARE_FRACTION, ScreenOptions};
use crate::analysis::timeline::{TimelineOptions, timeline};
use crate::error::Result;
use crate::model::series::Series;
use crate::model::{DEFAULT_BOX, LoadOptions, is_onnx};
use crate::probe;
use crate::report::table::{Cell, Stop, emit};
use crate::report::tables::{self, TimelineTable};
use clap::Args;
use std::num::NonZeroUsize;
use std::path::PathBuf;
use std::process::ExitCode;

/// Arguments of `timeline`.
#[derive(Debug, Clone, Args)]
pub struct TimelineArgs {
    /// The checkpoints: one folder (every .json and .onnx file in it) or the model files.
    #[arg(value_name = "CKPT", required = true, num_args = 1..)]
    pub checkpoints: Vec<PathBuf>,

    /// Reference data: a .csv or .npy file, one sample per row, columns in input order (a
    /// `label` column adds the accuracy per checkpoint). Every checkpoint runs on the same
    /// rows. Default: samples drawn uniformly from the input box.
    #[arg(long, value_name = "DATA")]
    pub probe: Option<PathBuf>,

    /// Number of samples of the default uniform reference data (without --probe).
    #[arg(long, value_name = "N", value_parser = parse_count,
          default_value_t = probe::DEFAULT_UNIFORM_SAMPLES_NONZERO)]
    pub samples: NonZeroUsize,

    /// Seed of the default uniform reference data (without --probe).
    #[arg(long = "seed", value_name = "S", default_value_t = probe::DEFAULT_UNIFORM_SEED)]
    pub probe_seed: u64,

    /// Which table: one row per unit, or one row per checkpoint and layer. JSON output
    /// holds both (this one under "rows").
    #[arg(long, value_enum, default_value_t = TimelineTable::Unit)]
    pub per: TimelineTable,

    /// A unit active on fewer than this fraction of the samples is rarely_active (as in
    /// `screen`).
    #[arg(
        long,
        allow_negative_numbers = true,
        value_name = "FRAC",
        default_value_t = DEFAULT_RARE_FRACTION
    )]
    pub rare: f64,

    /// Absolute tolerance for near_zero_frac (as in `stats`). Default: 0.01 x the largest
    /// |w| of the layer in each checkpoint.
    #[arg(long, allow_negative_numbers = true, value_name = "ABS")]
    pub zero_tol: Option<f64>,

    /// Reference rows read and screened at a time (memory use grows with it).
    #[arg(long, value_name = "N", value_parser = parse_count,
          default_value_t = probe::DEFAULT_CHUNK_ROWS_NONZERO)]
    pub chunk_rows: NonZeroUsize,

    /// Output and loading options shared by every command.
    #[command(flatten)]
    pub common: CommonArgs,
}

/// Runs `timeline`.
pub fn run(args: &TimelineArgs) -> Result<ExitCode> {
    let opts = TimelineOptions::new(
        ScreenOptions::new(args.rare, args.chunk_rows)?,
        args.zero_tol,
    )?;
    let series = Series::open(&args.checkpoints)?;
    let load = LoadOptions {
        allow_outside_paths: args.common.allow_outside_paths,
        input_box: args.common.input_box.to_input_box(),
    };
    // ONNX files carry no input box; say so once, as `load_model` does for one model.
    let given = &load.input_box;
    if (given.low.is_none() || given.high.is_none())
        && let Some(c) = series.checkpoints().iter().find(|c| is_onnx(&c.path))
    {
        eprintln!(
            "receptor: {}: ONNX checkpoints carry no input box unless their metadata has one: the default [{}, {}] is used for a missing end, and bounds and screening depend on it (give --low and --high to set it)",
            c.path.display(),
            DEFAULT_BOX.0,
            DEFAULT_BOX.1
        );
    }
    let mut told = false;
    let mut open_probe = |net: &crate::model::Network| match &args.probe {
        Some(p) => probe::open(p, net),
        None => {
            if !told {
                told = true;
                eprintln!(
                    "receptor: no --probe given: using {} samples drawn uniformly from the input box with seed {}",
                    args.samples, args.probe_seed
                );
            }
            Ok(probe::uniform(net, args.samples.get(), args.probe_seed))
        }
    };
    // The first checkpoint is read once more at the end, for the drift (so that no more
    // than two checkpoints' weights are ever held).
    let mut first_again = || series.load(0, &load);
    let t = timeline(
        &mut series.networks(&load),
        series.len(),
        &mut open_probe,
        &mut first_again,
        &opts,
        &Silent,
    )?;
    let mut extra = vec![
        ("checkpoints_read", Cell::from(series.len())),
        ("samples", Cell::from(t.samples)),
        ("probe", Cell::from(t.probe.as_str())),
        ("rare", Cell::F64(args.rare)),
    ];
    if args.probe.is_none() {
        extra.push(("seed", Cell::UInt(args.probe_seed)));
    }
    emit(&args.common.destination(), |w| {
        tables::write_timeline(
            args.common.format,
            w,
            &t,
            args.per,
            series.order().key_name(),
            &extra,
        )?;
        Ok::<(), Stop>(())
    })?;
    Ok(ExitCode::SUCCESS)
}

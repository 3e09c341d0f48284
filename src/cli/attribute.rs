//! `receptor attribute MODEL --layer L --unit K --probe DATA --row R`: integrated gradients
//! of one unit for one probe sample, from a baseline (the box centre or the probe's mean).

use super::CommonArgs;
use crate::analysis::attribute::{DEFAULT_IG_STEPS, integrated_gradients};
use crate::error::{Error, Result};
use crate::probe::memory::read_probe;
use crate::report::table::{Cell, Stop, emit};
use crate::report::tables;
use clap::{Args, ValueEnum};
use std::path::PathBuf;
use std::process::ExitCode;

/// Where the integration path starts.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum BaselineArg {
    /// The centre of the input box.
    Centre,
    /// The mean of the probe's samples.
    Mean,
}

impl BaselineArg {
    fn name(self) -> &'static str {
        match self {
            BaselineArg::Centre => "centre",
            BaselineArg::Mean => "mean",
        }
    }
}

/// Arguments of `attribute`.
#[derive(Debug, Clone, Args)]
pub struct AttributeArgs {
    /// The model file (receptor-model/1 JSON).
    #[arg(value_name = "MODEL")]
    pub model: PathBuf,

    /// The layer, by name.
    #[arg(long, value_name = "NAME")]
    pub layer: String,

    /// The unit, counting from 0.
    #[arg(long, value_name = "K")]
    pub unit: usize,

    /// Probe data (CSV or .npy) holding the sample.
    #[arg(long, value_name = "DATA")]
    pub probe: PathBuf,

    /// The sample: its row in the probe, counting from 0.
    #[arg(long, value_name = "R")]
    pub row: usize,

    /// Start of the integration path.
    #[arg(long, value_enum, default_value_t = BaselineArg::Centre)]
    pub baseline: BaselineArg,

    /// Trapezoid intervals of the path integral.
    #[arg(long, value_name = "M", default_value_t = DEFAULT_IG_STEPS)]
    pub steps: usize,

    /// Output and loading options shared by every command.
    #[command(flatten)]
    pub common: CommonArgs,
}

/// Runs `attribute`.
pub fn run(args: &AttributeArgs) -> Result<ExitCode> {
    let net = args.common.load(&args.model)?;
    let layer = net.require_layer(&args.layer)?;
    let data = read_probe(&net, Some(&args.probe))?;
    let rows = data.inputs.nrows();
    if args.row >= rows {
        return Err(Error::bad_option(
            "row",
            args.row,
            format!(
                "must be a row of {} ({rows} rows, 0 to {})",
                data.origin,
                rows.saturating_sub(1)
            ),
        ));
    }
    let sample = data.inputs.row(args.row).to_vec();
    let baseline = match args.baseline {
        BaselineArg::Centre => net.input().centre(),
        BaselineArg::Mean => data.mean_input()?,
    };
    let a = integrated_gradients(&net, layer, args.unit, &sample, &baseline, args.steps)?;
    emit(&args.common.destination(), |w| {
        let extra = [
            ("layer", Cell::from(args.layer.as_str())),
            ("unit", Cell::from(args.unit)),
            ("row", Cell::from(args.row)),
            ("baseline", Cell::from(args.baseline.name())),
            ("steps", Cell::from(a.steps)),
            ("z_sample", Cell::F32(a.z_sample)),
            ("z_baseline", Cell::F32(a.z_baseline)),
            ("sum", Cell::F64(a.sum)),
            ("gap", Cell::F64(a.gap())),
        ];
        tables::write_attribute(
            args.common.format,
            w,
            net.input(),
            &sample,
            &baseline,
            &a,
            &extra,
        )?;
        Ok::<(), Stop>(())
    })?;
    Ok(ExitCode::SUCCESS)
}

//! `receptor prune-sweep MODEL --probe DATA`: accuracy after magnitude pruning at several
//! fractions, and `--write-pruned FRAC --out FILE` to save a pruned model.

use super::CommonArgs;
use super::output::{Stop, emit};
use crate::analysis::Silent;
use crate::analysis::prune::{
    DEFAULT_SWEEP_FRACTIONS, check_fractions, prune_by_magnitude, prune_sweep,
};
use crate::error::{Error, Result};
use crate::model::Network;
use crate::probe;
use clap::Args;
use std::path::PathBuf;
use std::process::ExitCode;

/// Arguments of `prune-sweep`.
#[derive(Debug, Clone, Args)]
pub struct PruneSweepArgs {
    /// The model file (receptor-model/1 JSON).
    #[arg(value_name = "MODEL")]
    pub model: PathBuf,

    /// Labelled probe data: a .csv file with a header naming a `label` column.
    #[arg(long, value_name = "DATA")]
    pub probe: Option<PathBuf>,

    /// Fractions of each layer's weights to zero, comma-separated, each from 0 to 1.
    #[arg(
        long,
        allow_negative_numbers = true,
        value_name = "F,F,...",
        value_delimiter = ',',
        default_values_t = DEFAULT_SWEEP_FRACTIONS
    )]
    pub fractions: Vec<f64>,

    /// Instead of the sweep, write the model pruned at fraction FRAC to --out FILE (in the
    /// receptor-model/1 schema).
    #[arg(long, allow_negative_numbers = true, value_name = "FRAC")]
    pub write_pruned: Option<f64>,

    #[command(flatten)]
    pub common: CommonArgs,
}

/// Weights that are exactly zero, and all weights, over every layer.
pub fn zero_count(net: &Network) -> (usize, usize) {
    net.layers.iter().fold((0, 0), |(z, t), l| {
        (
            z + l.weights.iter().filter(|&&w| w == 0.0).count(),
            t + l.weights.len(),
        )
    })
}

/// Runs `prune-sweep`.
pub fn run(args: &PruneSweepArgs) -> Result<ExitCode> {
    // The sweep's fractions are checked by the sweep; --write-pruned by the same rule.
    if let Some(f) = args.write_pruned {
        check_fractions(&[f]).map_err(|e| e.for_option("write_pruned"))?;
        let Some(out) = &args.common.out else {
            return Err(Error::usage(
                "--write-pruned needs --out FILE: the file to write the pruned model to",
            ));
        };
        let net = args.common.load(&args.model)?;
        let pruned = prune_by_magnitude(&net, f);
        if let Some(p) = &args.probe {
            let mut source = probe::open(p, &net)?;
            require_labels(&*source, p)?;
            let points = prune_sweep(&net, &mut *source, &[f], &Silent)?;
            if let Some(pt) = points.first() {
                eprintln!(
                    "receptor: accuracy on {} after pruning {}: {}",
                    p.display(),
                    super::output::f64_text(f),
                    super::output::f64_text(pt.accuracy)
                );
            }
        }
        crate::model::write_json(&pruned, out)?;
        let (zeroed, total) = zero_count(&pruned);
        eprintln!(
            "receptor: wrote {} ({zeroed} of {total} weights zero)",
            out.display()
        );
        return Ok(ExitCode::SUCCESS);
    }
    let Some(probe_path) = &args.probe else {
        return Err(Error::usage(
            "prune-sweep needs --probe DATA, a CSV probe with a 'label' column (or --write-pruned FRAC --out FILE)",
        ));
    };
    let net = args.common.load(&args.model)?;
    let mut source = probe::open(probe_path, &net)?;
    require_labels(&*source, probe_path)?;
    let points = prune_sweep(&net, &mut *source, &args.fractions, &Silent)?;
    let probe_name = probe_path.display().to_string();
    emit(&args.common.destination(), |w| {
        crate::report::tables::write_prune_sweep(args.common.format, w, &points, &probe_name)?;
        Ok::<(), Stop>(())
    })?;
    Ok(ExitCode::SUCCESS)
}

fn require_labels(source: &dyn probe::ProbeSource, path: &std::path::Path) -> Result<()> {
    if source.has_labels() {
        Ok(())
    } else {
        Err(Error::probe(
            path,
            "has no labels: prune-sweep needs a CSV probe whose header names a 'label' column",
        ))
    }
}

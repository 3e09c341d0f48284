//! `receptor prune-sweep MODEL --probe DATA`: accuracy after magnitude pruning at several
//! fractions, and `--write-pruned FRAC --out FILE` to save a pruned model. With `--by unit`,
//! whole hidden units are removed instead (structured pruning, [`crate::analysis::structured`]).

use super::CommonArgs;
use super::output::{Stop, emit};
use crate::analysis::Silent;
use crate::analysis::prune::{
    DEFAULT_SWEEP_FRACTIONS, check_fractions, prune_by_magnitude, prune_sweep,
};
use crate::analysis::structured::{self, Criterion};
use crate::error::{Error, Result};
use crate::model::Network;
use crate::probe;
use crate::report::tables;
use clap::{Args, ValueEnum};
use std::path::{Path, PathBuf};
use std::process::ExitCode;

/// Arguments of `prune-sweep`.
#[derive(Debug, Clone, Args)]
pub struct PruneSweepArgs {
    /// The model file (receptor-model/1 JSON).
    #[arg(value_name = "MODEL")]
    pub model: PathBuf,

    /// Labelled reference data: a .csv file with a header naming a `label` column.
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
    /// receptor-model/1 schema). With --by unit the written model is physically smaller
    /// (FRAC of every hidden layer's units removed); FRAC 1, or any fraction that would
    /// remove every unit of a layer, is refused.
    #[arg(long, allow_negative_numbers = true, value_name = "FRAC")]
    pub write_pruned: Option<f64>,

    /// What to remove: `weight` zeroes each layer's smallest |w| (magnitude pruning);
    /// `unit` removes whole hidden units (structured pruning; the output layer is never
    /// pruned).
    #[arg(long, value_enum, default_value_t = By::Weight)]
    pub by: By,

    /// With --by unit: how units are ranked, lowest removed first (ties: lower unit index
    /// first). `l1`: L1 norm of the unit's incoming weights (Li et al., ICLR 2017);
    /// `activation`: mean |activation| on the --probe data. Default: l1.
    #[arg(long, value_enum, value_name = "CRITERION")]
    pub criterion: Option<CriterionArg>,

    /// With --by unit: prune one hidden layer at a time, the others kept whole, and report
    /// one curve per layer (sensitivity analysis, Han et al. 2015).
    #[arg(long)]
    pub per_layer: bool,

    /// Output and loading options shared by every command.
    #[command(flatten)]
    pub common: CommonArgs,
}

/// What `prune-sweep` removes.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum By {
    /// Individual weights, smallest |w| first (zeroed in place).
    Weight,
    /// Whole hidden units (removed with their weights).
    Unit,
}

/// The unit ranking criterion on the command line.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum CriterionArg {
    /// L1 norm of the incoming weights.
    L1,
    /// Mean |activation| on the probe.
    Activation,
}

impl From<CriterionArg> for Criterion {
    fn from(c: CriterionArg) -> Self {
        match c {
            CriterionArg::L1 => Criterion::L1,
            CriterionArg::Activation => Criterion::Activation,
        }
    }
}

/// Weights that are exactly zero, and all weights, over every layer.
pub fn zero_count(net: &Network) -> (usize, usize) {
    net.layers().iter().fold((0, 0), |(z, t), l| {
        (
            z + l.weights.iter().filter(|&&w| w == 0.0).count(),
            t + l.weights.len(),
        )
    })
}

/// Runs `prune-sweep`.
pub fn run(args: &PruneSweepArgs) -> Result<ExitCode> {
    // The sweep's fractions are checked by the sweep; --write-pruned by the same rule.
    if let Some(out) = &args.common.out {
        crate::model::refuse_overwriting_model(&args.model, out, "--out")?;
    }
    if args.by == By::Unit {
        return run_units(args);
    }
    if args.criterion.is_some() || args.per_layer {
        return Err(Error::usage(
            "--criterion and --per-layer apply to --by unit only (magnitude pruning ranks weights by |w|)",
        ));
    }
    if let Some(f) = args.write_pruned {
        check_fractions(&[f]).map_err(|e| e.for_option("write_pruned"))?;
        let Some(out) = &args.common.out else {
            return Err(Error::usage(
                "--write-pruned needs --out FILE: the file to write the pruned model to",
            ));
        };
        let net = args.common.load(&args.model)?;
        let pruned = prune_by_magnitude(&net, f)?;
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

/// `prune-sweep --by unit`: the unit-pruning curve, or the physically smaller model.
fn run_units(args: &PruneSweepArgs) -> Result<ExitCode> {
    let criterion: Criterion = args.criterion.unwrap_or(CriterionArg::L1).into();
    if criterion == Criterion::Activation && args.probe.is_none() {
        return Err(Error::usage(
            "--criterion activation needs --probe DATA: units are ranked by their mean |activation| on it",
        ));
    }
    if let Some(f) = args.write_pruned {
        return write_pruned_units(args, criterion, f);
    }
    let Some(probe_path) = &args.probe else {
        return Err(Error::usage(
            "prune-sweep needs --probe DATA, a CSV probe with a 'label' column (or --write-pruned FRAC --out FILE)",
        ));
    };
    if args.fractions.is_empty() {
        return Err(Error::usage("--fractions needs at least one value"));
    }
    let net = args.common.load(&args.model)?;
    // Every hidden layer is pruned at each fraction (at once, or in turn with --per-layer).
    for &f in &args.fractions {
        structured::check_fraction(&net, f, None).map_err(|e| {
            Error::usage(format!(
                "{}: --fractions value {f}: {e}",
                args.model.display()
            ))
        })?;
    }
    let scores = unit_scores(&net, criterion, Some(probe_path))?;
    let mut source = probe::open(probe_path, &net)?;
    require_labels(&*source, probe_path)?;
    let points = structured::unit_sweep(
        &net,
        &scores,
        &args.fractions,
        args.per_layer,
        &mut *source,
        &Silent,
    )?;
    emit(&args.common.destination(), |w| {
        tables::write_unit_sweep(args.common.format, w, &net, criterion, &points, probe_path)?;
        Ok::<(), Stop>(())
    })?;
    Ok(ExitCode::SUCCESS)
}

/// `prune-sweep --by unit --write-pruned FRAC --out FILE`: removes the fraction `f` of every
/// hidden layer's lowest-ranked units and writes the physically smaller model (with the
/// accuracy on the probe when one is given).
fn write_pruned_units(args: &PruneSweepArgs, criterion: Criterion, f: f64) -> Result<ExitCode> {
    check_fractions(&[f]).map_err(|e| e.for_option("write_pruned"))?;
    if args.per_layer {
        return Err(Error::usage(
            "--write-pruned prunes every hidden layer; it cannot be combined with --per-layer",
        ));
    }
    let Some(out) = &args.common.out else {
        return Err(Error::usage(
            "--write-pruned needs --out FILE: the file to write the pruned model to",
        ));
    };
    let net = args.common.load(&args.model)?;
    structured::check_fraction(&net, f, None)
        .map_err(|e| Error::usage(format!("{}: --write-pruned {f}: {e}", args.model.display())))?;
    let scores = unit_scores(&net, criterion, args.probe.as_deref())?;
    let pruned = structured::prune_units(&net, &scores, f, None, &out.display().to_string())?;
    if let Some(p) = &args.probe {
        let mut source = probe::open(p, &net)?;
        require_labels(&*source, p)?;
        let pts = structured::unit_sweep(&net, &scores, &[f], false, &mut *source, &Silent)?;
        if let Some(pt) = pts.first() {
            eprintln!(
                "receptor: accuracy on {} after removing {} of each hidden layer's units ({}): {}",
                p.display(),
                super::output::f64_text(f),
                criterion.as_str(),
                super::output::f64_text(pt.accuracy)
            );
        }
    }
    crate::model::write_json(&pruned, out)?;
    let sizes: Vec<String> = net
        .layers()
        .iter()
        .zip(pruned.layers())
        .map(|(a, b)| format!("'{}' {} -> {}", a.name, a.units(), b.units()))
        .collect();
    eprintln!(
        "receptor: wrote {} (units per layer: {}; parameters {} -> {})",
        out.display(),
        sizes.join(", "),
        net.parameter_count(),
        pruned.parameter_count()
    );
    Ok(ExitCode::SUCCESS)
}

/// Per hidden layer, the score of each unit under `criterion` (the probe is read once more
/// for `activation`).
fn unit_scores(
    net: &Network,
    criterion: Criterion,
    probe_path: Option<&Path>,
) -> Result<Vec<Vec<f64>>> {
    let mut source = match probe_path {
        Some(p) if criterion.needs_probe() => Some(probe::open(p, net)?),
        _ => None,
    };
    let source = source
        .as_deref_mut()
        .map(|s| s as &mut dyn probe::ProbeSource);
    structured::unit_scores(net, criterion, source, &Silent)
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

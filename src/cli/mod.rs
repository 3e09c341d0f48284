//! The command line: argument definitions (clap) and one file per command.
//!
//! Every command validates the whole model first, then writes CSV (default) or JSON to
//! `--out FILE` (atomically) or standard output. Exit codes: 0 success, 2 bad input or bad
//! usage, 3 only for a failed `check`.

pub mod attribute;
pub mod check;
pub mod compact;
pub mod convert;
pub mod fields;
pub mod forward;
pub mod output;
pub mod prefer;
pub mod prune_sweep;
pub mod screen;
pub mod stats;
pub mod timeline;

use crate::error::{Error, Result};
use crate::model::{InputBox, LoadOptions, Network};
use crate::probe::{self, ProbeSource};
use clap::{Args, Parser, Subcommand};
use output::{Destination, Format};
use std::num::NonZeroUsize;
use std::path::{Path, PathBuf};
use std::process::ExitCode;

/// Exit code for bad input or bad usage.
pub const EXIT_BAD_INPUT: u8 = 2;
/// Exit code of a failed `check`.
pub const EXIT_CHECK_FAILED: u8 = 3;

const ABOUT: &str =
    "Inspect a trained feed-forward network: preferred inputs, weight sparsity, dead ReLU units";

const LONG_ABOUT: &str = "\
Inspect a trained feed-forward network saved in the receptor-model/1 JSON schema or as an \
ONNX file (.onnx: a chain of dense layers; see `receptor convert --help`).

Without a command, receptor opens the desktop app (on MODEL, or on the bundled demo model). \
The commands below do the same analysis from the command line, for scripts and training \
pipelines. Each one first validates the whole model file, then writes CSV (default) or JSON \
(--format json) to standard output or to --out FILE.

Exit codes: 0 success; 2 bad input or bad usage; 3 a failed `check`.";

/// `receptor`: the desktop app, or one analysis command.
#[derive(Debug, Parser)]
#[command(
    name = "receptor",
    version,
    about = ABOUT,
    long_about = LONG_ABOUT,
    args_conflicts_with_subcommands = true,
    max_term_width = 100
)]
pub struct Cli {
    /// Model file to open in the desktop app (receptor-model/1 .json or .onnx; default: the
    /// bundled demo model).
    #[arg(value_name = "MODEL")]
    pub model: Option<PathBuf>,

    /// The input box of the model opened in the app.
    #[command(flatten)]
    pub input_box: BoxArgs,
    /// Reference data (.csv or .npy): the samples the app runs MODEL on (default: a file
    /// named like the model with -probe or -reference before .csv/.npy beside it, else the
    /// one last used with this model, else uniform samples of the input box).
    #[arg(long, value_name = "DATA")]
    pub probe: Option<PathBuf>,

    /// Allow the model's side files (safetensors) to be absolute paths or to lie outside the
    /// model's folder.
    #[arg(long)]
    pub allow_outside_paths: bool,

    /// The analysis command; without one the desktop app opens.
    #[command(subcommand)]
    pub command: Option<Command>,
}

/// The analysis commands.
#[derive(Debug, Subcommand)]
pub enum Command {
    /// Run the network on probe data: one row per sample with every output and the
    /// prediction.
    #[command(long_about = "\
Run the network on probe data: one row per probe sample.

Columns: `row` (from 0), one column per output unit (named by the output layer's label, else \
out0, out1, ...), then `predicted` (the label or column name of the largest output; empty in \
CSV and null in JSON when every output is NaN). The probe is streamed, so it may be larger \
than memory.")]
    Forward(forward::ForwardArgs),

    /// Weight sparsity statistics: one row per unit of every layer.
    #[command(long_about = "\
Weight sparsity statistics: one row per unit of every layer, computed in f64.

Columns: layer, unit (from 0), fan_in, l1, l2, max_abs (of the unit's incoming weights), \
near_zero_frac (fraction of incoming weights with |w| <= tol), hoyer (Hoyer 2004 \
sparseness, (sqrt(n) - L1/L2) / (sqrt(n) - 1)), gini (Gini index of |w|, Hurley & Rickard \
2009), bias. A unit whose weights are all zero, or that has one input, gets 1 for both. \
JSON output adds \"layers\": one summary per layer.")]
    Stats(stats::StatsArgs),

    /// Theoretical receptive fields: one row per layer with its size on the input.
    #[command(long_about = "\
The theoretical receptive field of one unit of every layer on the input image, by the \
recurrences of A. Araujo, W. Norris, J. Sim, \"Computing receptive fields of convolutional \
neural networks\" (Distill 2019).

Columns: layer, type, out_channels, out_height, out_width (the layer's output map; 1 x 1 for \
a vector), rf_height, rf_width (the field's size in input pixels; it may reach into the \
padding), jump_h, jump_w (input pixels between neighbouring units; empty for a vector layer, \
which sees the whole input), start_h, start_w (the input-pixel centre of unit (0, 0)'s field, \
negative when it lies in the padding; the image centre for a vector layer).")]
    Fields(fields::FieldsArgs),

    /// Screen hidden units for dead, rarely active, always active and saturated units.
    #[command(long_about = "\
Screen every hidden unit (all layers but the last) on probe data and by interval bound \
propagation over the input box.

Columns: layer, unit, activation, active_frac, mean, max, upper_bound, status.
active_frac: fraction of probe samples where the pre-activation z > 0 (relu, leaky_relu, \
identity) or where the unit is not saturated (sigmoid: |z| < 4.3565, tanh: |z| < 2.1783, \
i.e. its slope is at least 5% of its peak). mean, max: of the activation over the probe. \
upper_bound: a sound upper bound of z over the whole input box.
status (first that applies): rectifiers: dead_proven (upper_bound <= 0), dead_on_probe \
(never active on the probe), rarely_active (active_frac < --rare), always_active \
(active on every sample), else ok; sigmoid/tanh: saturated (active_frac < --rare), else \
ok; identity: ok; non_finite when the probe made the unit overflow.

Without --probe, the probe is samples drawn uniformly from the input box with a fixed seed \
(printed on standard error).")]
    Screen(screen::ScreenArgs),
    /// Find a unit's preferred input: the input in the box that maximises its pre-activation.
    #[command(long_about = "\
Find the input, inside the box [low, high], that maximises a unit's pre-activation z (minus \
LAMBDA x ||x||^2 with --l2), by projected gradient ascent from several starts (one from the \
box centre, the rest random from --seed). With --all every unit of the layer is optimised at \
once, as one batch.

Columns: layer, unit, preactivation (raw z at the preferred input), activation (the unit's \
output there; on a softmax layer its probability), steps (the most steps any restart ran), \
then x0..x{n-1}, the preferred input. JSON output has one array \"input\" instead of x0..x{n-1}. \
A search that diverged prints NaN in CSV and null in JSON, with a warning on standard \
error.")]
    Prefer(prefer::PreferArgs),
    /// Attribute one sample's drive of a unit to the inputs (integrated gradients).
    #[command(long_about = "\
Integrated gradients (Sundararajan, Taly & Yan 2017) of a unit's pre-activation z for one \
probe sample: per input, (x_i - x'_i) times the mean of dz/dx_i along the straight path from \
the baseline x' (the box centre, or the probe's mean with --baseline mean) to the sample x \
(trapezoid rule, --steps intervals).

Columns: input (index), name, value (the sample), baseline, attribution. The attributions \
sum to z(x) - z(x') up to the integration error; JSON adds z_sample, z_baseline, sum and gap \
(sum minus that difference).")]
    Attribute(attribute::AttributeArgs),
    /// Fail (exit 3) when too many rectifier units of a hidden layer are dead.
    #[command(long_about = "\
For a training pipeline: screen the network (as `screen` does) and count, in every hidden \
layer with rectifier units (relu, leaky_relu), the units that are dead (dead_proven or \
dead_on_probe). Prints one line per such layer, `layer NAME: D of N rectifier units dead`, \
with ` (over the limit of F)` appended where the dead fraction exceeds --max-dead.

Exit codes: 0 when every layer is within the limit, 3 when one is not, 2 on bad input. \
--format csv or json prints rows (layer, dead, units, dead_frac, max_dead, over_limit) \
instead of lines.")]
    Check(check::CheckArgs),

    /// Accuracy on a labelled probe after zeroing the smallest weights of every layer.
    #[command(
        name = "prune-sweep",
        long_about = "\
Magnitude pruning sweep: for each fraction F (default 0, 0.1, ..., 0.9), zero the F smallest \
|w| of every layer's weight matrix (biases kept) and measure the accuracy on a labelled probe \
(a CSV probe with a `label` column).

Columns: fraction, zeroed (weights that are zero after pruning, over all layers), total \
(weights over all layers), accuracy (fraction of probe rows whose largest output is the \
label).

With --write-pruned F --out FILE, writes the model pruned at fraction F to FILE in the \
receptor-model/1 schema instead (with --probe, its accuracy is printed on standard error).

With --by unit, whole hidden units are removed instead of single weights (structured \
pruning; the output layer is never pruned): in each hidden layer of n units, the \
floor(F x n + 1e-9) units with the lowest score go, with their bias and the next layer's \
weights from them. Scores (--criterion): l1, the L1 norm of the unit's incoming weights \
(H. Li et al., \"Pruning filters for efficient ConvNets\", ICLR 2017), or activation, the \
mean |activation| on the --probe data; ties go to the lower unit index. Columns: \
criterion, layer (`all` when every hidden layer is pruned at once), fraction, removed \
(units), units (before pruning), parameters (weights and biases left), accuracy. \
--per-layer prunes one hidden layer at a time and gives one curve per layer (the \
sensitivity analysis of S. Han et al., \"Learning both weights and connections for \
efficient neural networks\", 2015). --write-pruned F writes the physically smaller model; \
a fraction that would remove every unit of a layer (F = 1) is refused."
    )]
    PruneSweep(prune_sweep::PruneSweepArgs),

    /// Write a smaller model without its provably dead units and unused inputs.
    #[command(long_about = "\
Write a smaller model with the same outputs on the whole input box: removes every relu unit \
that is dead_proven (its sound upper bound of z over the box is <= 0, so it outputs 0 \
everywhere there), every hidden unit and input feature whose outgoing weights (to units \
that stay) are all 0, and the matching weights of the layer above. The output layer is never \
pruned; each layer keeps at least one unit; input features of an image layout are kept. \
leaky_relu, sigmoid and tanh units are never removed as dead (their output is not 0).

Before anything is written, the original and the smaller model are run on the reference \
data (--probe DATA, else uniform samples from the box; with --probe, uniform box samples \
too, --samples N of them with --seed S) and the largest |difference| of any output is checked against --check-tolerance. A \
summary of what was removed per layer, and the check, go to standard error.

Weaker arguments only when asked: --fold-constant folds units constant over the box (within \
--fold-tolerance) into the next layer's bias; --also dead-on-probe removes relu units never \
active on the --probe data (lossy elsewhere; the accuracy before and after on a labelled \
probe and the number of changed predictions are reported).")]
    Compact(compact::CompactArgs),

    /// How the units change over the checkpoints of a training run.
    #[command(long_about = "\
How the units of a network change over the checkpoints of one training run. CKPT... is one \
folder (every .json and .onnx model file in it) or a list of model files, all with the same \
architecture (input size, layer names, types, activations and weight shapes; a file that \
differs is refused, naming it, the layer and both shapes). Order: by the top-level \"step\" \
of every file, else (no file has one) by the natural order of the file names (ckpt-2 before \
ckpt-10); a series where only some files have a step is refused. Checkpoints are read one at \
a time. Every hidden unit is screened in every checkpoint as `screen` does, on the same \
reference data, and the weight statistics are those of `stats`. One checkpoint gives a \
one-checkpoint timeline.

Per unit (default): layer, unit, first_dead_proven, first_dead_on_probe (the step, or the \
0-based position when the files have no step, of the first checkpoint from which the unit \
stays dead_proven / never active on the reference data until the last checkpoint; empty when \
it is not dead in the last; a unit that dies and revives counts from its last death), \
last_status (its screen status in the last checkpoint), drift (cosine distance 1 - cos \
between its incoming weights in the first and the last checkpoint: 0 same direction, 1 \
orthogonal, 2 opposite; NaN when either is all zero), final_l2 (L2 norm of its incoming \
weights in the last checkpoint).

Per checkpoint and layer (--per checkpoint): step, layer, units, dead_proven, dead_on_probe, \
rarely_active (units with that screen status), mean_hoyer and near_zero_frac (as in \
`stats`' layer summary), mean_abs_update (mean |w_t - w_(t-1)| over the layer's weights; \
empty for the first checkpoint) and, with labelled reference data, accuracy.

JSON output holds both tables: the --per one under \"rows\", the other under \"checkpoints\" \
or \"units\", and \"key\" says whether the step column holds steps or positions.")]
    Timeline(timeline::TimelineArgs),

    /// Write a model (ONNX or receptor-model/1) in the receptor-model/1 JSON schema.
    #[command(long_about = "\
Write MODEL (an .onnx file, or a receptor-model/1 .json file) to --out in the receptor-model/1 \
JSON schema, with its tensors inline or, with --tensors FILE, in a safetensors side file in the \
same folder. The result can then be annotated (feature names, units, class labels) and \
versioned. ONNX files carry no input box: give --low and --high, or the box is taken from \
the model's metadata (keys receptor.low and receptor.high), else the default [-1, 1] with a \
notice on standard error.")]
    Convert(convert::ConvertArgs),
}

/// Options shared by the analysis commands.
#[derive(Debug, Clone, Args)]
pub struct CommonArgs {
    /// Output format.
    #[arg(long, value_enum, default_value_t = Format::Csv)]
    pub format: Format,

    /// Write the output to FILE instead of standard output. The file is written to a
    /// temporary file beside it and renamed, so it is never half-written.
    #[arg(long, value_name = "FILE")]
    pub out: Option<PathBuf>,

    /// Allow the model's side files (safetensors, ONNX external data) to be absolute paths
    /// or to lie outside the model's folder.
    #[arg(long)]
    pub allow_outside_paths: bool,

    /// The input box (ONNX models carry none).
    #[command(flatten)]
    pub input_box: BoxArgs,
}

impl CommonArgs {
    /// Where the output goes.
    pub fn destination(&self) -> Destination {
        Destination::from_arg(self.out.as_deref())
    }

    /// Loads and validates the model.
    pub fn load(&self, model: &Path) -> Result<Network> {
        load_model(model, self.allow_outside_paths, &self.input_box)
    }
}

/// `--low` and `--high`: the input box, for models that carry none (ONNX) or to override a
/// model's own.
#[derive(Debug, Clone, Default, Args)]
pub struct BoxArgs {
    /// Lower end of the input box: one number for every input, or a comma-separated list
    /// (one per input, or one per channel of an image). Default: the model's own box (for
    /// ONNX, metadata key receptor.low), else -1.
    #[arg(long, value_name = "V[,V...]", allow_hyphen_values = true, value_parser = parse_box_arg)]
    pub low: Option<BoxValues>,

    /// Upper end of the input box (same form as --low). Default: the model's own box (for
    /// ONNX, metadata key receptor.high), else 1.
    #[arg(long, value_name = "V[,V...]", allow_hyphen_values = true, value_parser = parse_box_arg)]
    pub high: Option<BoxValues>,
}

/// One end of a box as given on the command line.
#[derive(Debug, Clone, PartialEq)]
pub struct BoxValues(pub Vec<f32>);

impl BoxArgs {
    /// The box as the loader takes it.
    pub fn to_input_box(&self) -> InputBox {
        InputBox {
            low: self.low.as_ref().map(|v| v.0.clone()),
            high: self.high.as_ref().map(|v| v.0.clone()),
        }
    }
}

/// clap value parser for `--low`/`--high`.
fn parse_box_arg(text: &str) -> std::result::Result<BoxValues, String> {
    crate::model::parse_box_values(text).map(BoxValues)
}

/// Loads and validates a model for a command, and says on standard error when its input
/// box is the default one (bounds and preferred inputs depend on it).
pub fn load_model(model: &Path, allow_outside_paths: bool, input_box: &BoxArgs) -> Result<Network> {
    let opts = LoadOptions {
        allow_outside_paths,
        input_box: input_box.to_input_box(),
    };
    let (net, origin) = crate::model::load_with_origin(model, &opts)?;
    if origin.uses_default() {
        eprintln!(
            "receptor: {}: {} (give --low and --high to set it)",
            model.display(),
            origin.default_notice()
        );
    }
    Ok(net)
}

/// Options choosing the probe of `screen` and `check`.
#[derive(Debug, Clone, Args)]
pub struct ProbeArgs {
    /// Reference data: the samples the model is run on, a .csv or .npy file, one sample per
    /// row, columns in input order. Default: samples drawn uniformly from the input box
    /// (units may then fire on noise that real data never produces).
    #[arg(long, value_name = "DATA")]
    pub probe: Option<PathBuf>,

    /// Number of samples of the default uniform probe (without --probe).
    #[arg(long, value_name = "N", value_parser = parse_count,
          default_value_t = probe::DEFAULT_UNIFORM_SAMPLES_NONZERO)]
    pub samples: NonZeroUsize,

    /// Seed of the default uniform probe (without --probe).
    #[arg(long = "seed", value_name = "S", default_value_t = probe::DEFAULT_UNIFORM_SEED)]
    pub probe_seed: u64,
}

impl ProbeArgs {
    /// Opens the probe, or the seeded uniform probe (whose seed is printed on standard
    /// error). Returns the seed when the uniform probe is used.
    pub fn open(&self, net: &Network) -> Result<(Box<dyn ProbeSource>, Option<u64>)> {
        match &self.probe {
            Some(p) => Ok((probe::open(p, net)?, None)),
            None => {
                let samples = self.samples.get();
                eprintln!(
                    "receptor: no --probe given: using {} samples drawn uniformly from the input box with seed {}",
                    samples, self.probe_seed
                );
                Ok((
                    probe::uniform(net, samples, self.probe_seed),
                    Some(self.probe_seed),
                ))
            }
        }
    }
}

/// The flag of the core option `option` (`chunk_rows` is `--chunk-rows`).
pub fn flag(option: &str) -> String {
    format!("--{}", option.replace('_', "-"))
}

/// `err` worded for the command line, on one line: a bad option names its flag, and a side
/// file outside the model's folder names the flag that allows it.
pub fn message(err: &Error) -> String {
    let text = match err {
        Error::BadOption {
            option,
            value,
            allowed,
        } => format!("{} {allowed} (got {value})", flag(option)),
        Error::OutsidePath { .. } => {
            format!("{err} (pass --allow-outside-paths to allow it)")
        }
        other => other.to_string(),
    };
    text.replace(['\n', '\r'], " ")
}

/// clap value parser for a fraction of the command line only (`--max-dead`): a number from
/// 0 to 1.
pub fn parse_fraction(text: &str) -> std::result::Result<f64, String> {
    let v: f64 = text
        .parse()
        .map_err(|e| format!("'{text}' is not a number: {e}"))?;
    if v.is_finite() && (0.0..=1.0).contains(&v) {
        Ok(v)
    } else {
        Err("must be a number from 0 to 1".to_string())
    }
}

/// clap value parser for a count that must be at least 1 (`--chunk-rows`, `--samples`).
pub fn parse_count(text: &str) -> std::result::Result<NonZeroUsize, String> {
    let n: usize = text
        .parse()
        .map_err(|e| format!("'{text}' is not a whole number: {e}"))?;
    NonZeroUsize::new(n).ok_or_else(|| "must be at least 1".to_string())
}

/// Runs one analysis command, returning the process exit code on success (0, or 3 for a
/// failed `check`).
pub fn run(command: Command) -> Result<ExitCode> {
    match command {
        Command::Forward(a) => forward::run(&a),
        Command::Stats(a) => stats::run(&a),
        Command::Screen(a) => screen::run(&a),
        Command::Prefer(a) => prefer::run(&a),
        Command::Attribute(a) => attribute::run(&a),
        Command::Check(a) => check::run(&a),
        Command::PruneSweep(a) => prune_sweep::run(&a),
        Command::Compact(a) => compact::run(&a),
        Command::Convert(a) => convert::run(&a),
        Command::Fields(a) => fields::run(&a),
        Command::Timeline(a) => timeline::run(&a),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use clap::CommandFactory;

    #[test]
    fn argument_definitions_are_consistent() {
        // clap's own self-check of the derive definitions (conflicting names, groups, ...).
        Cli::command().debug_assert();
    }

    #[test]
    fn unit_and_all_together_is_refused() {
        let r = Cli::try_parse_from([
            "receptor", "prefer", "m.json", "--layer", "h", "--unit", "1", "--all",
        ]);
        let e = r.unwrap_err();
        assert_eq!(e.exit_code(), 2);
        let r = Cli::try_parse_from(["receptor", "prefer", "m.json", "--layer", "h"]);
        assert_eq!(r.unwrap_err().exit_code(), 2);
    }

    #[test]
    fn model_without_command_is_for_the_app() {
        let c = Cli::try_parse_from(["receptor", "net.json"]).unwrap();
        assert!(c.command.is_none());
        assert_eq!(c.model.as_deref(), Some(Path::new("net.json")));
        let c = Cli::try_parse_from(["receptor", "stats", "net.json"]).unwrap();
        assert!(matches!(c.command, Some(Command::Stats(_))));
    }
}

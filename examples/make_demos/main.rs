//! Regenerates the bundled demo models in `demo-models/` from scratch, bit for bit:
//!
//! ```text
//! cargo run --release --example make_demos            # writes demo-models/
//! cargo run --release --example make_demos -- OUT_DIR # writes elsewhere (to compare)
//! cargo run --release --example make_demos -- OUT_DIR cnn  # only the convolutional demo
//! ```
//!
//! Every data set is invented (synthesised here with fixed seeds), for demos only:
//!
//! 1. Solder-joint inspection. An assembly line photographs every solder joint after
//!    reflow; each photo is cut to a 12 x 12 grey patch with brightness in [-1, 1]. Five
//!    classes: good joint, solder bridge, insufficient solder, missing component, stray
//!    solder ball. Three files: a well-trained ReLU classifier, the same architecture after
//!    a run with a learning rate that is too high (many dead ReLU units; its tensors live in
//!    a safetensors side file), and a labelled probe CSV from held-out samples.
//! 2. Cold-storage warehouse (a chiller room kept at 0..8 °C). Eight hourly sensor
//!    features in physical units; four classes: normal, door left open, compressor wear,
//!    defrost fault. A tanh classifier whose input standardisation is folded into the
//!    first-layer weights, so the model takes raw units; and a labelled probe CSV.
//! 3. The solder joints again, seen by a colour camera (16 x 16 RGB patches): a small
//!    convolutional network (`receptor-model/2`, tensors in a safetensors side file) and its
//!    labelled probe CSV (`cnn_demo.rs`, trained by `conv_train.rs`).
//! 4. The over-driven solder-joint run saved as a series of 12 checkpoints (a folder of
//!    models with a top-level `"step"`, tensors in safetensors side files), for the
//!    timeline of a training run.
//!
//! Training uses the `train` module beside this file, whose fixed-order matrix products make the
//! output independent of thread scheduling.

use ndarray::{Array1, Array2};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use receptor::Error;
use receptor::analysis::Silent;
use receptor::atomic::{write_atomic, write_bytes_atomic};
use receptor::model::{self, Activation, InputSpec, Layout, Network, NetworkParts};
use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::ExitCode;
use train::{Optimizer, Result, TrainError, TrainOptions};

mod cnn_demo;
pub mod conv_train;
mod train;

/// Class names of the solder-joint classifier, in output order.
const SOLDER_CLASSES: [&str; 5] = [
    "good joint",
    "solder bridge",
    "insufficient solder",
    "missing component",
    "stray solder ball",
];

/// Side of the square solder-joint patch, in pixels.
const PATCH: usize = 12;

/// Class names of the cold-storage model, in output order.
const COLD_CLASSES: [&str; 4] = [
    "normal",
    "door left open",
    "compressor wear",
    "defrost fault",
];

/// Feature names of the cold-storage model (units in the name), in input order.
const COLD_FEATURES: [&str; 8] = [
    "air_temp_c",
    "rel_humidity_pct",
    "door_open_min_per_h",
    "compressor_current_a",
    "defrost_cycles_per_day",
    "outside_temp_c",
    "co2_ppm",
    "vibration_mm_s",
];

/// The physical unit of each cold-storage feature (the schema's `input.units`).
const COLD_UNITS: [&str; 8] = ["degC", "%", "min/h", "A", "1/day", "degC", "ppm", "mm/s"];

/// The input box of the cold-storage model: the sensors' plausible measuring ranges.
const COLD_LOW: [f32; 8] = [-5.0, 0.0, 0.0, 0.0, 0.0, -20.0, 300.0, 0.0];
/// Upper ends of the cold-storage input box.
const COLD_HIGH: [f32; 8] = [20.0, 100.0, 60.0, 25.0, 12.0, 40.0, 3000.0, 20.0];

fn main() -> ExitCode {
    let out = std::env::args_os()
        .nth(1)
        .map(PathBuf::from)
        .unwrap_or_else(|| Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-models"));
    let only = std::env::args().nth(2);
    let result = match only.as_deref() {
        None => run(&out),
        Some("cnn") => std::fs::create_dir_all(&out)
            .map_err(|e| Error::io(&out, "cannot create folder", e).into())
            .and_then(|()| cnn_demo::cnn_model(&out)),
        Some(other) => Err(TrainError::problem(format!(
            "unknown demo '{other}'; the only one made alone is 'cnn'"
        ))),
    };
    match result {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("make_demos: {e}");
            ExitCode::from(2)
        }
    }
}

/// Writes every demo file into `out` (created if missing).
pub fn run(out: &Path) -> Result<()> {
    std::fs::create_dir_all(out).map_err(|e| Error::io(out, "cannot create folder", e))?;
    solder_models(out)?;
    cold_storage_model(out)?;
    cnn_demo::cnn_model(out)?;
    Ok(())
}

// ---------------------------------------------------------------------------------------
// Random helpers
// ---------------------------------------------------------------------------------------

/// A standard normal sample (Box-Muller), so that no extra distribution crate is needed.
fn normal(rng: &mut ChaCha8Rng) -> f64 {
    let u1: f64 = rng.random_range(f64::EPSILON..1.0);
    let u2: f64 = rng.random_range(0.0..1.0);
    (-2.0 * u1.ln()).sqrt() * (std::f64::consts::TAU * u2).cos()
}

fn uniform(rng: &mut ChaCha8Rng, lo: f64, hi: f64) -> f64 {
    rng.random_range(lo..hi)
}

// ---------------------------------------------------------------------------------------
// Solder-joint patches
// ---------------------------------------------------------------------------------------

/// Linear ramp over one pixel: 0 outside, 1 inside, blended at the edge (cheap
/// anti-aliasing, so that sub-pixel shifts change the picture smoothly).
fn edge(t: f64) -> f64 {
    (t + 0.5).clamp(0.0, 1.0)
}

/// Coverage of the axis-aligned rectangle [y0, y1] x [x0, x1] at pixel centre (y, x).
fn rect(y: f64, x: f64, y0: f64, y1: f64, x0: f64, x1: f64) -> f64 {
    edge(y - y0) * edge(y1 - y) * edge(x - x0) * edge(x1 - x)
}

/// One synthetic 12 x 12 patch of class `class`, row-major, brightness in [-1, 1].
///
/// The scene, top to bottom: the component body (rows 0..3), its metal terminal, the copper
/// pad under it (centre columns) with the solder fillet wetting terminal and pad, and the
/// edges of the neighbouring pads at the left and right border. Dark board elsewhere.
fn solder_patch(class: usize, rng: &mut ChaCha8Rng) -> Vec<f32> {
    let dy = uniform(rng, -0.8, 0.8);
    let dx = uniform(rng, -0.8, 0.8);
    let board = uniform(rng, -0.78, -0.55);
    let pad = uniform(rng, -0.1, 0.1);
    let body = uniform(rng, -0.3, -0.05);
    let terminal = uniform(rng, 0.2, 0.45);
    let neighbour_solder = uniform(rng, 0.35, 0.6);
    let gain = uniform(rng, 0.88, 1.12);
    let offset = uniform(rng, -0.06, 0.06);
    let noise = uniform(rng, 0.04, 0.09);
    let component = class != 3;
    // Fillet: how far down the pad the wetted solder reaches, and how bright it is.
    let (fillet_len, fillet_peak) = match class {
        2 => (uniform(rng, 0.6, 1.6), uniform(rng, 0.2, 0.42)),
        _ => (uniform(rng, 2.8, 4.2), uniform(rng, 0.75, 0.95)),
    };
    // Bridge: a bright band across the gap to the left or right neighbour.
    let bridge_left = rng.random_bool(0.5);
    let bridge_y = uniform(rng, 4.3, 7.0);
    let bridge_h = uniform(rng, 1.2, 2.2);
    // Stray ball: a small bright spot on bare board, away from the pads.
    // Kept apart from where bridges form (the upper gaps) so that the two faults differ
    // in shape and place, as on a real board.
    let ball = match rng.random_range(0..4) {
        0 => (uniform(rng, 9.4, 10.2), uniform(rng, 2.1, 2.9)),
        1 => (uniform(rng, 9.4, 10.2), uniform(rng, 9.1, 9.9)),
        2 => (uniform(rng, 11.1, 11.4), uniform(rng, 1.5, 10.5)),
        _ => (
            uniform(rng, 0.8, 2.2),
            if rng.random_bool(0.5) {
                uniform(rng, 0.7, 1.6)
            } else {
                uniform(rng, 10.4, 11.3)
            },
        ),
    };
    let ball_r = uniform(rng, 0.5, 0.75);
    let mut out = Vec::with_capacity(PATCH * PATCH);
    for r in 0..PATCH {
        for c in 0..PATCH {
            let y = r as f64 + 0.5 - dy;
            let x = c as f64 + 0.5 - dx;
            let mut v = board;
            // Neighbouring pads at the borders, with their own (unseen) joints' solder.
            let nb = rect(y, x, 3.5, 10.5, -2.0, 1.5).max(rect(y, x, 3.5, 10.5, 10.5, 14.0));
            v += (neighbour_solder - v) * nb;
            // The centre pad.
            let p = rect(y, x, 3.5, 10.5, 3.5, 8.5);
            if component {
                v += (pad - v) * p;
            } else {
                // No component: the paste reflowed into a flat, dull blob on the pad.
                v += (0.45 - v) * p;
            }
            if component {
                // Body and terminal.
                let b = rect(y, x, -2.0, 3.0, 2.5, 9.5);
                v += (body - v) * b;
                let t = rect(y, x, 3.0, 5.0, 4.0, 8.0);
                v += (terminal - v) * t;
                // Fillet: brightest where it wets the terminal, fading down the pad; it
                // narrows with distance from the terminal like a meniscus.
                let d = (y - 4.6).max(0.0);
                if d < fillet_len + 0.5 {
                    let fall = (1.0 - d / fillet_len).clamp(0.0, 1.0);
                    let half = 1.5 + 1.0 * fall;
                    let f = rect(y, x, 4.0, 4.6 + fillet_len, 6.0 - half, 6.0 + half) * fall.sqrt();
                    v += (fillet_peak - v) * f;
                }
            }
            if class == 1 {
                let (x0, x1) = if bridge_left { (0.8, 4.2) } else { (7.8, 11.2) };
                let band = rect(y, x, bridge_y, bridge_y + bridge_h, x0, x1);
                v += (0.85 - v) * band;
            }
            if class == 4 {
                let d2 = (y - ball.0).powi(2) + (x - ball.1).powi(2);
                let s = (-d2 / (2.0 * ball_r * ball_r)).exp();
                v += (1.0 - v) * s;
            }
            let v = (gain * v + offset + noise * normal(rng)).clamp(-1.0, 1.0);
            // The camera's grey levels: two decimals (201 levels over [-1, 1]).
            out.push(((v * 100.0).round() / 100.0) as f32);
        }
    }
    out
}

/// `per_class` patches of every class, interleaved (class 0, 1, ..., 4, 0, 1, ...).
fn solder_data(per_class: usize, seed: u64) -> (Array2<f32>, Vec<usize>) {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let classes = SOLDER_CLASSES.len();
    let n = per_class * classes;
    let mut x = Array2::<f32>::zeros((n, PATCH * PATCH));
    let mut y = Vec::with_capacity(n);
    for i in 0..n {
        let class = i % classes;
        let patch = solder_patch(class, &mut rng);
        x.row_mut(i).assign(&Array1::from(patch));
        y.push(class);
    }
    (x, y)
}

fn solder_input() -> InputSpec {
    InputSpec {
        units: None,
        size: PATCH * PATCH,
        layout: Layout::Image {
            height: PATCH,
            width: PATCH,
            channels: 1,
        },
        low: vec![-1.0; PATCH * PATCH],
        high: vec![1.0; PATCH * PATCH],
        names: None,
    }
}

/// First-layer units whose pre-activation upper bound over the input box is <= 0:
/// `b + sum_i max(w_i * low_i, w_i * high_i)`, exact for the first layer (computed in f64).
fn provably_dead_first_layer(net: &NetworkParts) -> usize {
    let l = &net.layers[0];
    l.weights
        .rows()
        .into_iter()
        .zip(&l.bias)
        .filter(|(w, b)| {
            let ub: f64 = f64::from(**b)
                + w.iter()
                    .zip(net.input.low.iter().zip(&net.input.high))
                    .map(|(&w, (&lo, &hi))| f64::from(w * lo).max(f64::from(w * hi)))
                    .sum::<f64>();
            ub <= 0.0
        })
        .count()
}

/// Per hidden layer, the number of rectifier units whose pre-activation is <= 0 on every
/// row of `x`.
fn dead_on_data(net: &NetworkParts, x: &Array2<f32>) -> Vec<usize> {
    let mut a = x.clone();
    let mut dead = Vec::new();
    for layer in &net.layers[..net.layers.len() - 1] {
        let mut z = train::matmul_fixed(a.view(), layer.weights.t());
        z += &layer.bias;
        dead.push(
            z.columns()
                .into_iter()
                .filter(|c| c.iter().all(|&v| v <= 0.0))
                .count(),
        );
        layer.activation.apply_rows(&mut z);
        a = z;
    }
    dead
}

/// The untrained solder-joint network both runs start from (the same seed).
///
/// The hidden biases start at 0.2 rather than 0: most of a patch is dark board, so with zero
/// biases a few He-initialised units start (and stay) below zero on every patch, and even a
/// well-run training ended with dead units. A small positive start is common practice (no
/// source).
fn solder_start(name: &str, sizes: &[usize], labels: &[String]) -> Result<NetworkParts> {
    let mut net = train::init_network(
        name,
        solder_input(),
        sizes,
        Activation::Relu,
        Some(labels.to_vec()),
        11,
    )?;
    let hidden = net.layers.len() - 1;
    for layer in &mut net.layers[..hidden] {
        layer.bias.fill(0.2);
    }
    Ok(net)
}

fn solder_models(out: &Path) -> Result<()> {
    let (x, y) = solder_data(1000, 0x50_1d_e4);
    let (px, py) = solder_data(100, 0x50_1d_e4 + 1);
    let sizes = [32, 16, SOLDER_CLASSES.len()];
    let labels: Vec<String> = SOLDER_CLASSES.iter().map(|s| s.to_string()).collect();

    // The well-trained model.
    let mut good = solder_start("solder-joints", &sizes, &labels)?;
    let opts = TrainOptions {
        epochs: 60,
        batch_size: 64,
        optimizer: Optimizer::adam(2e-3),
        // A fairly strong L2 penalty: pixels that carry only noise get no lasting pull from
        // the data, so their weights decay and the weight maps show the scene's structure
        // (pads, fillet, gaps) instead of the random start. With 1e-4 the maps stayed noisy
        // at the same probe accuracy.
        weight_decay: 1e-2,
        lr_decay: 0.95,
        seed: 12,
    };
    let report = train::train(&mut good, x.view(), &y, &opts, &Silent)?;
    let last = report.epochs.last().copied();
    let acc = train::accuracy(&good, px.view(), &py)?;
    confusion(&good, &px, &py);
    eprintln!(
        "solder-joints: train loss {:.4}, probe accuracy {acc:.4}, dead on probe per layer {:?}, proven dead in h1 {}",
        last.map_or(f64::NAN, |e| e.loss),
        dead_on_data(&good, &px),
        provably_dead_first_layer(&good)
    );
    good.description = Some(format!(
        "Invented data, for demos only. Solder-joint inspection after reflow: a 12 x 12 grey \
         patch of one joint (brightness scaled to [-1, 1]) sorted into five classes. Trained \
         with Adam (learning rate 0.002, L2 weight decay 1e-2) on {} synthetic patches \
         (examples/make_demos/).",
        x.nrows()
    ));
    model::write_json(
        &Network::from_parts(good.clone(), "solder-joints")?,
        &out.join("solder-joints.json"),
    )?;

    // The over-driven run: the same architecture and initialisation, SGD with momentum at a
    // learning rate that is too high for this problem (measured with the same settings:
    // 0.05 gives probe accuracy 0.946 with 3 h1 units dead on the probe, 0.1 gives 0.964
    // with 6, 0.2 gives the result below). Early big steps
    // push many h1 units' biases so far down that no training patch reaches them; they get
    // no gradient from the data any more. The L2 weight decay (a common setting, 8e-4) keeps
    // shrinking their incoming weights, so the units that died early end up provably dead
    // (bias larger than the summed |weights|), while the ones that died later are dead on
    // the data only.
    let mut over = solder_start("solder-joints-overdriven", &sizes, &labels)?;
    let over_opts = TrainOptions {
        epochs: 60,
        batch_size: 64,
        optimizer: Optimizer::Sgd {
            learning_rate: 0.2,
            momentum: 0.9,
        },
        weight_decay: 8e-4,
        lr_decay: 1.0,
        seed: 12,
    };
    // Checkpoints of the run, saved as a series (see `write_run`).
    let mut checkpoints: Vec<NetworkParts> = Vec::new();
    let over_report = train::train_observed(
        &mut over,
        x.view(),
        &y,
        &over_opts,
        &Silent,
        &mut |epoch, step, net| {
            if RUN_EPOCHS.contains(&epoch) {
                let mut snap = net.clone();
                snap.step = Some(step);
                checkpoints.push(snap);
            }
            Ok(())
        },
    )?;
    let over_acc = train::accuracy(&over, px.view(), &py)?;
    let proven = provably_dead_first_layer(&over);
    let on_probe = dead_on_data(&over, &px);
    eprintln!(
        "solder-joints-overdriven: train loss {:.4}, probe accuracy {over_acc:.4}, dead on probe per layer {on_probe:?}, proven dead in h1 {proven}",
        over_report.epochs.last().map_or(f64::NAN, |e| e.loss),
    );
    confusion(&over, &px, &py);
    // The demo must show both kinds of dead unit; fail loudly if a change breaks that.
    if proven < 5 || on_probe[0] < proven + 5 || over_acc > acc - 0.05 {
        return Err(TrainError::problem(format!(
            "the over-driven run no longer shows what the demo needs: {proven} proven dead, \
             {} dead on the probe in h1, accuracy {over_acc:.3} vs {acc:.3}",
            on_probe[0]
        )));
    }
    over.description = Some(format!(
        "Invented data, for demos only. The solder-joint classifier's architecture after a \
         training run with a learning rate that is too high (SGD, momentum 0.9, learning rate \
         0.2, L2 weight decay 8e-4, {} synthetic patches): many ReLU units died; the weight \
         decay shrank the incoming weights of the units that died early until they are \
         provably dead over the whole input box, the later ones are dead on the data only. \
         Weights and biases are stored in solder-joints-overdriven.safetensors.",
        x.nrows()
    ));
    write_safetensors_model(&over, out, "solder-joints-overdriven")?;
    write_run(out, &mut checkpoints, x.nrows())?;

    // The probe file.
    write_probe(
        &out.join("solder-joints-probe.csv"),
        &(0..PATCH * PATCH)
            .map(|i| format!("x{i}"))
            .collect::<Vec<_>>(),
        &px,
        &py,
        &SOLDER_CLASSES,
    )?;
    Ok(())
}

/// The epochs after which the over-driven run is saved (0: the initialisation): densely
/// where units die (most of `h1` in the first epoch, a second wave in `h2` around epoch 26),
/// sparsely where the weight decay slowly makes the dead units provably dead.
pub const RUN_EPOCHS: [usize; 12] = [0, 1, 2, 5, 10, 20, 25, 26, 30, 40, 50, 60];

/// The folder of the over-driven run's checkpoints, inside the demo folder.
pub const RUN_FOLDER: &str = "solder-joints-overdriven-run";

/// Writes the over-driven run's checkpoints as a series: `step-NNNN.json` with a top-level
/// `"step"` (mini-batch updates so far), tensors in `step-NNNN.safetensors` (f32, so the
/// last checkpoint holds exactly the final model's tensors).
fn write_run(out: &Path, checkpoints: &mut [NetworkParts], samples: usize) -> Result<()> {
    if checkpoints.len() != RUN_EPOCHS.len() {
        return Err(TrainError::problem(format!(
            "the over-driven run saved {} checkpoints, not {}",
            checkpoints.len(),
            RUN_EPOCHS.len()
        )));
    }
    let dir = out.join(RUN_FOLDER);
    std::fs::create_dir_all(&dir).map_err(|e| Error::io(&dir, "cannot create folder", e))?;
    for (net, epoch) in checkpoints.iter_mut().zip(RUN_EPOCHS) {
        let step = net.step.unwrap_or(0);
        net.description = Some(format!(
            "Invented data, for demos only. A checkpoint of the over-driven solder-joint run \
             (solder-joints-overdriven.json; SGD, momentum 0.9, learning rate 0.2, L2 weight \
             decay 8e-4, {samples} synthetic patches, batches of 64) after {epoch} of 60 \
             epochs ({step} updates). The folder holds the run's checkpoints; open it as a \
             training run to watch the units die."
        ));
        write_safetensors_model(net, &dir, &format!("step-{step:04}"))?;
    }
    Ok(())
}

// ---------------------------------------------------------------------------------------
// Cold storage
// ---------------------------------------------------------------------------------------

/// One hourly record of class `class` (see [`COLD_CLASSES`]) in physical units, clamped to
/// the sensors' ranges. Invented but plausible: a chiller room at 2..4 °C with produce in it.
fn cold_record(class: usize, rng: &mut ChaCha8Rng) -> [f32; 8] {
    let outside = uniform(rng, -10.0, 35.0);
    // How bad the fault is, 0..1; mild cases overlap normal operation on purpose.
    let severity = uniform(rng, 0.0, 1.0);
    let n = |rng: &mut ChaCha8Rng, mean: f64, sd: f64| mean + sd * normal(rng);
    // Normal operation first; each fault then changes what it affects.
    let mut temp = n(rng, 3.0, 0.6);
    let mut rh = n(rng, 88.0, 4.0);
    let mut door = 12.0 * uniform(rng, 0.0, 1.0).powi(2);
    let mut current = 6.5 + 0.08 * outside + n(rng, 0.0, 0.6);
    let mut defrost = n(rng, 4.0, 0.8).round();
    let mut co2 = n(rng, 650.0, 120.0);
    let mut vibration = n(rng, 1.8, 0.4);
    match class {
        1 => {
            // Door left open: warm outside air pours in, the compressor works harder, the
            // room's CO2 from the produce is flushed out.
            door = uniform(rng, 18.0, 60.0);
            let open = door / 60.0;
            temp += open * uniform(rng, 2.0, 7.0) + 0.04 * (outside - 3.0).max(0.0);
            rh = n(rng, 76.0, 8.0);
            current += 1.0 + 1.5 * open;
            co2 = n(rng, 470.0, 50.0);
        }
        2 => {
            // Compressor wear: bearing vibration and current rise, cooling falls behind.
            vibration += 1.0 + 6.0 * severity + n(rng, 0.0, 0.6);
            current += 1.0 + 3.0 * severity + n(rng, 0.0, 0.5);
            temp += 0.5 + 2.0 * severity;
        }
        3 => {
            // Defrost fault: the heater or its timer fails, the evaporator ices over, the
            // air gets warmer and drier while the coil draws less.
            defrost = if rng.random_bool(0.8) { 0.0 } else { 1.0 };
            temp += 1.5 + 3.0 * severity;
            rh -= 6.0 + 14.0 * severity;
            current -= 0.5 + 1.0 * severity;
        }
        _ => {}
    }
    let v = [temp, rh, door, current, defrost, outside, co2, vibration];
    let mut out = [0.0f32; 8];
    for (i, (o, raw)) in out.iter_mut().zip(v).enumerate() {
        // Sensors report one decimal (CO2 whole ppm, defrost whole cycles).
        let step = match i {
            4 | 6 => 1.0,
            _ => 0.1,
        };
        let q = (raw / step).round() * step;
        *o = q.clamp(f64::from(COLD_LOW[i]), f64::from(COLD_HIGH[i])) as f32;
    }
    out
}

/// `per_class` records of every class, interleaved.
fn cold_data(per_class: usize, seed: u64) -> (Array2<f32>, Vec<usize>) {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let classes = COLD_CLASSES.len();
    let n = per_class * classes;
    let mut x = Array2::<f32>::zeros((n, COLD_FEATURES.len()));
    let mut y = Vec::with_capacity(n);
    for i in 0..n {
        let class = i % classes;
        x.row_mut(i)
            .assign(&Array1::from(cold_record(class, &mut rng).to_vec()));
        y.push(class);
    }
    (x, y)
}

fn cold_storage_model(out: &Path) -> Result<()> {
    let (x, y) = cold_data(750, 0xC01D);
    let (px, py) = cold_data(100, 0xC01D + 1);
    // Standardise with the training set's mean and standard deviation (in f64) ...
    let features = COLD_FEATURES.len();
    let rows = x.nrows() as f64;
    let mean: Vec<f64> = (0..features)
        .map(|j| x.column(j).iter().map(|&v| f64::from(v)).sum::<f64>() / rows)
        .collect();
    let sd: Vec<f64> = (0..features)
        .map(|j| {
            let m = mean[j];
            let var = x
                .column(j)
                .iter()
                .map(|&v| (f64::from(v) - m).powi(2))
                .sum::<f64>()
                / rows;
            var.sqrt().max(1e-6)
        })
        .collect();
    let xs = Array2::from_shape_fn(x.dim(), |(i, j)| {
        ((f64::from(x[(i, j)]) - mean[j]) / sd[j]) as f32
    });
    let input = InputSpec {
        units: Some(COLD_UNITS.iter().map(|s| s.to_string()).collect()),
        size: features,
        layout: Layout::Vector,
        low: COLD_LOW.to_vec(),
        high: COLD_HIGH.to_vec(),
        names: Some(COLD_FEATURES.iter().map(|s| s.to_string()).collect()),
    };
    // Train in standardised units: the box here is only a placeholder (the trained weights
    // are folded back to raw units below, with the real box).
    let std_input = InputSpec {
        low: vec![-10.0; features],
        high: vec![10.0; features],
        ..input.clone()
    };
    let labels: Vec<String> = COLD_CLASSES.iter().map(|s| s.to_string()).collect();
    let mut net = train::init_network(
        "cold-storage",
        std_input,
        &[16, 8, COLD_CLASSES.len()],
        Activation::Tanh,
        Some(labels),
        21,
    )?;
    let opts = TrainOptions {
        epochs: 80,
        batch_size: 32,
        optimizer: Optimizer::adam(3e-3),
        weight_decay: 1e-4,
        lr_decay: 0.97,
        seed: 22,
    };
    let report = train::train(&mut net, xs.view(), &y, &opts, &Silent)?;
    let pxs = Array2::from_shape_fn(px.dim(), |(i, j)| {
        ((f64::from(px[(i, j)]) - mean[j]) / sd[j]) as f32
    });
    let acc_std = train::accuracy(&net, pxs.view(), &py)?;
    // ... then fold the standardisation into the first layer, so that the model file takes
    // raw physical units: w' = w / sd, b' = b - sum_j w_j mean_j / sd_j.
    let first = &mut net.layers[0];
    for (mut row, b) in first
        .weights
        .rows_mut()
        .into_iter()
        .zip(first.bias.iter_mut())
    {
        let mut shift = 0.0f64;
        for (j, w) in row.iter_mut().enumerate() {
            let wj = f64::from(*w) / sd[j];
            shift += wj * mean[j];
            *w = wj as f32;
        }
        *b = (f64::from(*b) - shift) as f32;
    }
    net.input = input;
    net.description = Some(format!(
        "Invented data, for demos only. Cold-storage warehouse (a chiller room kept at \
         2..4 °C): eight hourly sensor readings in physical units flag normal operation, a \
         door left open, compressor wear or a defrost fault. Tanh units; the input \
         standardisation is folded into the first-layer weights, so the inputs are raw \
         units. Trained with Adam on {} synthetic hours (examples/make_demos/).",
        x.nrows()
    ));
    let checked = Network::from_parts(net.clone(), "cold-storage (folded)")?;
    let acc = train::accuracy(&net, px.view(), &py)?;
    eprintln!(
        "cold-storage: train loss {:.4}, probe accuracy {acc:.4} (before folding {acc_std:.4})",
        report.epochs.last().map_or(f64::NAN, |e| e.loss)
    );
    confusion(&net, &px, &py);
    model::write_json(&checked, &out.join("cold-storage.json"))?;
    write_probe(
        &out.join("cold-storage-probe.csv"),
        &COLD_FEATURES
            .iter()
            .map(|s| s.to_string())
            .collect::<Vec<_>>(),
        &px,
        &py,
        &COLD_CLASSES,
    )
}

// ---------------------------------------------------------------------------------------
// Writing
// ---------------------------------------------------------------------------------------

/// Writes a labelled probe CSV: a header of `names` and `label`, then one row per sample
/// with the class name in the last column. Values are printed in the shortest form that
/// reads back to the same f32.
fn write_probe(
    path: &Path,
    names: &[String],
    x: &Array2<f32>,
    y: &[usize],
    classes: &[&str],
) -> Result<()> {
    write_atomic(path, |w: &mut dyn Write| {
        writeln!(w, "{},label", names.join(","))?;
        for (row, &c) in x.rows().into_iter().zip(y) {
            for v in row {
                write!(w, "{v},")?;
            }
            writeln!(w, "{}", classes[c])?;
        }
        Ok(())
    })?;
    Ok(())
}

/// Prints the confusion matrix (rows: true class, columns: predicted) to standard error.
fn confusion(net: &NetworkParts, x: &Array2<f32>, y: &[usize]) {
    let Some(out) = net.layers.last() else {
        return;
    };
    let k = out.units();
    let mut m = vec![vec![0usize; k]; k];
    let mut a = x.clone();
    for layer in &net.layers {
        let mut z = train::matmul_fixed(a.view(), layer.weights.t());
        z += &layer.bias;
        layer.activation.apply_rows(&mut z);
        a = z;
    }
    for (row, &t) in a.rows().into_iter().zip(y) {
        let mut best = 0;
        for (i, &v) in row.iter().enumerate() {
            if v > row[best] {
                best = i;
            }
        }
        m[t][best] += 1;
    }
    for (t, r) in m.iter().enumerate() {
        eprintln!("  {:>22} {:?}", out.unit_name(t, "out"), r);
    }
}

/// Writes `blobs` (name, shape, little-endian f32 bytes) as the safetensors file `side` in
/// `out`, atomically; used by every demo whose tensors live in a side file.
fn write_f32_tensors(
    out: &Path,
    side: &str,
    blobs: &[(String, Vec<usize>, Vec<u8>)],
) -> Result<()> {
    let mut views = Vec::with_capacity(blobs.len());
    for (name, shape, data) in blobs {
        let view =
            safetensors::tensor::TensorView::new(safetensors::Dtype::F32, shape.clone(), data)
                .map_err(|e| Error::model(side, format!("tensor {name}: {e}")))?;
        views.push((name.clone(), view));
    }
    let bytes = safetensors::serialize(views, None)
        .map_err(|e| Error::model(side, format!("cannot serialise: {e}")))?;
    write_bytes_atomic(&out.join(side), &bytes)?;
    Ok(())
}

/// Writes `net` as `{stem}.json` whose weights and biases live in `{stem}.safetensors`
/// (f32, tensors `{layer}.weight` `[units, inputs]` and `{layer}.bias` `[units]`).
fn write_safetensors_model(net: &NetworkParts, out: &Path, stem: &str) -> Result<()> {
    let side = format!("{stem}.safetensors");
    let mut blobs: Vec<(String, Vec<usize>, Vec<u8>)> = Vec::new();
    for l in &net.layers {
        let bytes = |v: &mut dyn Iterator<Item = &f32>| -> Vec<u8> {
            v.flat_map(|x| x.to_le_bytes()).collect()
        };
        blobs.push((
            format!("{}.weight", l.name),
            vec![l.units(), l.fan_in()],
            bytes(&mut l.weights.iter()),
        ));
        blobs.push((
            format!("{}.bias", l.name),
            vec![l.units()],
            bytes(&mut l.bias.iter()),
        ));
    }
    write_f32_tensors(out, &side, &blobs)?;

    // Written by hand rather than through a serde_json map, to keep the schema's own key
    // order (schema, name, description, input, layers) for people reading the file.
    let Layout::Image {
        height,
        width,
        channels,
    } = net.input.layout
    else {
        return Err(TrainError::problem(
            "write_safetensors_model: only image models are written this way",
        ));
    };
    let q = |v: &str| serde_json::Value::from(v).to_string();
    let reference =
        |name: &str| format!("{{\"safetensors\": {}, \"tensor\": {}}}", q(&side), q(name));
    let mut text = String::new();
    text.push_str(&format!("{{\n  \"schema\": {},\n", q(model::SCHEMA_TAG)));
    text.push_str(&format!("  \"name\": {},\n", q(&net.name)));
    if let Some(step) = net.step {
        text.push_str(&format!("  \"step\": {step},\n"));
    }
    if let Some(d) = &net.description {
        text.push_str(&format!("  \"description\": {},\n", q(d)));
    }
    text.push_str(&format!(
        "  \"input\": {{\n    \"size\": {},\n    \"layout\": {{\"kind\": \"image\", \"height\": {height}, \"width\": {width}, \"channels\": {channels}}},\n    \"low\": -1.0,\n    \"high\": 1.0\n  }},\n  \"layers\": [\n",
        net.input.size
    ));
    for (i, l) in net.layers.iter().enumerate() {
        text.push_str(&format!(
            "    {{\"name\": {}, \"type\": \"dense\", \"activation\": {},",
            q(&l.name),
            q(l.activation.name())
        ));
        if let Some(labels) = &l.labels {
            let labels: Vec<String> = labels.iter().map(|s| q(s)).collect();
            text.push_str(&format!(" \"labels\": [{}],", labels.join(", ")));
        }
        text.push_str(&format!(
            "\n     \"weights\": {},\n     \"bias\": {}}}{}\n",
            reference(&format!("{}.weight", l.name)),
            reference(&format!("{}.bias", l.name)),
            if i + 1 < net.layers.len() { "," } else { "" }
        ));
    }
    text.push_str("  ]\n}\n");
    write_bytes_atomic(&out.join(format!("{stem}.json")), text.as_bytes())?;
    Ok(())
}

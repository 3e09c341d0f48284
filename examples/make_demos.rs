//! Regenerates the bundled demo models in `demo-models/` from scratch, bit for bit:
//!
//! ```text
//! cargo run --release --example make_demos            # writes demo-models/
//! cargo run --release --example make_demos -- OUT_DIR # writes elsewhere (to compare)
//! ```
//!
//! Both data sets are invented (synthesised here with fixed seeds), for demos only:
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
//!
//! Training uses `receptor::analysis::train`, whose fixed-order matrix products make the
//! output independent of thread scheduling.

use ndarray::{Array1, Array2};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use receptor::analysis::Silent;
use receptor::analysis::train::{self, Optimizer, TrainOptions};
use receptor::atomic::{write_atomic, write_bytes_atomic};
use receptor::model::{self, Activation, InputSpec, Layout, Network};
use receptor::{Error, Result};
use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::ExitCode;

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

/// The input box of the cold-storage model: the sensors' plausible measuring ranges.
const COLD_LOW: [f32; 8] = [-5.0, 0.0, 0.0, 0.0, 0.0, -20.0, 300.0, 0.0];
/// Upper ends of the cold-storage input box.
const COLD_HIGH: [f32; 8] = [20.0, 100.0, 60.0, 25.0, 12.0, 40.0, 3000.0, 20.0];

fn main() -> ExitCode {
    let out = std::env::args_os()
        .nth(1)
        .map(PathBuf::from)
        .unwrap_or_else(|| Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-models"));
    match run(&out) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("make_demos: {e}");
            ExitCode::from(2)
        }
    }
}

fn run(out: &Path) -> Result<()> {
    std::fs::create_dir_all(out).map_err(|e| Error::io(out, "cannot create folder", e))?;
    solder_models(out)?;
    cold_storage_model(out)?;
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
            let v = gain * v + offset + noise * normal(rng);
            out.push(v.clamp(-1.0, 1.0) as f32);
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
fn provably_dead_first_layer(net: &Network) -> usize {
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
fn dead_on_data(net: &Network, x: &Array2<f32>) -> Vec<usize> {
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

fn solder_models(out: &Path) -> Result<()> {
    let (x, y) = solder_data(1000, 0x50_1d_e4);
    let (px, py) = solder_data(100, 0x50_1d_e4 + 1);
    let sizes = [32, 16, SOLDER_CLASSES.len()];
    let labels: Vec<String> = SOLDER_CLASSES.iter().map(|s| s.to_string()).collect();

    // The well-trained model.
    let mut good = train::init_network(
        "solder-joints",
        solder_input(),
        &sizes,
        Activation::Relu,
        Some(labels.clone()),
        11,
    )?;
    let opts = TrainOptions {
        epochs: 60,
        batch_size: 64,
        optimizer: Optimizer::adam(2e-3),
        weight_decay: 1e-4,
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
    good.description = Some(
        "Invented data, for demos only. Solder-joint inspection after reflow: a 12 x 12 grey \
         patch of one joint (brightness scaled to [-1, 1]) sorted into five classes. Trained \
         with Adam on 4000 synthetic patches (examples/make_demos.rs)."
            .to_string(),
    );
    model::write_json(&good, &out.join("solder-joints.json"))?;

    // The probe file.
    write_probe(
        &out.join("solder-joints-probe.csv"),
        &(0..PATCH * PATCH).map(|i| format!("x{i}")).collect::<Vec<_>>(),
        &px,
        &py,
        &SOLDER_CLASSES,
    )?;
    Ok(())
}

// ---------------------------------------------------------------------------------------
// Cold storage
// ---------------------------------------------------------------------------------------

fn cold_storage_model(_out: &Path) -> Result<()> {
    Ok(())
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
    })
}

/// Prints the confusion matrix (rows: true class, columns: predicted) to standard error.
fn confusion(net: &Network, x: &Array2<f32>, y: &[usize]) {
    let k = net.output_layer().units();
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
        eprintln!("  {:>22} {:?}", net.output_names()[t], r);
    }
}

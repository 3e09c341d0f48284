//! The convolutional demo: colour photos of solder joints (invented data, for demos only).
//!
//! The same inspection as the grey demo, seen by a colour camera at a slightly wider field:
//! a 16 x 16 RGB patch (values in [0, 1], row-major, channel last) of one joint. Colour
//! carries information here: bare copper is orange, solder is silver-grey, the solder mask
//! green, the component body black. Five classes as in the grey demo. The classifier is a
//! small convolutional network (`conv2d 3x3 8 -> relu -> max pool 2 -> conv2d 3x3 16 -> relu
//! -> max pool 2 -> flatten -> dense 5 softmax`), trained by `conv_train.rs` and written as
//! `receptor-model/2` with its tensors in a safetensors side file.

use super::conv_train::{self, Cnn, CnnTrainOptions};
use super::train::{Optimizer, Result, TrainError};
use super::{SOLDER_CLASSES, normal, rect, uniform, write_f32_tensors, write_probe};
use ndarray::{Array1, Array2};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use receptor::atomic::write_bytes_atomic;
use std::path::Path;

/// Side of the square colour patch, in pixels.
pub const SIDE: usize = 16;
/// File stem of the model (`.json`, `.safetensors`, `-probe.csv`).
pub const STEM: &str = "solder-joints-cnn";

/// Linear blend of two colours.
fn mix(a: [f64; 3], b: [f64; 3], t: f64) -> [f64; 3] {
    [
        a[0] + (b[0] - a[0]) * t,
        a[1] + (b[1] - a[1]) * t,
        a[2] + (b[2] - a[2]) * t,
    ]
}

/// One synthetic 16 x 16 x 3 patch of class `class` (see [`SOLDER_CLASSES`]), row-major,
/// channel last, values in [0, 1] with two decimals.
///
/// The scene, top to bottom: the black component body with its silver terminal, the
/// copper pad under it (centre columns) wetted by the solder fillet, the solder-covered
/// neighbouring pads at the left and right border; green solder mask elsewhere.
fn colour_patch(class: usize, rng: &mut ChaCha8Rng) -> Vec<f32> {
    let dy = uniform(rng, -1.0, 1.0);
    let dx = uniform(rng, -1.0, 1.0);
    let j = |rng: &mut ChaCha8Rng, c: [f64; 3], s: f64| {
        [
            c[0] + uniform(rng, -s, s),
            c[1] + uniform(rng, -s, s),
            c[2] + uniform(rng, -s, s),
        ]
    };
    let mask = j(rng, [0.12, 0.40, 0.20], 0.04);
    let copper = j(rng, [0.82, 0.50, 0.28], 0.05);
    let solder = j(rng, [0.76, 0.78, 0.80], 0.04);
    let body = j(rng, [0.10, 0.10, 0.11], 0.03);
    let terminal = j(rng, [0.62, 0.62, 0.64], 0.04);
    let neighbour = j(rng, [0.70, 0.72, 0.74], 0.05);
    // Lighting: overall gain and a slight colour cast of the lamp.
    let gain = uniform(rng, 0.85, 1.15);
    let cast = [
        uniform(rng, -0.04, 0.04),
        uniform(rng, -0.04, 0.04),
        uniform(rng, -0.04, 0.04),
    ];
    let noise = uniform(rng, 0.02, 0.045);
    let component = class != 3;
    // How far down the pad the wetted solder reaches (the pad is rows 5..14).
    let fillet_len = match class {
        2 => uniform(rng, 1.0, 3.0),
        _ => uniform(rng, 7.0, 9.5),
    };
    let bridge_left = rng.random_bool(0.5);
    let bridge_y = uniform(rng, 6.0, 10.0);
    let bridge_h = uniform(rng, 1.6, 2.8);
    let ball = match rng.random_range(0..3) {
        0 => (uniform(rng, 14.7, 15.2), uniform(rng, 2.0, 14.0)),
        1 => (
            uniform(rng, 11.5, 13.5),
            if rng.random_bool(0.5) { 3.0 } else { 13.0 },
        ),
        _ => (
            uniform(rng, 1.0, 3.0),
            if rng.random_bool(0.5) {
                uniform(rng, 0.8, 2.4)
            } else {
                uniform(rng, 13.6, 15.2)
            },
        ),
    };
    let ball_r = uniform(rng, 0.75, 1.05);
    let mut out = Vec::with_capacity(SIDE * SIDE * 3);
    for r in 0..SIDE {
        for c in 0..SIDE {
            let y = r as f64 + 0.5 - dy;
            let x = c as f64 + 0.5 - dx;
            let mut v = mask;
            // Neighbouring pads, covered by their own joints' solder.
            let nb = rect(y, x, 5.0, 14.0, -3.0, 1.5).max(rect(y, x, 5.0, 14.0, 14.5, 19.0));
            v = mix(v, neighbour, nb);
            // The centre pad: bare copper where no solder wets it.
            let p = rect(y, x, 5.0, 14.0, 4.5, 11.5);
            if component {
                v = mix(v, copper, p);
                // Fillet: silver solder from the terminal down the pad, brightest (a
                // highlight on the meniscus) near the terminal.
                let d = (y - 5.0).max(0.0);
                let f = rect(y, x, 4.5, 5.0 + fillet_len, 4.5, 11.5);
                let shine = (1.0 - d / fillet_len).clamp(0.0, 1.0);
                let tone = mix(solder, [0.97, 0.97, 0.98], 0.6 * shine);
                v = mix(v, tone, f);
                // Body and terminal.
                v = mix(v, body, rect(y, x, -3.0, 4.0, 3.5, 12.5));
                v = mix(v, terminal, rect(y, x, 4.0, 6.0, 5.0, 11.0));
            } else {
                // No component: the paste reflowed into a dull, flat blob on the pad.
                v = mix(v, mix(solder, copper, 0.25), p);
            }
            if class == 1 {
                let (x0, x1) = if bridge_left {
                    (1.0, 5.0)
                } else {
                    (11.0, 15.0)
                };
                v = mix(v, solder, rect(y, x, bridge_y, bridge_y + bridge_h, x0, x1));
            }
            if class == 4 {
                let d2 = (y - ball.0).powi(2) + (x - ball.1).powi(2);
                v = mix(v, [0.95, 0.95, 0.96], (-d2 / (2.0 * ball_r * ball_r)).exp());
            }
            for ch in 0..3 {
                let val = (gain * v[ch] + cast[ch] + noise * normal(rng)).clamp(0.0, 1.0);
                out.push(((val * 100.0).round() / 100.0) as f32);
            }
        }
    }
    out
}

/// `per_class` patches of every class, interleaved.
pub fn colour_data(per_class: usize, seed: u64) -> (Array2<f32>, Vec<usize>) {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let classes = SOLDER_CLASSES.len();
    let n = per_class * classes;
    let mut x = Array2::<f32>::zeros((n, SIDE * SIDE * 3));
    let mut y = Vec::with_capacity(n);
    for i in 0..n {
        let class = i % classes;
        x.row_mut(i)
            .assign(&Array1::from(colour_patch(class, &mut rng)));
        y.push(class);
    }
    (x, y)
}

/// Trains the convolutional classifier and writes `solder-joints-cnn.json`, its
/// safetensors side file and `solder-joints-cnn-probe.csv` into `out`.
pub fn cnn_model(out: &Path) -> Result<()> {
    let (x, y) = colour_data(500, 0xC0_10_52);
    let (px, py) = colour_data(60, 0xC0_10_52 + 1);
    let mut net = Cnn::init(
        (SIDE, SIDE, 3),
        &[(8, 3, 1, 2), (16, 3, 1, 2)],
        SOLDER_CLASSES.len(),
        0.05,
        31,
    )?;
    let opts = CnnTrainOptions {
        epochs: 16,
        batch_size: 32,
        optimizer: Optimizer::adam(3e-3),
        // Some L2 penalty, so that the first-layer filters show colour and edge structure
        // rather than the random start.
        weight_decay: 1e-3,
        lr_decay: 0.85,
        seed: 32,
    };
    let loss = conv_train::train(&mut net, x.view(), &y, &opts)?;
    let (_, acc) = conv_train::evaluate(&net, px.view(), &py)?;
    eprintln!("{STEM}: train loss {loss:.4}, probe accuracy {acc:.4}");
    if acc < 0.9 {
        return Err(TrainError::problem(format!(
            "{STEM}: probe accuracy {acc:.3} is too low for a demo"
        )));
    }
    let description = format!(
        "Invented data, for demos only. Solder-joint inspection with a colour camera: a 16 x 16 \
         RGB patch of one joint (values in [0, 1]; bare copper is orange, solder silver, the \
         solder mask green) sorted into five classes by a small convolutional network. \
         Trained with Adam (learning rate 0.003, L2 weight decay 1e-3) on {} synthetic patches \
         (examples/make_demos/). Weights and biases are stored in {STEM}.safetensors.",
        x.nrows()
    );
    write_cnn(&net, out, &description)?;
    let names: Vec<String> = (0..SIDE * SIDE * 3)
        .map(|i| {
            let (pix, ch) = (i / 3, i % 3);
            format!(
                "r{}c{}_{}",
                pix / SIDE,
                pix % SIDE,
                ["red", "green", "blue"][ch]
            )
        })
        .collect();
    write_probe(
        &out.join(format!("{STEM}-probe.csv")),
        &names,
        &px,
        &py,
        &SOLDER_CLASSES,
    )
}

/// Writes `net` as `{STEM}.json` (`receptor-model/2`) with every tensor in
/// `{STEM}.safetensors` (f32; `conv{i}.weight` `[out, in, k, k]`, `out.weight` `[classes,
/// flat]`).
fn write_cnn(net: &Cnn, out: &Path, description: &str) -> Result<()> {
    let side = format!("{STEM}.safetensors");
    let bytes_of = |v: &mut dyn Iterator<Item = &f32>| -> Vec<u8> {
        v.flat_map(|x| x.to_le_bytes()).collect()
    };
    let mut blobs: Vec<(String, Vec<usize>, Vec<u8>)> = Vec::new();
    let mut in_c = net.input.2;
    for b in &net.blocks {
        let oc = b.weights.nrows();
        blobs.push((
            format!("{}.weight", b.name),
            vec![oc, in_c, b.k, b.k],
            bytes_of(&mut b.weights.iter()),
        ));
        blobs.push((
            format!("{}.bias", b.name),
            vec![oc],
            bytes_of(&mut b.bias.iter()),
        ));
        in_c = oc;
    }
    blobs.push((
        "out.weight".into(),
        vec![net.dense.nrows(), net.dense.ncols()],
        bytes_of(&mut net.dense.iter()),
    ));
    blobs.push((
        "out.bias".into(),
        vec![net.dense_bias.len()],
        bytes_of(&mut net.dense_bias.iter()),
    ));
    write_f32_tensors(out, &side, &blobs)?;

    // Written by hand in the schema's key order, for people reading the file.
    let q = |v: &str| serde_json::Value::from(v).to_string();
    let reference =
        |name: &str| format!("{{\"safetensors\": {}, \"tensor\": {}}}", q(&side), q(name));
    let (h, w, c) = net.input;
    let mut layers = Vec::new();
    for (i, b) in net.blocks.iter().enumerate() {
        layers.push(format!(
            "    {{\"name\": {}, \"type\": \"conv2d\", \"activation\": \"relu\", \"stride\": 1, \"padding\": {}, \"dilation\": 1,\n     \"weights\": {},\n     \"bias\": {}}}",
            q(&b.name),
            b.pad,
            reference(&format!("{}.weight", b.name)),
            reference(&format!("{}.bias", b.name)),
        ));
        if b.pool > 1 {
            layers.push(format!(
                "    {{\"name\": \"pool{}\", \"type\": \"max_pool2d\", \"kernel\": {}, \"stride\": {}, \"padding\": 0}}",
                i + 1,
                b.pool,
                b.pool
            ));
        }
    }
    layers.push("    {\"name\": \"flatten\", \"type\": \"flatten\"}".into());
    let labels: Vec<String> = SOLDER_CLASSES.iter().map(|s| q(s)).collect();
    layers.push(format!(
        "    {{\"name\": \"out\", \"type\": \"dense\", \"activation\": \"softmax\", \"labels\": [{}],\n     \"weights\": {},\n     \"bias\": {}}}",
        labels.join(", "),
        reference("out.weight"),
        reference("out.bias")
    ));
    let text = format!(
        "{{\n  \"schema\": \"receptor-model/2\",\n  \"name\": {},\n  \"description\": {},\n  \"input\": {{\n    \"size\": {},\n    \"layout\": {{\"kind\": \"image\", \"height\": {h}, \"width\": {w}, \"channels\": {c}}},\n    \"low\": 0.0,\n    \"high\": 1.0\n  }},\n  \"layers\": [\n{}\n  ]\n}}\n",
        q(STEM),
        q(description),
        h * w * c,
        layers.join(",\n")
    );
    write_bytes_atomic(&out.join(format!("{STEM}.json")), text.as_bytes())?;
    Ok(())
}

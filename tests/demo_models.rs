//! The bundled demo models in `demo-models/`: each loads, reaches a stated accuracy on its
//! own labelled probe, the over-driven run shows both kinds of dead ReLU unit, the
//! convolutional demo is a `receptor-model/2` network whose trainer agrees with the shared
//! forward pass, and the generator `examples/make_demos/` reproduces every file byte for
//! byte.
//!
//! Validation against `assets/model-schema.json` is done for every bundled model by
//! `tests/schema.rs`.
//!
//! The accuracy numbers in the comments were measured on the committed files with the
//! generator's own evaluation (`cargo run --release --example make_demos` prints them); the
//! thresholds sit a little below them so the tests fail when a model really changes, not
//! on rounding.

use ndarray::Array2;
use receptor::analysis::Silent;
use receptor::analysis::bounds::interval_bounds;
use receptor::analysis::forward::{argmax_rows, forward};
use receptor::analysis::screen::{ScreenOptions, Status, screen};
use receptor::model::{self, Activation, LoadOptions, Network};
use receptor::probe;
use std::path::{Path, PathBuf};

#[allow(
    dead_code,
    reason = "the generator's command-line entry point is not called here"
)]
#[path = "../examples/make_demos/main.rs"]
mod make_demos;

fn demo_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-models")
}

fn load(file: &str) -> Network {
    let path = demo_dir().join(file);
    model::load(&path, &LoadOptions::default())
        .unwrap_or_else(|e| panic!("{} does not load: {e}", path.display()))
}

/// Reads the whole labelled probe `file` for `net`.
fn probe_of(net: &Network, file: &str) -> (Array2<f32>, Vec<usize>) {
    let path = demo_dir().join(file);
    let mut src = probe::open(&path, net).unwrap();
    assert!(src.has_labels(), "{file} must be labelled");
    let data = probe::read_all(src.as_mut()).unwrap();
    let labels = data.labels.expect("labelled probe");
    (data.inputs, labels)
}

/// Fraction of probe rows whose argmax output is the row's label.
fn accuracy(net: &Network, probe_file: &str) -> f64 {
    let (x, y) = probe_of(net, probe_file);
    let out = forward(net, x.view());
    let pred = argmax_rows(out.view());
    let right = pred
        .iter()
        .zip(&y)
        .filter(|(p, t)| **p == Some(**t))
        .count();
    right as f64 / y.len() as f64
}

/// Dead units per hidden layer as screened on the model's own probe:
/// (`dead_proven`, `dead_on_probe`) counts.
fn dead_counts(net: &Network, probe_file: &str) -> Vec<(usize, usize)> {
    let path = demo_dir().join(probe_file);
    let mut src = probe::open(&path, net).unwrap();
    let report = screen(net, src.as_mut(), &ScreenOptions::default(), &Silent).unwrap();
    let hidden = net.layers().len() - 1;
    let mut counts = vec![(0, 0); hidden];
    for u in &report.units {
        match u.status {
            Status::DeadProven => counts[u.layer_index].0 += 1,
            Status::DeadOnProbe => counts[u.layer_index].1 += 1,
            _ => {}
        }
    }
    counts
}

#[test]
fn every_bundled_model_loads_and_has_a_labelled_probe() {
    let mut models = 0;
    for entry in std::fs::read_dir(demo_dir()).unwrap() {
        let path = entry.unwrap().path();
        if path.extension().and_then(|e| e.to_str()) != Some("json") {
            continue;
        }
        let net = model::load(&path, &LoadOptions::default())
            .unwrap_or_else(|e| panic!("{} does not load: {e}", path.display()));
        assert!(
            net.description()
                .is_some_and(|d| d.starts_with("Invented data, for demos only.")),
            "{}: the description must say the data is invented",
            path.display()
        );
        // Every model ships with `<stem>-probe.csv`, except the over-driven run, which is
        // screened with the well-trained model's probe (same inputs and labels).
        let stem = path.file_stem().unwrap().to_string_lossy().to_string();
        let probe_stem = stem.trim_end_matches("-overdriven");
        let probe_file = demo_dir().join(format!("{probe_stem}-probe.csv"));
        assert!(probe_file.exists(), "{} has no probe", path.display());
        let (x, y) = probe_of(&net, &format!("{probe_stem}-probe.csv"));
        assert!(x.nrows() >= 300, "{stem}: only {} probe rows", x.nrows());
        // Every class is present in the probe.
        for class in 0..net.output_layer().units() {
            assert!(y.contains(&class), "{stem}: class {class} missing in probe");
        }
        models += 1;
    }
    assert_eq!(models, 4, "expected the four demo models");
}

#[test]
fn solder_joints_is_trained_well() {
    let net = load("solder-joints.json");
    let sizes: Vec<usize> = net.layers().iter().map(|l| l.units()).collect();
    assert_eq!(sizes, [32, 16, 5]);
    assert_eq!(
        net.input().layout,
        model::Layout::Image {
            height: 12,
            width: 12,
            channels: 1
        }
    );
    assert!(
        net.layers()[..2]
            .iter()
            .all(|l| l.activation == Activation::Relu)
    );
    // Measured: 0.980 (490 of 500); chance is 0.2.
    let acc = accuracy(&net, "solder-joints-probe.csv");
    assert!(acc >= 0.96, "solder-joints accuracy {acc}");
    // Measured: no unit dead at all (proven or on the probe) in h1 or h2, so `receptor
    // check` passes on this probe.
    let dead = dead_counts(&net, "solder-joints-probe.csv");
    assert_eq!(
        dead,
        [(0, 0), (0, 0)],
        "(proven, on probe) per hidden layer"
    );
}

#[test]
fn overdriven_run_is_worse_and_has_both_kinds_of_dead_units() {
    let good = load("solder-joints.json");
    let over = load("solder-joints-overdriven.json");
    // Same architecture.
    let shape = |n: &Network| -> Vec<(usize, usize)> {
        n.layers().iter().map(|l| l.weights.dim()).collect()
    };
    assert_eq!(shape(&good), shape(&over));
    // Measured: 0.796 (398 of 500), against 0.980 for the well-trained run.
    let acc = accuracy(&over, "solder-joints-probe.csv");
    let acc_good = accuracy(&good, "solder-joints-probe.csv");
    assert!(
        acc >= 0.75,
        "over-driven accuracy {acc} (still well above chance 0.2)"
    );
    assert!(
        acc <= acc_good - 0.1,
        "over-driven {acc} vs good {acc_good}"
    );

    // Provably dead first-layer units by interval bounds (exact on the first layer:
    // b + sum max(w * low, w * high), Gowal et al. 2018). Measured: 9 of 32.
    let bounds = interval_bounds(&over);
    let proven_h1 = bounds.upper[0].iter().filter(|&&u| u <= 0.0).count();
    assert!(proven_h1 >= 8, "proven dead in h1: {proven_h1}");
    // The same count by hand, independent of the bounds module.
    let h1 = &over.layers()[0];
    let by_hand = h1
        .weights
        .rows()
        .into_iter()
        .zip(&h1.bias)
        .filter(|(w, b)| f64::from(**b) + w.iter().map(|&w| f64::from(w.abs())).sum::<f64>() <= 0.0)
        .count();
    assert_eq!(by_hand, proven_h1, "box [-1, 1]: max(w*low, w*high) = |w|");

    // Screening on the probe: more dead units than proven ones. Measured: h1 9 proven +
    // 15 dead on the probe only (24 of 32); h2 12 of 16 proven dead (interval bounds
    // through h1).
    let dead = dead_counts(&over, "solder-joints-probe.csv");
    assert_eq!(dead[0].0, proven_h1);
    assert!(dead[0].1 >= 10, "h1 dead on probe only: {:?}", dead[0]);
    assert!(dead[0].0 + dead[0].1 >= 20, "h1 dead: {:?}", dead[0]);
    assert!(dead[1].0 >= 10, "h2 dead: {:?}", dead[1]);
}

#[test]
fn overdriven_tensors_live_in_the_safetensors_file() {
    let text = std::fs::read_to_string(demo_dir().join("solder-joints-overdriven.json")).unwrap();
    let doc: serde_json::Value = serde_json::from_str(&text).unwrap();
    for layer in doc["layers"].as_array().unwrap() {
        for key in ["weights", "bias"] {
            assert_eq!(
                layer[key]["safetensors"], "solder-joints-overdriven.safetensors",
                "{key} of {}",
                layer["name"]
            );
        }
    }
    assert_eq!(doc["layers"][0]["weights"]["tensor"], "h1.weight");
    // The side file holds f32 tensors of the declared shapes (read with the safetensors
    // crate directly, not through our loader).
    let bytes = std::fs::read(demo_dir().join("solder-joints-overdriven.safetensors")).unwrap();
    let st = safetensors::SafeTensors::deserialize(&bytes).unwrap();
    let w = st.tensor("h1.weight").unwrap();
    assert_eq!(w.dtype(), safetensors::Dtype::F32);
    assert_eq!(w.shape(), [32, 144]);
    assert_eq!(st.tensor("out.bias").unwrap().shape(), [5]);
}

#[test]
fn cold_storage_takes_raw_units_and_is_accurate() {
    let net = load("cold-storage.json");
    assert!(
        net.layers()[..net.layers().len() - 1]
            .iter()
            .all(|l| l.activation == Activation::Tanh)
    );
    let names = net.input().names.clone().unwrap();
    assert_eq!(names.len(), 8);
    assert_eq!(names[0], "air_temp_c");
    // Per-feature box in physical units (not one shared range).
    assert_eq!(net.input().low[6], 300.0);
    assert_eq!(net.input().high[6], 3000.0);
    assert_eq!(net.input().high[2], 60.0);
    // The probe's header carries the feature names.
    let header = std::fs::read_to_string(demo_dir().join("cold-storage-probe.csv")).unwrap();
    let first = header.lines().next().unwrap();
    assert_eq!(first, format!("{},label", names.join(",")));
    // Measured: 0.990 (396 of 400); chance is 0.25.
    let acc = accuracy(&net, "cold-storage-probe.csv");
    assert!(acc >= 0.97, "cold-storage accuracy {acc}");
}

/// The committed files are exactly what the generator writes (bit for bit). The generator
/// uses fixed seeds and fixed-order sums; it relies on the platform's `exp`/`tanh`, so on
/// a machine with a different maths library this may differ even though nothing is wrong
/// with the models.
#[test]
fn generator_reproduces_the_bundled_files() {
    let dir = tempfile::tempdir().unwrap();
    make_demos::run(dir.path()).unwrap();
    let compared = compare_tree(dir.path(), &demo_dir());
    // 9 demo files, and the over-driven run's 12 checkpoints (JSON + safetensors each).
    assert_eq!(compared, 9 + 2 * RUN_CHECKPOINTS);
    // Nothing committed is missing from a fresh run.
    let mut committed = 0;
    count_files(&demo_dir(), &mut committed);
    assert_eq!(
        committed, compared,
        "demo-models holds files the generator does not make"
    );
}

/// Compares every file under `fresh` with the same path under `committed`, byte for byte
/// (folders recursively); returns the number of files compared.
fn compare_tree(fresh: &Path, committed: &Path) -> usize {
    let mut compared = 0;
    for entry in std::fs::read_dir(fresh).unwrap() {
        let fresh_path = entry.unwrap().path();
        let name = fresh_path.file_name().unwrap();
        if fresh_path.is_dir() {
            compared += compare_tree(&fresh_path, &committed.join(name));
            continue;
        }
        let old = std::fs::read(committed.join(name))
            .unwrap_or_else(|e| panic!("demo-models has no {name:?} from the generator: {e}"));
        let new = std::fs::read(&fresh_path).unwrap();
        assert!(new == old, "{name:?} differs from a fresh run");
        compared += 1;
    }
    compared
}

fn count_files(dir: &Path, n: &mut usize) {
    for entry in std::fs::read_dir(dir).unwrap() {
        let p = entry.unwrap().path();
        if p.is_dir() {
            count_files(&p, n);
        } else {
            *n += 1;
        }
    }
}

#[test]
fn solder_joints_cnn_is_a_trained_convolutional_network() {
    use receptor::model::LayerKind;
    let net = load("solder-joints-cnn.json");
    let text = std::fs::read_to_string(demo_dir().join("solder-joints-cnn.json")).unwrap();
    assert!(text.contains("\"schema\": \"receptor-model/2\""));
    assert_eq!(
        net.input().layout,
        model::Layout::Image {
            height: 16,
            width: 16,
            channels: 3
        }
    );
    assert_eq!((net.input().low[0], net.input().high[0]), (0.0, 1.0));
    let kinds: Vec<&str> = net.layers().iter().map(|l| l.kind.name()).collect();
    assert_eq!(
        kinds,
        [
            "conv2d",
            "max_pool2d",
            "conv2d",
            "max_pool2d",
            "flatten",
            "dense"
        ]
    );
    let LayerKind::Conv2d(c1) = net.layers()[0].kind else {
        panic!("conv1 is not a convolution")
    };
    assert_eq!((c1.in_channels, c1.kernel, c1.padding), (3, [3, 3], [1, 1]));
    assert_eq!(net.layers()[0].units(), 8);
    assert_eq!(net.layers()[2].units(), 16);
    // 16 channels x 4 x 4 after two 2 x 2 pools of a 16 x 16 map.
    assert_eq!(net.layers()[5].weights.dim(), (5, 256));
    // Measured: 0.973 (292 of 300) with the shared forward pass; chance is 0.2.
    let acc = accuracy(&net, "solder-joints-cnn-probe.csv");
    assert!(acc >= 0.95, "solder-joints-cnn accuracy {acc}");
    // The tensors live in the side file as f32, conv weights [out, in, kh, kw] (read with
    // the safetensors crate directly, not through our loader).
    let bytes = std::fs::read(demo_dir().join("solder-joints-cnn.safetensors")).unwrap();
    let st = safetensors::SafeTensors::deserialize(&bytes).unwrap();
    let w = st.tensor("conv2.weight").unwrap();
    assert_eq!(w.dtype(), safetensors::Dtype::F32);
    assert_eq!(w.shape(), [16, 8, 3, 3]);
    assert_eq!(st.tensor("out.weight").unwrap().shape(), [5, 256]);
}

/// The generator's own convolutional forward pass (patches and fixed-order products)
/// against the shared one in `analysis::forward` on the whole probe: two independent
/// implementations of the same network, equal within float32 rounding.
#[test]
fn cnn_trainer_forward_matches_shared_forward() {
    use make_demos::conv_train::{Cnn, ConvBlock, logits};
    let net = load("solder-joints-cnn.json");
    let (x, _) = probe_of(&net, "solder-joints-cnn-probe.csv");
    let l = net.layers();
    let block = |i: usize, name: &str| ConvBlock {
        name: name.into(),
        weights: l[i].weights.clone(),
        bias: l[i].bias.clone(),
        k: 3,
        pad: 1,
        pool: 2,
    };
    let cnn = Cnn {
        input: (16, 16, 3),
        blocks: vec![block(0, "conv1"), block(2, "conv2")],
        dense: l[5].weights.clone(),
        dense_bias: l[5].bias.clone(),
    };
    let ours = logits(&cnn, x.view());
    let trace = receptor::analysis::forward::forward_trace(&net, x.view(), 5);
    let shared = &trace.pre[5];
    assert_eq!(ours.dim(), shared.dim());
    let worst = ours
        .iter()
        .zip(shared.iter())
        .map(|(a, b)| (a - b).abs())
        .fold(0.0f32, f32::max);
    assert!(worst <= 1e-4, "largest logit difference {worst}");
}

/// Checkpoints of the over-driven training run saved in `demo-models/`.
const RUN_CHECKPOINTS: usize = make_demos::RUN_EPOCHS.len();

/// The over-driven run saved as a series: every checkpoint has a `"step"` and the
/// architecture of the final model, the steps increase, the last checkpoint holds exactly
/// the final model's tensors (read with the safetensors crate, not our loader), and units
/// die as training goes on (screened on the probe at the first and the last checkpoint).
#[test]
fn overdriven_run_is_saved_as_a_series_of_checkpoints() {
    use receptor::model::series::Series;
    let folder = demo_dir().join(make_demos::RUN_FOLDER);
    let series = Series::open(std::slice::from_ref(&folder)).unwrap();
    assert_eq!(series.len(), RUN_CHECKPOINTS);
    let keys = series.keys();
    assert_eq!(keys[0], 0, "the run starts at step 0 (the initialisation)");
    assert!(keys.windows(2).all(|w| w[0] < w[1]), "steps {keys:?}");
    // 5000 patches in batches of 64: 79 updates per epoch, 60 epochs.
    assert_eq!(*keys.last().unwrap(), 79 * 60);
    let final_model = load("solder-joints-overdriven.json");
    let last = series
        .load(RUN_CHECKPOINTS - 1, &LoadOptions::default())
        .unwrap();
    for (a, b) in last.layers().iter().zip(final_model.layers()) {
        assert_eq!(a.weights, b.weights, "layer {}", a.name);
        assert_eq!(a.bias, b.bias, "layer {}", a.name);
    }
    let last_side = series.checkpoints()[RUN_CHECKPOINTS - 1]
        .path
        .with_extension("safetensors");
    let bytes = std::fs::read(&last_side).unwrap();
    let st = safetensors::SafeTensors::deserialize(&bytes).unwrap();
    let final_bytes =
        std::fs::read(demo_dir().join("solder-joints-overdriven.safetensors")).unwrap();
    let fin = safetensors::SafeTensors::deserialize(&final_bytes).unwrap();
    for name in ["h1.weight", "h1.bias", "h2.weight", "out.weight"] {
        assert_eq!(
            st.tensor(name).unwrap().data(),
            fin.tensor(name).unwrap().data(),
            "{name}"
        );
    }
    // Units die during the run: none at the start (biases 0.2), many at the end.
    let first = series.load(0, &LoadOptions::default()).unwrap();
    let dead = |net: &Network| -> usize {
        let mut src = probe::open(&demo_dir().join("solder-joints-probe.csv"), net).unwrap();
        let report = screen(net, src.as_mut(), &ScreenOptions::default(), &Silent).unwrap();
        report
            .units
            .iter()
            .filter(|u| matches!(u.status, Status::DeadProven | Status::DeadOnProbe))
            .count()
    };
    let (d0, d_end) = (dead(&first), dead(&last));
    assert!(d0 <= 2, "dead at step 0: {d0}");
    assert!(d_end >= 30, "dead at the end: {d_end}");
    // The series stays small (the brief: well under 1 MB).
    let mut size = 0;
    for entry in std::fs::read_dir(&folder).unwrap() {
        size += entry.unwrap().metadata().unwrap().len();
    }
    assert!(size < 400_000, "the run takes {size} bytes");
}

//! Wall-time benchmarks of receptor's core on a 784-2048-2048-10 ReLU network: screening
//! 10 000 probe rows, `prefer --all` on the second hidden layer, loading the model from
//! inline JSON and from JSON + safetensors, and (for comparison) reading the safetensors
//! file's bytes. `screen_cnn` screens 10 000 rows on a convolutional network (32 x 32 x 3
//! input; conv 3x3 32, relu, max pool 2, conv 3x3 64, relu, max pool 2, flatten, dense 128,
//! relu, dense 10); `benches/torch_cnn_bench.py` does the same work in PyTorch (CPU) on the
//! same files (`cnn.json`, `cnn_probe.npy` in `RECEPTOR_BENCH_DIR`).
//!
//! Run with `cargo bench --bench core`. `benches/numpy_bench.py` does the same work in numpy
//! on the very same files; for a side-by-side run:
//!
//! ```text
//! RECEPTOR_BENCH_DIR=$HOME/receptor-bench RECEPTOR_BENCH_JSON=$HOME/receptor-bench/rust.json \
//!     cargo bench --bench core
//! python3 benches/numpy_bench.py $HOME/receptor-bench --rust $HOME/receptor-bench/rust.json
//! ```
//!
//! Environment:
//! - `RECEPTOR_BENCH_DIR`: folder for the network and probe files (kept, so the numpy script
//!   can read them); default a temporary folder that is removed at the end.
//! - `RECEPTOR_BENCH_JSON`: also write the measured numbers as JSON to this file.
//! - `RECEPTOR_BENCH_RUNS`: runs per measurement (default 5; `prefer` uses at most 3),
//!   the reported time is the median.
//! - `RECEPTOR_BENCH_PREFER_RESTARTS`: restarts for `prefer` (default 1, the box centre).
//! - `RECEPTOR_BENCH_ONLY`: comma-separated measurement names to run (default: all), e.g.
//!   `screen,prefer_all`, for interleaving runs with the numpy script on a busy machine.
//!   `app_layer` (with `app_first_tiles`) times the app's search of the whole layer h2 at
//!   the default settings, fed in the app's batches; it runs once, without a warm-up.
//!   `RECEPTOR_BENCH_APP_UNITS` limits it to the first N units (default: all 2048).
//!
//! Every file is written before anything is timed; loads read from the page cache after a
//! warm-up read, so "disk read" is the speed of reading a cached file, the fair baseline for
//! "loads at disk speed".

use ndarray::{Array1, Array2};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use receptor::analysis::{Silent, bounds, forward, prefer, screen};
use receptor::model::{self, Activation, InputSpec, Layer, Layout, LoadOptions, Network};
use receptor::probe;
use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::time::Instant;

mod common;
use common::{BenchResult, PROBE_ROWS, SEED, SIZES, build_network, write_npy};

/// Gradient-ascent steps for `prefer`.
const PREFER_STEPS: usize = 100;
/// Input of the benchmark CNN: height, width, channels.
const CNN_INPUT: [usize; 3] = [32, 32, 3];

/// The issue's benchmark CNN on a 32 x 32 x 3 input in [0, 1]: conv 3x3 32 relu, max pool
/// 2, conv 3x3 64 relu, max pool 2, flatten, dense 128 relu, dense 10 softmax; He-scaled
/// uniform weights as in [`build_network`].
fn build_cnn(rng: &mut ChaCha8Rng) -> BenchResult<Network> {
    let mut uniform = |shape: &[usize], fan_in: usize| -> Vec<f32> {
        let limit = (6.0 / fan_in as f64).sqrt() as f32;
        (0..shape.iter().product::<usize>())
            .map(|_| rng.random_range(-limit..limit))
            .collect()
    };
    let conv = |name: &str, out: usize, inp: usize, w: Vec<f32>| -> BenchResult<Layer> {
        Ok(Layer::conv2d(
            name,
            Activation::Relu,
            ndarray::Array4::from_shape_vec((out, inp, 3, 3), w)?,
            Array1::zeros(out),
            [1, 1],
            [0, 0],
            [1, 1],
        ))
    };
    let c1 = conv("c1", 32, 3, uniform(&[32, 3, 3, 3], 27))?;
    let c2 = conv("c2", 64, 32, uniform(&[64, 32, 3, 3], 288))?;
    // 32 -> conv 30 -> pool 15 -> conv 13 -> pool 6: 64 x 6 x 6 = 2304 values.
    let d1 = Layer::dense(
        "d1",
        Activation::Relu,
        Array2::from_shape_vec((128, 2304), uniform(&[128, 2304], 2304))?,
        Array1::zeros(128),
    );
    let mut out = Layer::dense(
        "out",
        Activation::Softmax,
        Array2::from_shape_vec((10, 128), uniform(&[10, 128], 128))?,
        Array1::zeros(10),
    );
    out.labels = None;
    let [h, w, c] = CNN_INPUT;
    let input = InputSpec {
        units: None,
        size: h * w * c,
        layout: Layout::Image {
            height: h,
            width: w,
            channels: c,
        },
        low: vec![0.0; h * w * c],
        high: vec![1.0; h * w * c],
        names: None,
    };
    let layers = vec![
        c1,
        Layer::max_pool2d("p1", [2, 2], [2, 2], [0, 0]),
        c2,
        Layer::max_pool2d("p2", [2, 2], [2, 2], [0, 0]),
        Layer::flatten("flat"),
        d1,
        out,
    ];
    Ok(Network::new(
        "benchmark cnn",
        "bench-cnn-32x32x3",
        input,
        layers,
    )?)
}

/// Writes the network as `model_st.json` plus `model.safetensors` (every weight and bias in
/// the side file, float32, `[units, inputs]`), with the `safetensors` crate.
fn write_safetensors_model(net: &Network, dir: &Path) -> BenchResult<()> {
    let mut blobs: Vec<(String, Vec<usize>, Vec<u8>)> = Vec::new();
    let mut layers_json = Vec::new();
    for l in net.layers() {
        let wname = format!("{}.weight", l.name);
        let bname = format!("{}.bias", l.name);
        let wbytes: Vec<u8> = l.weights.iter().flat_map(|v| v.to_le_bytes()).collect();
        let bbytes: Vec<u8> = l.bias.iter().flat_map(|v| v.to_le_bytes()).collect();
        blobs.push((wname.clone(), vec![l.units(), l.fan_in()], wbytes));
        blobs.push((bname.clone(), vec![l.units()], bbytes));
        layers_json.push(serde_json::json!({
            "name": l.name,
            "type": "dense",
            "activation": l.activation.name(),
            "weights": {"safetensors": "model.safetensors", "tensor": wname},
            "bias": {"safetensors": "model.safetensors", "tensor": bname},
        }));
    }
    let mut views = Vec::new();
    for (name, shape, bytes) in &blobs {
        views.push((
            name.clone(),
            safetensors::tensor::TensorView::new(safetensors::Dtype::F32, shape.clone(), bytes)?,
        ));
    }
    let st = safetensors::serialize(views, None)?;
    receptor::atomic::write_bytes_atomic(&dir.join("model.safetensors"), &st)?;
    let doc = serde_json::json!({
        "schema": "receptor-model/1",
        "name": net.name(),
        "input": {
            "size": net.input().size,
            "layout": {"kind": "image", "height": 28, "width": 28, "channels": 1},
            "low": 0.0,
            "high": 1.0
        },
        "layers": layers_json,
    });
    receptor::atomic::write_bytes_atomic(
        &dir.join("model_st.json"),
        serde_json::to_string_pretty(&doc)?.as_bytes(),
    )?;
    Ok(())
}

/// One measurement: the median (and the spread) of `runs` wall times in seconds.
struct Timing {
    name: &'static str,
    detail: String,
    runs: Vec<f64>,
}

impl Timing {
    fn median(&self) -> f64 {
        let mut v = self.runs.clone();
        v.sort_by(f64::total_cmp);
        let n = v.len();
        if n == 0 {
            f64::NAN
        } else if n % 2 == 1 {
            v[n / 2]
        } else {
            0.5 * (v[n / 2 - 1] + v[n / 2])
        }
    }
}

/// Runs `f` once untimed (warm caches, thread pools) and then `runs` times timed.
fn measure<T>(
    name: &'static str,
    detail: String,
    runs: usize,
    mut f: impl FnMut() -> BenchResult<T>,
) -> BenchResult<Timing> {
    if !wanted(name) {
        return Ok(Timing {
            name,
            detail,
            runs: Vec::new(),
        });
    }
    eprintln!("measuring {name} ({detail}) ...");
    std::hint::black_box(f()?);
    let mut times = Vec::with_capacity(runs);
    for _ in 0..runs {
        let t = Instant::now();
        let out = f()?;
        times.push(t.elapsed().as_secs_f64());
        std::hint::black_box(out);
    }
    Ok(Timing {
        name,
        detail,
        runs: times,
    })
}

/// False when `RECEPTOR_BENCH_ONLY` (a comma-separated list of measurement names) is set
/// and does not name `name`.
fn wanted(name: &str) -> bool {
    match std::env::var("RECEPTOR_BENCH_ONLY") {
        Ok(list) => list.split(',').any(|n| n.trim() == name),
        Err(_) => true,
    }
}

fn env_usize(key: &str, default: usize) -> BenchResult<usize> {
    match std::env::var(key) {
        Ok(v) => Ok(v
            .parse()
            .map_err(|e| format!("{key}={v}: not a whole number: {e}"))?),
        Err(_) => Ok(default),
    }
}

fn main() -> BenchResult<()> {
    let runs = env_usize("RECEPTOR_BENCH_RUNS", 5)?.max(1);
    let prefer_runs = runs.min(3);
    let restarts = env_usize("RECEPTOR_BENCH_PREFER_RESTARTS", 1)?.max(1);
    let _tmp;
    let dir: PathBuf = match std::env::var_os("RECEPTOR_BENCH_DIR") {
        Some(d) => {
            let d = PathBuf::from(d);
            std::fs::create_dir_all(&d)?;
            d
        }
        None => {
            let t = tempfile::tempdir()?;
            let p = t.path().to_path_buf();
            _tmp = t;
            p
        }
    };

    eprintln!(
        "building {SIZES:?} network and {PROBE_ROWS} probe rows in {}",
        dir.display()
    );
    let mut rng = ChaCha8Rng::seed_from_u64(SEED);
    let net = build_network(&mut rng)?;
    let probe_rows =
        Array2::from_shape_simple_fn((PROBE_ROWS, SIZES[0]), || rng.random_range(0.0f32..1.0));
    let inline = dir.join("model.json");
    model::write_json(&net, &inline)?;
    write_safetensors_model(&net, &dir)?;
    let probe_path = dir.join("probe.npy");
    write_npy(&probe_path, &probe_rows)?;
    let st_json = dir.join("model_st.json");
    let st_file = dir.join("model.safetensors");
    let inline_bytes = std::fs::metadata(&inline)?.len();
    let st_bytes = std::fs::metadata(&st_file)?.len();
    // Warm the page cache for every file so that all loads read from memory alike.
    for p in [&inline, &st_json, &st_file, &probe_path] {
        std::hint::black_box(std::fs::read(p)?);
    }

    let opts = LoadOptions::default();
    let mut timings = Vec::new();

    let t = measure(
        "load_json",
        format!("inline JSON, {:.1} MB", inline_bytes as f64 / 1e6),
        runs,
        || Ok(model::load(&inline, &opts)?),
    )?;
    // The loaded model must be the one written (shortest round-trip printing of f32).
    if model::load(&inline, &opts)?.layers() != net.layers() {
        return Err("inline JSON did not load back to the same weights".into());
    }
    timings.push(t);
    timings.push(measure(
        "load_safetensors",
        format!("JSON + safetensors, {:.1} MB", st_bytes as f64 / 1e6),
        runs,
        || Ok(model::load(&st_json, &opts)?),
    )?);
    if model::load(&st_json, &opts)?.layers() != net.layers() {
        return Err("JSON + safetensors did not load back to the same weights".into());
    }
    timings.push(measure(
        "read_safetensors_file",
        "std::fs::read of the .safetensors file (page cache)".into(),
        runs,
        || Ok(std::fs::read(&st_file)?.len()),
    )?);

    let screen_opts = screen::ScreenOptions::default();
    timings.push(measure(
        "screen",
        format!(
            "{PROBE_ROWS} rows from probe.npy, chunks of {}",
            screen_opts.chunk_rows()
        ),
        runs,
        || {
            let mut src = probe::open(&probe_path, &net)?;
            Ok(screen::screen(&net, src.as_mut(), &screen_opts, &Silent)?)
        },
    )?);

    // The two parts of `screen`, to see where its time goes.
    timings.push(measure(
        "screen_part_read_probe",
        "probe::open + read_all of probe.npy".into(),
        runs,
        || {
            let mut src = probe::open(&probe_path, &net)?;
            Ok(probe::read_all(src.as_mut())?.inputs.len())
        },
    )?);
    timings.push(measure(
        "screen_part_bounds",
        "analysis::bounds::interval_bounds of every layer".into(),
        runs,
        || Ok(bounds::interval_bounds(&net)),
    )?);
    let chunk = screen_opts.chunk_rows();
    timings.push(measure(
        "screen_part_forward",
        format!("forward_trace of the hidden layers, in-memory rows, chunks of {chunk}"),
        runs,
        || {
            let mut sum = 0.0f32;
            let mut start = 0;
            while start < PROBE_ROWS {
                let end = (start + chunk).min(PROBE_ROWS);
                let t = forward::forward_trace(
                    &net,
                    probe_rows.slice(ndarray::s![start..end, ..]),
                    SIZES.len() - 3,
                );
                sum += t.post.last().map_or(0.0, |a| a[[0, 0]]);
                start = end;
            }
            Ok(sum)
        },
    )?);

    // The convolutional network of the benchmark in its own files (cnn.json, cnn_probe.npy),
    // built only when asked for (the dense measurements do not pay for it).
    if wanted("screen_cnn") {
        let cnn = build_cnn(&mut ChaCha8Rng::seed_from_u64(SEED + 1))?;
        let mut crng = ChaCha8Rng::seed_from_u64(SEED + 2);
        let cnn_probe =
            Array2::from_shape_simple_fn((PROBE_ROWS, CNN_INPUT.iter().product()), || {
                crng.random_range(0.0f32..1.0)
            });
        let cnn_json = dir.join("cnn.json");
        let cnn_probe_path = dir.join("cnn_probe.npy");
        model::write_json(&cnn, &cnn_json)?;
        write_npy(&cnn_probe_path, &cnn_probe)?;
        drop(cnn_probe);
        let _ = std::fs::read(&cnn_probe_path)?;
        timings.push(measure(
            "screen_cnn",
            format!(
                "32x32x3 CNN (conv 3x3 32, pool 2, conv 3x3 64, pool 2, dense 128, 10), {PROBE_ROWS} rows from .npy, chunks of {}",
                screen_opts.chunk_rows()
            ),
            runs,
            || {
                let mut src = probe::open(&cnn_probe_path, &cnn)?;
                Ok(screen::screen(&cnn, src.as_mut(), &screen_opts, &Silent)?)
            },
        )?);
    }

    let units: Vec<usize> = (0..SIZES[2]).collect();
    let popts = prefer::PreferOptions::new(PREFER_STEPS, restarts, 0, 0.0, 0.0)?;
    let mut last: Vec<prefer::Preferred> = Vec::new();
    timings.push(measure(
        "prefer_all",
        format!(
            "layer h2, {} units, {PREFER_STEPS} steps, {restarts} restart(s)",
            units.len()
        ),
        prefer_runs,
        || {
            last = prefer::prefer(&net, 1, &units, &popts, &Silent)?;
            Ok(())
        },
    )?);
    // A summary of the result, to compare with the numpy run of the same algorithm.
    let finite = last.iter().all(|p| p.finite);
    let mean_z =
        last.iter().map(|p| f64::from(p.preactivation)).sum::<f64>() / last.len().max(1) as f64;
    let mean_steps = last.iter().map(|p| p.steps as f64).sum::<f64>() / last.len().max(1) as f64;

    // The app's preferred-input search of a whole deep layer at its default settings
    // (PreferOptions::default(); the bench model has no data file, so no data prior), as
    // the app feeds it: batches of 16, 32, 64, then 128 units, one after another. Timed
    // once (no warm-up: it is long); "app_first_tiles" is when the first batch is done.
    if wanted("app_layer") || wanted("app_first_tiles") {
        eprintln!("measuring the app's search of layer h2 at the default settings ...");
        let defaults = prefer::PreferOptions::default();
        let app_units = env_usize("RECEPTOR_BENCH_APP_UNITS", units.len())?.min(units.len());
        let units = &units[..app_units];
        let start = Instant::now();
        let mut first = None;
        let mut at = 0;
        let mut size = 16;
        while at < units.len() {
            let end = (at + size).min(units.len());
            std::hint::black_box(prefer::prefer(
                &net,
                1,
                &units[at..end],
                &defaults,
                &Silent,
            )?);
            first.get_or_insert_with(|| start.elapsed().as_secs_f64());
            at = end;
            size = (size * 2).min(128);
        }
        let total = start.elapsed().as_secs_f64();
        let detail = format!(
            "layer h2, {} units, app defaults ({} steps, {} restarts), batches 16..128",
            units.len(),
            defaults.steps(),
            defaults.restarts()
        );
        timings.push(Timing {
            name: "app_first_tiles",
            detail: format!("{detail}: first batch of 16"),
            runs: first.into_iter().collect(),
        });
        timings.push(Timing {
            name: "app_layer",
            detail,
            runs: vec![total],
        });
    }

    timings.retain(|t| !t.runs.is_empty());
    let threads = rayon::current_num_threads();
    println!();
    println!("receptor core benchmarks (median of runs; {threads} rayon threads)");
    println!(
        "{:<24} {:>10} {:>10} {:>10}  what",
        "measurement", "median s", "min s", "runs"
    );
    for t in &timings {
        let min = t.runs.iter().copied().fold(f64::INFINITY, f64::min);
        println!(
            "{:<24} {:>10.4} {:>10.4} {:>10}  {}",
            t.name,
            t.median(),
            min,
            t.runs.len(),
            t.detail
        );
    }
    if !last.is_empty() {
        println!(
            "prefer result: mean preactivation {mean_z:.4}, mean steps {mean_steps:.1}, all finite: {finite}"
        );
    }
    let read = timings.iter().find(|t| t.name == "read_safetensors_file");
    let load = timings.iter().find(|t| t.name == "load_safetensors");
    if let (Some(r), Some(l)) = (read, load) {
        println!(
            "safetensors load / raw read of the same file: {:.2} ({:.0} MB/s vs {:.0} MB/s)",
            l.median() / r.median(),
            st_bytes as f64 / 1e6 / l.median(),
            st_bytes as f64 / 1e6 / r.median()
        );
    }

    if let Some(out) = std::env::var_os("RECEPTOR_BENCH_JSON") {
        let mut results = serde_json::Map::new();
        for t in &timings {
            results.insert(
                t.name.to_string(),
                serde_json::json!({"median_s": t.median(), "runs_s": t.runs, "detail": t.detail}),
            );
        }
        let mut env = HashMap::new();
        env.insert("rayon_threads", threads.to_string());
        env.insert("prefer_restarts", restarts.to_string());
        let doc = serde_json::json!({
            "tool": "receptor benches/core.rs",
            "network": SIZES,
            "probe_rows": PROBE_ROWS,
            "prefer_steps": PREFER_STEPS,
            "inline_json_bytes": inline_bytes,
            "safetensors_bytes": st_bytes,
            "env": env,
            "prefer_mean_preactivation": mean_z,
            "prefer_mean_steps": mean_steps,
            "prefer_all_finite": finite,
            "results": results,
        });
        let text = serde_json::to_string_pretty(&doc)?;
        receptor::atomic::write_atomic(Path::new(&out), |w| {
            w.write_all(text.as_bytes())?;
            w.write_all(b"\n")
        })?;
        eprintln!("wrote {}", Path::new(&out).display());
    }
    Ok(())
}

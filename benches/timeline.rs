//! Benchmark of `receptor timeline`: a series of checkpoints of the 784-2048-2048-10 ReLU
//! benchmark network (JSON + safetensors side file each, with a `"step"`) and a 10 000-row
//! `.npy` probe are written to a folder, then the release binary runs
//! `receptor timeline DIR --probe probe.npy --per checkpoint --out ...` as a child process
//! under `/usr/bin/time -v`, which reports its wall time and peak resident memory (the
//! streaming claim: at most two checkpoints' weights held at once).
//!
//! Run with `cargo bench --bench timeline`. Environment:
//! - `RECEPTOR_BENCH_CHECKPOINTS`: checkpoints in the series (default 50);
//! - `RECEPTOR_BENCH_DIR`: folder for the files (kept); default a temporary folder;
//! - `RECEPTOR_BENCH_RUNS`: runs of the command (default 1; each is reported).
//!
//! The checkpoints are made from one network: checkpoint `t` scales every weight of unit `k`
//! by `1 + 0.01 t` and mixes in `0.002 t` times the row of unit `k + 1` (so the weights move
//! and turn), and pushes the bias of the first `8 t` units of `h1` to -1000 (provably dead
//! from step `t` on), so the tables have something to show.

use ndarray::Array2;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use receptor::model::{self, Network};
use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::Instant;

mod common;
use common::{BenchResult, PROBE_ROWS, SEED, SIZES, build_network, write_npy};

/// Training steps between two checkpoints of the series.
const STEP_EVERY: u64 = 100;

/// Checkpoint `t` of the series (see the module docs).
fn checkpoint(base: &Network, t: usize) -> BenchResult<Network> {
    let mut p = base.to_parts();
    let scale = 1.0 + 0.01 * t as f32;
    let mix = 0.002 * t as f32;
    for layer in &mut p.layers {
        let w = &layer.weights;
        let units = w.nrows();
        let moved = Array2::from_shape_fn(w.dim(), |(k, i)| {
            scale * w[[k, i]] + mix * w[[(k + 1) % units, i]]
        });
        layer.weights = moved;
    }
    for b in p.layers[0].bias.iter_mut().take(8 * t) {
        *b = -1000.0;
    }
    p.step = Some(t as u64 * STEP_EVERY);
    Ok(Network::from_parts(p, "benchmark checkpoint")?)
}

/// One `/usr/bin/time -v` report: wall seconds (measured here) and peak RSS in kB.
fn run_timed(dir: &Path, probe: &Path, out: &Path) -> BenchResult<(f64, Option<u64>)> {
    let bin = env!("CARGO_BIN_EXE_receptor");
    let timer = Path::new("/usr/bin/time");
    let args = [
        "timeline".to_string(),
        dir.display().to_string(),
        "--probe".into(),
        probe.display().to_string(),
        "--per".into(),
        "checkpoint".into(),
        "--out".into(),
        out.display().to_string(),
    ];
    let start = Instant::now();
    let output = if timer.exists() {
        Command::new(timer)
            .arg("-v")
            .arg(bin)
            .args(&args)
            .output()?
    } else {
        eprintln!("no /usr/bin/time: wall time only");
        Command::new(bin).args(&args).output()?
    };
    let wall = start.elapsed().as_secs_f64();
    let stderr = String::from_utf8_lossy(&output.stderr);
    if !output.status.success() {
        return Err(format!("receptor timeline failed: {stderr}").into());
    }
    let rss = stderr
        .lines()
        .find_map(|l| l.trim().strip_prefix("Maximum resident set size (kbytes):"))
        .and_then(|v| v.trim().parse::<u64>().ok());
    Ok((wall, rss))
}

fn main() -> BenchResult<()> {
    let count = match std::env::var("RECEPTOR_BENCH_CHECKPOINTS") {
        Ok(v) => v.parse::<usize>()?.max(1),
        Err(_) => 50,
    };
    let runs = match std::env::var("RECEPTOR_BENCH_RUNS") {
        Ok(v) => v.parse::<usize>()?.max(1),
        Err(_) => 1,
    };
    let _tmp;
    let dir: PathBuf = match std::env::var_os("RECEPTOR_BENCH_DIR") {
        Some(d) => PathBuf::from(d),
        None => {
            let t = tempfile::tempdir()?;
            let p = t.path().to_path_buf();
            _tmp = t;
            p
        }
    };
    let series = dir.join("series");
    std::fs::create_dir_all(&series)?;
    eprintln!(
        "writing {count} checkpoints of the {SIZES:?} network and {PROBE_ROWS} probe rows in {}",
        dir.display()
    );
    let mut rng = ChaCha8Rng::seed_from_u64(SEED);
    let base = build_network(&mut rng)?;
    let probe_rows =
        Array2::from_shape_simple_fn((PROBE_ROWS, SIZES[0]), || rng.random_range(0.0f32..1.0));
    let probe = dir.join("probe.npy");
    write_npy(&probe, &probe_rows)?;
    drop(probe_rows);
    let mut bytes = 0u64;
    for t in 0..count {
        let net = checkpoint(&base, t)?;
        let json = series.join(format!("ckpt-{t}.json"));
        let side = series.join(format!("ckpt-{t}.safetensors"));
        model::write_json_with_tensors(&net, &json, &side)?;
        bytes += std::fs::metadata(&json)?.len() + std::fs::metadata(&side)?.len();
    }
    drop(base);
    let one = bytes as f64 / count as f64 / 1e6;
    eprintln!(
        "{count} checkpoints, {one:.1} MB each, {:.0} MB in all",
        bytes as f64 / 1e6
    );
    let out = dir.join("timeline.csv");
    for run in 0..runs {
        let (wall, rss) = run_timed(&series, &probe, &out)?;
        let rss_text = rss.map_or_else(
            || "unknown".to_string(),
            |kb| format!("{:.0} MB", kb as f64 / 1024.0),
        );
        println!(
            "timeline run {}: {count} checkpoints x {PROBE_ROWS} rows: {wall:.1} s wall, peak RSS {rss_text} (one checkpoint: {one:.1} MB on disk)",
            run + 1
        );
    }
    let rows = std::fs::read_to_string(&out)?.lines().count();
    println!("per-checkpoint table: {} rows", rows.saturating_sub(1));
    Ok(())
}

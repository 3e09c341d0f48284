//! Fuzz target: the probe readers (CSV and .npy, chosen by the first byte) must read or
//! refuse any bytes, never panic and never allocate from a declared size.
#![no_main]

use libfuzzer_sys::fuzz_target;
use receptor::model::{LoadOptions, from_json_str};
use receptor::Network;
use std::path::Path;
use std::sync::OnceLock;

const MODEL: &str = r#"{"schema": "receptor-model/1", "name": "fuzz",
  "input": {"size": 3},
  "layers": [{"name": "h1", "type": "dense", "activation": "relu",
              "weights": [[1, 0, 0], [0, 1, 0]], "bias": [0, 0]},
             {"name": "out", "type": "dense", "activation": "softmax",
              "weights": [[1, 2], [2, 1]], "bias": [0, 0], "labels": ["a", "b"]}]}"#;

fn setup() -> &'static (tempfile::TempDir, Network) {
    static S: OnceLock<(tempfile::TempDir, Network)> = OnceLock::new();
    S.get_or_init(|| {
        let d = tempfile::Builder::new().prefix("receptor-fuzz").tempdir_in("/dev/shm").or_else(|_| tempfile::tempdir()).unwrap();
        let net = from_json_str(MODEL, "fuzz.json", Path::new("."), &LoadOptions::default()).unwrap();
        (d, net)
    })
}

fuzz_target!(|data: &[u8]| {
    let Some((&kind, rest)) = data.split_first() else { return };
    let (dir, net) = setup();
    let path = dir.path().join(if kind & 1 == 0 { "p.csv" } else { "p.npy" });
    if std::fs::write(&path, rest).is_err() {
        return;
    }
    if let Ok(mut src) = receptor::probe::open(&path, net) {
        let mut rows = 0usize;
        while let Ok(Some(chunk)) = src.next_chunk(7) {
            rows += chunk.inputs.nrows();
            if rows > 1_000_000 {
                break;
            }
        }
    }
});

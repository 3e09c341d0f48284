//! Fuzz target: a model whose weights and bias live in a safetensors side file made of the
//! fuzzer's bytes. The reader must bounds-check the header and refuse lies, never panic.
#![no_main]

use libfuzzer_sys::fuzz_target;
use receptor::model::{LoadOptions, load};
use std::sync::OnceLock;

const MODEL: &str = r#"{"schema": "receptor-model/1", "name": "fuzz",
  "input": {"size": 4},
  "layers": [{"name": "h1", "type": "dense", "activation": "relu",
              "weights": {"safetensors": "w.safetensors", "tensor": "h1.weight"},
              "bias": {"safetensors": "w.safetensors", "tensor": "h1.bias"}},
             {"name": "out", "type": "dense", "activation": "softmax",
              "weights": [[1, 2, 3], [3, 2, 1]], "bias": [0, 0]}]}"#;

fn dir() -> &'static tempfile::TempDir {
    static DIR: OnceLock<tempfile::TempDir> = OnceLock::new();
    DIR.get_or_init(|| {
        let d = tempfile::Builder::new().prefix("receptor-fuzz").tempdir_in("/dev/shm").or_else(|_| tempfile::tempdir()).unwrap();
        std::fs::write(d.path().join("m.json"), MODEL).unwrap();
        d
    })
}

fuzz_target!(|data: &[u8]| {
    let d = dir();
    if std::fs::write(d.path().join("w.safetensors"), data).is_ok() {
        let _ = load(&d.path().join("m.json"), &LoadOptions::default());
    }
});

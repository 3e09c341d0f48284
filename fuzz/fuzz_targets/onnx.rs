//! Fuzz target: the ONNX reader must load or refuse any bytes, never panic, and never
//! allocate from a declared size before checking it against the data.
#![no_main]

use libfuzzer_sys::fuzz_target;
use receptor::model::{LoadOptions, onnx};
use std::path::Path;

fuzz_target!(|data: &[u8]| {
    let _ = onnx::from_bytes(data, "fuzz.onnx", Path::new("fuzz-no-such-folder"), &LoadOptions::default());
});

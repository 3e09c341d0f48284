//! Fuzz target: the JSON model importer must load or refuse any bytes, never panic.
#![no_main]

use libfuzzer_sys::fuzz_target;
use receptor::model::{LoadOptions, from_json_bytes};
use std::path::Path;

fuzz_target!(|data: &[u8]| {
    let _ = from_json_bytes(data, "fuzz.json", Path::new("fuzz-no-such-folder"), &LoadOptions::default());
});

//! Property tests (proptest): valid models mutated at random either load or give an error
//! naming the file; the importer never panics. Complements the fuzz targets in `fuzz/`.

use proptest::prelude::*;
use receptor::model::{LoadOptions, from_json_bytes};
use std::path::Path;

const BASE: &str = include_str!("bad-inputs/good-model.json");

fn check(bytes: &[u8]) {
    match from_json_bytes(
        bytes,
        "mutant.json",
        Path::new("."),
        &LoadOptions::default(),
    ) {
        Ok(net) => {
            // A model that loads is fully valid: re-validating its parts cannot fail.
            receptor::Network::from_parts(net.into_parts(), "mutant.json").unwrap();
        }
        Err(e) => {
            let msg = e.to_string();
            assert!(
                msg.starts_with("mutant.json: "),
                "message does not name the file: {msg}"
            );
        }
    }
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 2000, ..ProptestConfig::default() })]

    #[test]
    fn byte_flips_never_panic(flips in proptest::collection::vec((0usize..4096, any::<u8>()), 1..8)) {
        let mut b = BASE.as_bytes().to_vec();
        for (at, v) in flips {
            let i = at % b.len();
            b[i] = v;
        }
        check(&b);
    }

    #[test]
    fn truncations_never_panic(cut in 0usize..4096) {
        let b = BASE.as_bytes();
        check(&b[..cut % b.len()]);
    }

    #[test]
    fn spliced_tokens_never_panic(at in 0usize..4096, token in prop::sample::select(vec![
        "NaN", "1e39", "-1e400", "null", "[]", "[[]]", "{}", "\"x\"", "true", "0", "-0",
        "18446744073709551616", "1e-50", ",", "]", "}", "[[1,2],[3]]", "{\"safetensors\":\"../a\",\"tensor\":\"t\"}",
    ])) {
        let b = BASE.as_bytes();
        let i = at % b.len();
        let mut m = b[..i].to_vec();
        m.extend_from_slice(token.as_bytes());
        m.extend_from_slice(&b[i..]);
        check(&m);
    }

    #[test]
    fn numeric_values_replaced_never_panic(which in 0usize..64, v in prop::num::f64::ANY) {
        let mut value: serde_json::Value = serde_json::from_str(BASE).unwrap();
        let mut count = 0usize;
        replace_nth_number(&mut value, which, v, &mut count);
        let text = serde_json::to_string(&value).unwrap_or_default();
        check(text.as_bytes());
    }
}

fn replace_nth_number(v: &mut serde_json::Value, n: usize, x: f64, seen: &mut usize) {
    match v {
        serde_json::Value::Number(_) => {
            if *seen == n {
                *v = serde_json::Number::from_f64(x)
                    .map_or(serde_json::Value::Null, serde_json::Value::Number);
            }
            *seen += 1;
        }
        serde_json::Value::Array(a) => a.iter_mut().for_each(|e| replace_nth_number(e, n, x, seen)),
        serde_json::Value::Object(o) => o
            .values_mut()
            .for_each(|e| replace_nth_number(e, n, x, seen)),
        _ => {}
    }
}

//! End-to-end tests of the `receptor` command line: the real binary on small model and probe
//! files written into a temporary folder. Expected values are worked out by hand in the
//! comments (closed forms of tiny networks), never taken from receptor itself.

use approx::assert_abs_diff_eq;
use std::path::{Path, PathBuf};
use std::process::Command;

/// Output of one run of the binary.
struct Run {
    code: i32,
    stdout: String,
    stderr: String,
}

fn receptor(args: &[&str], dir: &Path) -> Run {
    let out = Command::new(env!("CARGO_BIN_EXE_receptor"))
        .args(args)
        .current_dir(dir)
        .output()
        .expect("the receptor binary runs");
    Run {
        code: out.status.code().unwrap_or(-1),
        stdout: String::from_utf8_lossy(&out.stdout).into_owned(),
        stderr: String::from_utf8_lossy(&out.stderr).into_owned(),
    }
}

/// Asserts a clean bad-input failure: exit 2, one `receptor: ` line naming `needle`, no panic.
fn assert_bad_input(r: &Run, needles: &[&str]) {
    assert_eq!(r.code, 2, "stdout: {}\nstderr: {}", r.stdout, r.stderr);
    assert!(!r.stderr.contains("panicked"), "{}", r.stderr);
    assert!(r.stderr.starts_with("receptor: "), "{}", r.stderr);
    assert_eq!(r.stderr.trim_end().lines().count(), 1, "{}", r.stderr);
    for n in needles {
        assert!(r.stderr.contains(n), "want {n:?} in: {}", r.stderr);
    }
}

fn write(dir: &Path, name: &str, text: impl AsRef<[u8]>) -> PathBuf {
    let p = dir.join(name);
    std::fs::write(&p, text).unwrap();
    p
}

/// A 2-input identity network with bias: out = x + b, b = (0, 0.5), labels "a", "b".
const IDENTITY: &str = r#"{"schema": "receptor-model/1", "name": "identity",
  "input": {"size": 2, "low": -1, "high": 1},
  "layers": [{"name": "out", "type": "dense", "activation": "identity",
              "weights": [[1, 0], [0, 1]], "bias": [0, 0.5], "labels": ["a", "b"]}]}"#;

/// A 4-5-2 relu/softmax network on the box [0, 1]^4, built so that every hidden unit has a
/// closed-form pre-activation:
///   u0: z = x0          (upper bound 1)
///   u1: z = -1          (provably dead: upper bound -1)
///   u2: z = 0.5 - x0 - x1 (upper bound 0.5, at x0 = x1 = 0)
///   u3: z = 0.1 + x3    (always active; upper bound 1.1)
///   u4: z = x2          (upper bound 1; dead on a probe whose x2 is always 0)
/// out: z_no = h0, z_yes = 0.1 + 2 h2, softmax, labels "no", "yes".
const NET: &str = r#"{"schema": "receptor-model/1", "name": "tiny",
  "input": {"size": 4, "low": 0, "high": 1},
  "layers": [
    {"name": "h", "type": "dense", "activation": "relu",
     "weights": [[1, 0, 0, 0], [0, 0, 0, 0], [-1, -1, 0, 0], [0, 0, 0, 1], [0, 0, 1, 0]],
     "bias": [0, -1, 0.5, 0.1, 0]},
    {"name": "out", "type": "dense", "activation": "softmax",
     "weights": [[1, 0, 0, 0, 0], [0, 0, 2, 0, 0]], "bias": [0, 0.1],
     "labels": ["no", "yes"]}]}"#;

/// Four probe rows for NET, with labels (the last by index).
const NET_PROBE: &str = "x0,x1,x2,x3,label\n1,0,0,0,no\n0,0,0,0,yes\n0.9,0,0,0,no\n0,0.2,0,0,1\n";

/// Parses CSV output without quoted fields into (header, rows).
fn csv(text: &str) -> (Vec<String>, Vec<Vec<String>>) {
    let mut lines = text.lines();
    let header = lines
        .next()
        .expect("a header line")
        .split(',')
        .map(String::from)
        .collect();
    let rows = lines
        .map(|l| l.split(',').map(String::from).collect())
        .collect();
    (header, rows)
}

fn num(s: &str) -> f64 {
    s.parse::<f64>()
        .unwrap_or_else(|_| panic!("{s:?} is not a number"))
}

fn json(text: &str) -> serde_json::Value {
    serde_json::from_str(text).unwrap_or_else(|e| panic!("invalid JSON ({e}): {text}"))
}

fn tmp_entries(dir: &Path) -> Vec<String> {
    std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|n| n.ends_with(".tmp"))
        .collect()
}

#[test]
fn forward_identity_csv_and_json() {
    let d = tempfile::tempdir().unwrap();
    write(d.path(), "id.json", IDENTITY);
    write(d.path(), "p.csv", "p,q\n0.1,0.2\n0.3,-0.7\n");
    // out = x + (0, 0.5): row 0 -> (0.1, 0.7), "b" wins; row 1 -> (0.3, -0.2), "a" wins.
    let r = receptor(&["forward", "id.json", "--probe", "p.csv"], d.path());
    assert_eq!(r.code, 0, "{}", r.stderr);
    let (h, rows) = csv(&r.stdout);
    assert_eq!(h, ["row", "a", "b", "predicted"]);
    assert_eq!(rows.len(), 2);
    assert_eq!(rows[0][0], "0");
    assert_abs_diff_eq!(num(&rows[0][1]), 0.1, epsilon = 1e-6);
    assert_abs_diff_eq!(num(&rows[0][2]), 0.7, epsilon = 1e-6);
    assert_eq!(rows[0][3], "b");
    assert_eq!(rows[1][0], "1");
    assert_abs_diff_eq!(num(&rows[1][2]), -0.2, epsilon = 1e-6);
    assert_eq!(rows[1][3], "a");
    // f32 values print as the shortest f32 round trip: 0.1 stays "0.1".
    assert_eq!(rows[0][1], "0.1");

    let r = receptor(
        &["forward", "id.json", "--probe", "p.csv", "--format", "json"],
        d.path(),
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let v = json(&r.stdout);
    let rows = v["rows"].as_array().unwrap();
    assert_eq!(rows.len(), 2);
    assert_eq!(rows[0]["row"], 0);
    assert_abs_diff_eq!(rows[0]["a"].as_f64().unwrap(), 0.1, epsilon = 1e-6);
    assert_abs_diff_eq!(rows[0]["b"].as_f64().unwrap(), 0.7, epsilon = 1e-6);
    assert_eq!(rows[0]["predicted"], "b");
    assert_eq!(rows[1]["predicted"], "a");
    assert!(r.stdout.contains("\"a\":0.1,"), "{}", r.stdout);
}

#[test]
fn forward_softmax_net_matches_closed_form() {
    let d = tempfile::tempdir().unwrap();
    write(d.path(), "net.json", NET);
    write(d.path(), "p.csv", NET_PROBE);
    // Hidden activations per row (see NET): h = (x0, 0, relu(0.5 - x0 - x1), 0.1, x2), then
    // z = (h0, 0.1 + 2 h2). Softmax of two values: p_no = 1 / (1 + exp(z_yes - z_no)),
    // evaluated with Python 3's math.exp:
    //   row 0 z = (1, 0.1)   -> p_no 0.7109495026250039
    //   row 1 z = (0, 1.1)   -> p_no 0.24973989440488234
    //   row 2 z = (0.9, 0.1) -> p_no 0.6899744811276125
    //   row 3 z = (0, 0.7)   -> p_no 0.3318122278318339
    let want = [
        (0.710_949_502_625_003_9, "no"),
        (0.249_739_894_404_882_34, "yes"),
        (0.689_974_481_127_612_5, "no"),
        (0.331_812_227_831_833_9, "yes"),
    ];
    let r = receptor(&["forward", "net.json", "--probe", "p.csv"], d.path());
    assert_eq!(r.code, 0, "{}", r.stderr);
    let (h, rows) = csv(&r.stdout);
    assert_eq!(h, ["row", "no", "yes", "predicted"]);
    assert_eq!(rows.len(), 4);
    for (row, (p_no, label)) in rows.iter().zip(want) {
        assert_abs_diff_eq!(num(&row[1]), p_no, epsilon = 1e-6);
        assert_abs_diff_eq!(num(&row[2]), 1.0 - p_no, epsilon = 1e-6);
        assert_eq!(row[3], label);
    }
}

#[test]
fn forward_npy_probe_matches_csv() {
    // A C-order little-endian float32 .npy written by hand following NEP 1 (magic, version
    // 1.0, u16 header length, dict padded to a 64-byte boundary): rows (0.1, 0.2), (0.3, -0.7).
    let d = tempfile::tempdir().unwrap();
    write(d.path(), "id.json", IDENTITY);
    let mut header = b"{'descr': '<f4', 'fortran_order': False, 'shape': (2, 2), }".to_vec();
    while !(10 + header.len() + 1).is_multiple_of(64) {
        header.push(b' ');
    }
    header.push(b'\n');
    let mut bytes = b"\x93NUMPY\x01\x00".to_vec();
    bytes.extend_from_slice(&(header.len() as u16).to_le_bytes());
    bytes.extend_from_slice(&header);
    for v in [0.1f32, 0.2, 0.3, -0.7] {
        bytes.extend_from_slice(&v.to_le_bytes());
    }
    write(d.path(), "p.NPY", &bytes);
    write(d.path(), "p.csv", "0.1,0.2\n0.3,-0.7\n");
    let a = receptor(&["forward", "id.json", "--probe", "p.NPY"], d.path());
    let b = receptor(&["forward", "id.json", "--probe", "p.csv"], d.path());
    assert_eq!(a.code, 0, "{}", a.stderr);
    assert_eq!(b.code, 0, "{}", b.stderr);
    assert_eq!(a.stdout, b.stdout);
    assert_eq!(csv(&a.stdout).1.len(), 2);
}

#[test]
fn non_finite_outputs_stay_valid_csv_and_json() {
    // 3e38 + 3e38 exceeds f32's largest value 3.4028235e38 (IEEE 754 binary32), so the
    // output overflows to +inf: CSV writes "inf", JSON null, and no output can be predicted.
    let d = tempfile::tempdir().unwrap();
    write(
        d.path(),
        "big.json",
        r#"{"schema": "receptor-model/1", "name": "big", "input": {"size": 2},
        "layers": [{"name": "out", "type": "dense", "activation": "identity",
                    "weights": [[3e38, 3e38]], "bias": [0]}]}"#,
    );
    write(d.path(), "p.csv", "1,1\n");
    let r = receptor(&["forward", "big.json", "--probe", "p.csv"], d.path());
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert_eq!(r.stdout, "row,out0,predicted\n0,inf,\n");
    let r = receptor(
        &[
            "forward", "big.json", "--probe", "p.csv", "--format", "json",
        ],
        d.path(),
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let v = json(&r.stdout);
    assert!(v["rows"][0]["out0"].is_null());
    assert!(v["rows"][0]["predicted"].is_null());
}

#[test]
fn stats_csv_and_json_against_hand_computed_values() {
    let d = tempfile::tempdir().unwrap();
    write(d.path(), "net.json", NET);
    // Layer h (largest |w| = 1, so the default tol is 0.01):
    //   u0 w = (1,0,0,0): l1 1, l2 1, near zero 3/4, Hoyer of a one-hot vector 1 (Hoyer
    //      2004), Gini of a one-hot vector 1 - 1/n = 0.75 (Hurley & Rickard 2009).
    //   u1 w = 0: all-zero unit gets 1 and 1 by the contract; near zero 1.
    //   u2 w = (-1,-1,0,0): l1 2, l2 sqrt 2, Hoyer (sqrt 4 - 2/sqrt 2)/(sqrt 4 - 1)
    //      = 2 - sqrt 2; Gini with sorted |w| (0,0,1,1): 1 - 2 [(1/2)(1.5/4) + (1/2)(0.5/4)]
    //      = 0.5; near zero 1/2.
    // Layer out (largest |w| = 2, tol 0.02): both rows one-hot of length 5: Hoyer 1,
    //   Gini 0.8, near zero 4/5.
    let sqrt2 = std::f64::consts::SQRT_2;
    // (layer, unit, fan_in, l1, l2, max_abs, near_zero_frac, hoyer, gini, bias)
    type Row = (
        &'static str,
        usize,
        usize,
        f64,
        f64,
        f64,
        f64,
        f64,
        f64,
        f64,
    );
    let want: [Row; 7] = [
        ("h", 0, 4, 1.0, 1.0, 1.0, 0.75, 1.0, 0.75, 0.0),
        ("h", 1, 4, 0.0, 0.0, 0.0, 1.0, 1.0, 1.0, -1.0),
        ("h", 2, 4, 2.0, sqrt2, 1.0, 0.5, 2.0 - sqrt2, 0.5, 0.5),
        ("h", 3, 4, 1.0, 1.0, 1.0, 0.75, 1.0, 0.75, 0.1),
        ("h", 4, 4, 1.0, 1.0, 1.0, 0.75, 1.0, 0.75, 0.0),
        ("out", 0, 5, 1.0, 1.0, 1.0, 0.8, 1.0, 0.8, 0.0),
        ("out", 1, 5, 2.0, 2.0, 2.0, 0.8, 1.0, 0.8, 0.1),
    ];
    let r = receptor(&["stats", "net.json"], d.path());
    assert_eq!(r.code, 0, "{}", r.stderr);
    let (h, rows) = csv(&r.stdout);
    assert_eq!(
        h,
        [
            "layer",
            "unit",
            "fan_in",
            "l1",
            "l2",
            "max_abs",
            "near_zero_frac",
            "hoyer",
            "gini",
            "bias"
        ]
    );
    assert_eq!(rows.len(), want.len());
    for (row, w) in rows.iter().zip(want) {
        assert_eq!(row[0], w.0);
        assert_eq!(num(&row[1]) as usize, w.1);
        assert_eq!(num(&row[2]) as usize, w.2);
        for (k, v) in [w.3, w.4, w.5, w.6, w.7, w.8, w.9].into_iter().enumerate() {
            assert_abs_diff_eq!(num(&row[3 + k]), v, epsilon = 1e-6);
        }
    }
    // The f32 bias 0.1 prints as "0.1" (its shortest f32 form), not as its f64 widening.
    assert_eq!(rows[3][9], "0.1");

    let r = receptor(&["stats", "net.json", "--format", "json"], d.path());
    assert_eq!(r.code, 0, "{}", r.stderr);
    let v = json(&r.stdout);
    assert_eq!(v["rows"].as_array().unwrap().len(), 7);
    assert_abs_diff_eq!(
        v["rows"][2]["hoyer"].as_f64().unwrap(),
        2.0 - sqrt2,
        epsilon = 1e-12
    );
    let layers = v["layers"].as_array().unwrap();
    assert_eq!(layers.len(), 2);
    assert_eq!(layers[0]["layer"], "h");
    assert_eq!(layers[0]["units"], 5);
    assert_abs_diff_eq!(
        layers[0]["zero_tol"].as_f64().unwrap(),
        0.01,
        epsilon = 1e-12
    );
    assert_abs_diff_eq!(
        layers[1]["zero_tol"].as_f64().unwrap(),
        0.02,
        epsilon = 1e-12
    );
    // 15 of h's 20 weights are zero (3 + 4 + 2 + 3 + 3 per unit).
    assert_abs_diff_eq!(
        layers[0]["near_zero_frac"].as_f64().unwrap(),
        15.0 / 20.0,
        epsilon = 1e-12
    );

    // An absolute tolerance of 1.5 counts out-row 0's weight 1 as near zero too: 5 of 5.
    let r = receptor(&["stats", "net.json", "--zero-tol", "1.5"], d.path());
    assert_eq!(r.code, 0, "{}", r.stderr);
    let (_, rows) = csv(&r.stdout);
    assert_abs_diff_eq!(num(&rows[5][6]), 1.0, epsilon = 1e-12);
    assert_abs_diff_eq!(num(&rows[6][6]), 0.8, epsilon = 1e-12);

    let r = receptor(&["stats", "net.json", "--zero-tol", "-1"], d.path());
    assert_bad_input(&r, &["--zero-tol"]);
}

#[test]
fn prefer_reaches_the_first_layer_closed_form() {
    let d = tempfile::tempdir().unwrap();
    write(d.path(), "net.json", NET);
    // First-layer optimum over the box [0, 1]: b + sum_i max(w_i low_i, w_i high_i):
    //   u0: 1, u1: -1, u2: 0.5 (at x0 = x1 = 0), u3: 0.1 + 1 = 1.1 (at x3 = 1), u4: 1 (x2 = 1).
    let want = [1.0, -1.0, 0.5, 1.1, 1.0];
    let r = receptor(&["prefer", "net.json", "--layer", "h", "--all"], d.path());
    assert_eq!(r.code, 0, "{}", r.stderr);
    let (h, rows) = csv(&r.stdout);
    assert_eq!(
        h,
        [
            "layer",
            "unit",
            "preactivation",
            "activation",
            "steps",
            "x0",
            "x1",
            "x2",
            "x3"
        ]
    );
    assert_eq!(rows.len(), 5);
    for (k, row) in rows.iter().enumerate() {
        assert_eq!(row[0], "h");
        assert_eq!(num(&row[1]) as usize, k);
        assert_abs_diff_eq!(num(&row[2]), want[k], epsilon = 1e-5);
        // relu activation at the optimum
        assert_abs_diff_eq!(num(&row[3]), want[k].max(0.0), epsilon = 1e-5);
        for x in &row[5..] {
            let x = num(x);
            assert!((0.0..=1.0).contains(&x), "outside the box: {x}");
        }
    }
    // The maximisers where they are unique.
    assert_abs_diff_eq!(num(&rows[0][5]), 1.0, epsilon = 1e-6);
    assert_abs_diff_eq!(num(&rows[2][5]), 0.0, epsilon = 1e-6);
    assert_abs_diff_eq!(num(&rows[2][6]), 0.0, epsilon = 1e-6);
    assert_abs_diff_eq!(num(&rows[3][8]), 1.0, epsilon = 1e-6);

    let r = receptor(
        &[
            "prefer", "net.json", "--layer", "h", "--unit", "3", "--format", "json", "--seed", "5",
        ],
        d.path(),
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let v = json(&r.stdout);
    let rows = v["rows"].as_array().unwrap();
    assert_eq!(rows.len(), 1);
    assert_eq!(rows[0]["unit"], 3);
    assert_abs_diff_eq!(
        rows[0]["preactivation"].as_f64().unwrap(),
        1.1,
        epsilon = 1e-5
    );
    let input = rows[0]["input"].as_array().unwrap();
    assert_eq!(input.len(), 4);
    assert_abs_diff_eq!(input[3].as_f64().unwrap(), 1.0, epsilon = 1e-6);
    assert!(rows[0].get("x0").is_none());
    assert_eq!(v["seed"], 5);
}

#[test]
fn prefer_usage_errors_exit_2() {
    let d = tempfile::tempdir().unwrap();
    write(d.path(), "net.json", NET);
    // --unit with --all is refused by the argument parser (exit 2, clap's message).
    let r = receptor(
        &["prefer", "net.json", "--layer", "h", "--unit", "1", "--all"],
        d.path(),
    );
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(r.stderr.contains("--all"), "{}", r.stderr);
    // Neither is refused too.
    let r = receptor(&["prefer", "net.json", "--layer", "h"], d.path());
    assert_eq!(r.code, 2, "{}", r.stderr);
    let r = receptor(
        &["prefer", "net.json", "--layer", "nope", "--all"],
        d.path(),
    );
    assert_bad_input(&r, &["no layer 'nope'", "h, out"]);
    let r = receptor(
        &["prefer", "net.json", "--layer", "h", "--unit", "5"],
        d.path(),
    );
    assert_bad_input(&r, &["layer 'h' has 5 units", "no unit 5"]);
    let r = receptor(
        &["prefer", "net.json", "--layer", "h", "--all", "--tv", "0.1"],
        d.path(),
    );
    assert_bad_input(&r, &["--tv needs an image layout"]);
}

#[test]
fn prefer_png_vector_strips_and_image_grid() {
    let d = tempfile::tempdir().unwrap();
    write(d.path(), "net.json", NET);
    let r = receptor(
        &[
            "prefer", "net.json", "--layer", "h", "--all", "--png", "h.png",
        ],
        d.path(),
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let img = image::open(d.path().join("h.png")).unwrap().to_rgb8();
    // Vector layout, 4 inputs, 5 units: cells 16 px wide (1024/4, capped at 16) and 16 px
    // high, 2 px gaps: strips 2 + 4*16 + 2 = 68 wide, 2 + 5*(16 + 2) = 92 high, right of a
    // 10 px margin holding the unit indices (one digit: 3 font pixels drawn 2x, plus 4).
    // Below, the grey key strip, 34 px high, whose bar is at least 120 px long, so the
    // picture is 2 + 120 + 2 = 124 px wide and 92 + 34 = 126 high.
    assert_eq!(img.dimensions(), (124, 126));
    // Unit 0 prefers x0 = 1 (white, the box's high end); unit 2 prefers x0 = 0 (black).
    let m = 10;
    assert_eq!(img.get_pixel(m + 2 + 8, 2 + 8).0, [255, 255, 255]);
    assert_eq!(img.get_pixel(m + 2 + 8, 2 + 2 * 18 + 8).0, [0, 0, 0]);
    // Unit 3 prefers x3 = 1.
    assert_eq!(
        img.get_pixel(m + 2 + 3 * 16 + 8, 2 + 3 * 18 + 8).0,
        [255, 255, 255]
    );
    // The gap colour sits between strips.
    assert_ne!(
        img.get_pixel(m + 10, 2 + 16).0,
        img.get_pixel(m + 10, 2 + 8).0
    );
    // The key's bar runs from black (the box's low end) to white, 4 px below the strips.
    let bar = 92 + 4 + 2;
    assert_eq!(img.get_pixel(2, bar).0, [1, 1, 1]);
    assert_eq!(img.get_pixel(2 + 119, bar).0, [254, 254, 254]);

    // Image layout 2x2x1 with 3 first-layer units: a 2x2 grid of 32 px tiles (2 px cells
    // scaled by 16): 2 + 2*(32 + 2) = 70 px square.
    write(
        d.path(),
        "img.json",
        r#"{"schema": "receptor-model/1", "name": "img",
        "input": {"size": 4, "layout": {"kind": "image", "height": 2, "width": 2, "channels": 1},
                  "low": -1, "high": 1},
        "layers": [{"name": "c", "type": "dense", "activation": "relu",
                    "weights": [[1, -1, 0, 0], [0, 0, 1, 1], [-1, -1, -1, -1]], "bias": [0, 0, 0]},
                   {"name": "out", "type": "dense", "activation": "identity",
                    "weights": [[1, 1, 1]], "bias": [0]}]}"#,
    );
    let r = receptor(
        &[
            "prefer", "img.json", "--layer", "c", "--all", "--png", "c.png",
        ],
        d.path(),
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let img = image::open(d.path().join("c.png")).unwrap().to_rgb8();
    // Tiles 70 px square as a bare grid, each row under a 12 px band with the unit indices
    // (10 px digits and 2 px), the 34 px key strip below, the key's minimum width across.
    assert_eq!(img.dimensions(), (124, 70 + 2 * 12 + 34));
    // Unit 0 (tile at the top left) prefers pixel (0,0) = +1 (white), pixel (0,1) = -1 (black).
    let b = 12;
    assert_eq!(img.get_pixel(2 + 8, b + 2 + 8).0, [255, 255, 255]);
    assert_eq!(img.get_pixel(2 + 16 + 8, b + 2 + 8).0, [0, 0, 0]);
    // Unit 2 (bottom-left tile) prefers every pixel at -1 (black).
    assert_eq!(img.get_pixel(2 + 8, 2 * b + 2 + 34 + 8).0, [0, 0, 0]);
    // The index "0" is drawn in the band above unit 0: its top row is lit.
    assert_eq!(img.get_pixel(2, 2).0, [235, 235, 235]);
}

#[test]
fn bad_probes_exit_2_naming_the_file() {
    let d = tempfile::tempdir().unwrap();
    write(d.path(), "net.json", NET);
    let cases: &[(&str, &str, &[&str])] = &[
        (
            "width.csv",
            "1,2,3,4\n1,2,3\n",
            &["width.csv", "line 2", "expected 4 columns, found 3"],
        ),
        (
            "nan.csv",
            "1,2,3,4\n1,NaN,3,4\n",
            &["nan.csv", "line 2, column 2", "not a finite number"],
        ),
        (
            "label.csv",
            "a,b,c,d,label\n1,2,3,4,maybe\n",
            &["label.csv", "line 2", "label 'maybe'"],
        ),
        (
            "index.csv",
            "a,b,c,d,label\n1,2,3,4,2\n",
            &["index.csv", "label '2'"],
        ),
        ("header.csv", "a,b,c,d\n", &["header.csv", "no data rows"]),
        ("empty.csv", "", &["empty.csv", "empty"]),
        (
            "text.csv",
            "1,2,3,4\n1,two,3,4\n",
            &["text.csv", "'two' is not a number"],
        ),
        ("probe.txt", "1,2,3,4\n", &["probe.txt", ".csv or .npy"]),
        ("missing.csv", "", &["missing.csv"]),
    ];
    for (name, text, needles) in cases {
        if *name != "missing.csv" {
            write(d.path(), name, text);
        }
        let r = receptor(&["forward", "net.json", "--probe", name], d.path());
        assert_bad_input(&r, needles);
        assert!(r.stdout.is_empty(), "{name}: {}", r.stdout);
    }
    // A .npy whose header claims 10^12 rows: refused from the file length, at once.
    let mut header =
        b"{'descr': '<f4', 'fortran_order': False, 'shape': (1000000000000, 4), }".to_vec();
    while !(10 + header.len() + 1).is_multiple_of(64) {
        header.push(b' ');
    }
    header.push(b'\n');
    let mut bytes = b"\x93NUMPY\x01\x00".to_vec();
    bytes.extend_from_slice(&(header.len() as u16).to_le_bytes());
    bytes.extend_from_slice(&header);
    bytes.extend_from_slice(&[0u8; 16]);
    write(d.path(), "huge.npy", &bytes);
    let r = receptor(&["forward", "net.json", "--probe", "huge.npy"], d.path());
    assert_bad_input(&r, &["huge.npy", "but the file holds 16"]);
}

#[test]
fn bad_model_exits_2_naming_the_file() {
    let d = tempfile::tempdir().unwrap();
    write(
        d.path(),
        "bad.json",
        NET.replace(
            "[[1, 0, 0, 0, 0], [0, 0, 2, 0, 0]]",
            "[[1, 0, 0, 0], [0, 0, 2, 0]]",
        ),
    );
    write(d.path(), "p.csv", NET_PROBE);
    for args in [
        vec!["stats", "bad.json"],
        vec!["forward", "bad.json", "--probe", "p.csv"],
        vec!["prefer", "bad.json", "--layer", "h", "--all"],
    ] {
        let r = receptor(&args, d.path());
        assert_bad_input(&r, &["bad.json", "out"]);
    }
    let r = receptor(&["stats", "nothere.json"], d.path());
    assert_bad_input(&r, &["nothere.json"]);
}

#[test]
fn out_is_written_atomically() {
    let d = tempfile::tempdir().unwrap();
    write(d.path(), "net.json", NET);
    write(d.path(), "p.csv", NET_PROBE);
    write(d.path(), "bad.csv", "1,2,3,4\n1,2,3,4\n1,2,3\n");
    let r = receptor(&["stats", "net.json", "--out", "s.csv"], d.path());
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(r.stdout.is_empty());
    let first = std::fs::read_to_string(d.path().join("s.csv")).unwrap();
    assert!(first.starts_with("layer,unit,fan_in,"), "{first}");
    assert!(tmp_entries(d.path()).is_empty());

    // A probe error found while streaming (line 3) leaves the earlier file untouched and no
    // temporary file behind; the message is the probe's, not a write failure.
    let r = receptor(
        &[
            "forward", "net.json", "--probe", "bad.csv", "--out", "s.csv",
        ],
        d.path(),
    );
    assert_bad_input(&r, &["bad.csv", "line 3"]);
    assert_eq!(
        std::fs::read_to_string(d.path().join("s.csv")).unwrap(),
        first
    );
    assert!(
        tmp_entries(d.path()).is_empty(),
        "{:?}",
        tmp_entries(d.path())
    );

    // A folder that does not exist: exit 2 naming the path.
    let r = receptor(
        &["stats", "net.json", "--out", "no/such/folder/s.csv"],
        d.path(),
    );
    assert_bad_input(&r, &["no/such/folder/s.csv"]);

    // Overwriting works and replaces the content.
    let r = receptor(
        &["stats", "net.json", "--out", "s.csv", "--format", "json"],
        d.path(),
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    json(&std::fs::read_to_string(d.path().join("s.csv")).unwrap());
    assert!(tmp_entries(d.path()).is_empty());
}

#[test]
fn help_version_and_usage_exit_codes() {
    let d = tempfile::tempdir().unwrap();
    let r = receptor(&["--help"], d.path());
    assert_eq!(r.code, 0);
    for cmd in [
        "forward",
        "stats",
        "screen",
        "prefer",
        "check",
        "prune-sweep",
    ] {
        assert!(r.stdout.contains(cmd), "{cmd} missing from --help");
        let h = receptor(&[cmd, "--help"], d.path());
        assert_eq!(h.code, 0, "{cmd} --help");
        assert!(h.stdout.contains("--format"), "{cmd} --help lacks --format");
        assert!(h.stdout.contains("--out"), "{cmd} --help lacks --out");
        assert!(h.stdout.contains("--allow-outside-paths"), "{cmd} --help");
    }
    assert_eq!(receptor(&["--version"], d.path()).code, 0);
    let r = receptor(&["stats"], d.path());
    assert_eq!(r.code, 2);
    let r = receptor(&["stats", "m.json", "--format", "xml"], d.path());
    assert_eq!(r.code, 2);
    let r = receptor(&["forward", "m.json"], d.path());
    assert_eq!(r.code, 2, "--probe is required");
}

#[test]
fn screen_statuses_on_a_probe_and_on_the_uniform_default() {
    let d = tempfile::tempdir().unwrap();
    write(d.path(), "net.json", NET);
    write(d.path(), "p.csv", NET_PROBE);
    // Pre-activations on the 4 probe rows (see NET):
    //   u0 z = x0 = (1, 0, 0.9, 0): active 2/4, mean relu 0.475, max 1, bound 1 -> ok
    //   u1 z = -1: bound -1 -> dead_proven, active 0
    //   u2 z = 0.5 - x0 - x1 = (-0.5, 0.5, -0.4, 0.3): active 2/4, mean 0.2, max 0.5 -> ok
    //   u3 z = 0.1 on every row: always_active, mean 0.1, max 0.1, bound 1.1
    //   u4 z = x2 = 0 on every row: never active -> dead_on_probe, bound 1
    let want = [
        (0.5, 0.475, 1.0, 1.0, "ok"),
        (0.0, 0.0, 0.0, -1.0, "dead_proven"),
        (0.5, 0.2, 0.5, 0.5, "ok"),
        (1.0, 0.1, 0.1, 1.1, "always_active"),
        (0.0, 0.0, 0.0, 1.0, "dead_on_probe"),
    ];
    let r = receptor(&["screen", "net.json", "--probe", "p.csv"], d.path());
    assert_eq!(r.code, 0, "{}", r.stderr);
    let (h, rows) = csv(&r.stdout);
    assert_eq!(
        h,
        [
            "layer",
            "unit",
            "activation",
            "active_frac",
            "mean",
            "max",
            "upper_bound",
            "status"
        ]
    );
    assert_eq!(rows.len(), 5, "only the hidden layer is screened");
    for (k, (row, w)) in rows.iter().zip(want).enumerate() {
        assert_eq!(row[0], "h");
        assert_eq!(num(&row[1]) as usize, k);
        assert_eq!(row[2], "relu");
        assert_abs_diff_eq!(num(&row[3]), w.0, epsilon = 1e-9);
        assert_abs_diff_eq!(num(&row[4]), w.1, epsilon = 1e-6);
        assert_abs_diff_eq!(num(&row[5]), w.2, epsilon = 1e-6);
        // Interval bounds are exact on the first layer.
        assert_abs_diff_eq!(num(&row[6]), w.3, epsilon = 1e-6);
        assert_eq!(row[7], w.4, "unit {k}");
    }
    // --rare 0.6 turns the two half-active units into rarely_active.
    let r = receptor(
        &["screen", "net.json", "--probe", "p.csv", "--rare", "0.6"],
        d.path(),
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let (_, rows) = csv(&r.stdout);
    assert_eq!(rows[0][7], "rarely_active");
    assert_eq!(rows[2][7], "rarely_active");

    // Default probe: 4096 uniform samples; the seed is reported on stderr and in JSON.
    let r = receptor(&["screen", "net.json", "--format", "json"], d.path());
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(r.stderr.contains("seed 0"), "{}", r.stderr);
    assert!(r.stderr.contains("4096"), "{}", r.stderr);
    let v = json(&r.stdout);
    assert_eq!(v["seed"], 0);
    assert_eq!(v["samples"], 4096);
    let rows = v["rows"].as_array().unwrap();
    assert_eq!(rows[1]["status"], "dead_proven");
    // u4 z = x2 with x2 ~ U[0, 1]: active on (almost) every sample -> always_active or ok.
    assert_ne!(rows[4]["status"], "dead_on_probe");
    // u2 active when x0 + x1 < 0.5: probability 1/8 for independent U[0,1] (triangle
    // area); 4096 samples give a standard error of about 0.005.
    assert_abs_diff_eq!(
        rows[2]["active_frac"].as_f64().unwrap(),
        0.125,
        epsilon = 0.03
    );
    let r = receptor(&["screen", "net.json", "--rare", "2"], d.path());
    assert_bad_input(&r, &["--rare"]);
}

#[test]
fn check_passes_and_fails_by_dead_fraction() {
    let d = tempfile::tempdir().unwrap();
    write(d.path(), "net.json", NET);
    write(d.path(), "p.csv", NET_PROBE);
    // On the probe 2 of 5 units are dead (u1 proven, u4 on the probe): 0.4 > 0.1 -> exit 3.
    let r = receptor(&["check", "net.json", "--probe", "p.csv"], d.path());
    assert_eq!(r.code, 3, "{}", r.stderr);
    assert_eq!(
        r.stdout,
        "layer h: 2 of 5 rectifier units dead (over the limit of 0.1)\n"
    );
    let r = receptor(
        &["check", "net.json", "--probe", "p.csv", "--max-dead", "0.4"],
        d.path(),
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert_eq!(r.stdout, "layer h: 2 of 5 rectifier units dead\n");
    // On the uniform default only the provably dead u1 is dead: 1 of 5 = 0.2.
    let r = receptor(&["check", "net.json", "--max-dead", "0.2"], d.path());
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert_eq!(r.stdout, "layer h: 1 of 5 rectifier units dead\n");
    assert!(r.stderr.contains("seed 0"), "{}", r.stderr);
    let r = receptor(&["check", "net.json"], d.path());
    assert_eq!(r.code, 3);
    // JSON rows.
    let r = receptor(
        &["check", "net.json", "--probe", "p.csv", "--format", "json"],
        d.path(),
    );
    assert_eq!(r.code, 3);
    let v = json(&r.stdout);
    assert_eq!(v["passed"], false);
    assert_eq!(v["rows"][0]["layer"], "h");
    assert_eq!(v["rows"][0]["dead"], 2);
    assert_eq!(v["rows"][0]["units"], 5);
    assert_eq!(v["rows"][0]["over_limit"], true);
    // A bad probe is exit 2, not 3.
    write(d.path(), "bad.csv", "1,2\n");
    let r = receptor(&["check", "net.json", "--probe", "bad.csv"], d.path());
    assert_bad_input(&r, &["bad.csv"]);
}

#[test]
fn prune_sweep_and_write_pruned() {
    let d = tempfile::tempdir().unwrap();
    write(d.path(), "net.json", NET);
    write(d.path(), "p.csv", NET_PROBE);
    // Unpruned, every probe row is predicted correctly (see forward_softmax_net...): 1.0.
    // Fraction 1 zeroes every weight: outputs are softmax(bias) = softmax(0, 0.1), so "yes"
    // is predicted for every row and the accuracy is 2/4 (rows 1 and 3 are "yes").
    let r = receptor(
        &[
            "prune-sweep",
            "net.json",
            "--probe",
            "p.csv",
            "--fractions",
            "0,1",
        ],
        d.path(),
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let (h, rows) = csv(&r.stdout);
    assert_eq!(h, ["fraction", "zeroed", "total", "accuracy"]);
    assert_eq!(rows.len(), 2);
    assert_abs_diff_eq!(num(&rows[0][0]), 0.0);
    assert_abs_diff_eq!(num(&rows[0][3]), 1.0, epsilon = 1e-12);
    assert_abs_diff_eq!(num(&rows[1][0]), 1.0);
    // 20 + 10 weights in all; at fraction 1 all 30 are zero.
    assert_eq!(rows[1][2], "30");
    assert_eq!(rows[1][1], "30");
    assert_abs_diff_eq!(num(&rows[1][3]), 0.5, epsilon = 1e-12);

    // Default fractions: 0, 0.1, ..., 0.9.
    let r = receptor(
        &[
            "prune-sweep",
            "net.json",
            "--probe",
            "p.csv",
            "--format",
            "json",
        ],
        d.path(),
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let v = json(&r.stdout);
    let rows = v["rows"].as_array().unwrap();
    assert_eq!(rows.len(), 10);
    for (k, row) in rows.iter().enumerate() {
        assert_abs_diff_eq!(
            row["fraction"].as_f64().unwrap(),
            k as f64 / 10.0,
            epsilon = 1e-12
        );
        assert_eq!(row["total"], 30);
    }

    // --write-pruned 1 writes a model whose weights are all zero; it loads and validates.
    let r = receptor(
        &[
            "prune-sweep",
            "net.json",
            "--write-pruned",
            "1",
            "--out",
            "pruned.json",
        ],
        d.path(),
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let r = receptor(&["stats", "pruned.json", "--format", "json"], d.path());
    assert_eq!(r.code, 0, "{}", r.stderr);
    let v = json(&r.stdout);
    for row in v["rows"].as_array().unwrap() {
        assert_eq!(row["l1"].as_f64().unwrap(), 0.0);
    }
    // Biases are kept.
    assert_abs_diff_eq!(v["rows"][1]["bias"].as_f64().unwrap(), -1.0, epsilon = 1e-7);

    // Usage errors: no labels, no probe, --write-pruned without --out.
    write(d.path(), "unlabelled.csv", "1,0,0,0\n");
    let r = receptor(
        &["prune-sweep", "net.json", "--probe", "unlabelled.csv"],
        d.path(),
    );
    assert_bad_input(&r, &["unlabelled.csv", "label"]);
    let r = receptor(&["prune-sweep", "net.json"], d.path());
    assert_bad_input(&r, &["--probe"]);
    let r = receptor(
        &["prune-sweep", "net.json", "--write-pruned", "0.5"],
        d.path(),
    );
    assert_bad_input(&r, &["--out"]);
    let r = receptor(
        &[
            "prune-sweep",
            "net.json",
            "--probe",
            "p.csv",
            "--fractions",
            "0.5,1.5",
        ],
        d.path(),
    );
    assert_bad_input(&r, &["1.5"]);
}

#[test]
fn streaming_in_small_chunks_changes_nothing() {
    let d = tempfile::tempdir().unwrap();
    write(d.path(), "net.json", NET);
    // 50 rows on a grid in [0, 1]^4, with a byte-order mark and Windows line ends, so the
    // readers' chunk boundaries fall everywhere.
    let mut text = String::from("\u{feff}a,b,c,d,label\r\n");
    for i in 0..50 {
        let t = f64::from(i) / 49.0;
        text.push_str(&format!("{t},{},{},{},{}\r\n", 1.0 - t, t * t, 0.5, i % 2));
    }
    write(d.path(), "grid.csv", text);
    for cmd in ["forward", "screen"] {
        let whole = receptor(&[cmd, "net.json", "--probe", "grid.csv"], d.path());
        let bits = receptor(
            &[cmd, "net.json", "--probe", "grid.csv", "--chunk-rows", "3"],
            d.path(),
        );
        assert_eq!(whole.code, 0, "{}", whole.stderr);
        assert_eq!(whole.stdout, bits.stdout, "{cmd}");
    }
    let r = receptor(&["forward", "net.json", "--probe", "grid.csv"], d.path());
    let (_, rows) = csv(&r.stdout);
    assert_eq!(rows.len(), 50);
    assert_eq!(rows[49][0], "49");
    // The screen sees all 50 samples: u3 (z = 0.1 + x3 = 0.6) is active on every one.
    let r = receptor(
        &[
            "screen", "net.json", "--probe", "grid.csv", "--format", "json",
        ],
        d.path(),
    );
    let v = json(&r.stdout);
    assert_eq!(v["samples"], 50);
    assert_eq!(v["rows"][3]["status"], "always_active");
    assert_abs_diff_eq!(v["rows"][3]["mean"].as_f64().unwrap(), 0.6, epsilon = 1e-6);
}

#[test]
fn compact_net_worked_by_hand() {
    // NET (above): u1 is dead_proven (z = -1 everywhere); u3 and u4 have only zero
    // outgoing weights (the output reads h0 and h2 only), so they go as zero_outgoing; then
    // x2 (feeding only u4) and x3 (feeding only u3) have no outgoing weight left. What
    // remains: inputs x0, x1; h = [u0, u2]; out = [[1, 0], [0, 2]] with bias (0, 0.1).
    let d = tempfile::tempdir().unwrap();
    write(d.path(), "net.json", NET);
    write(d.path(), "p.csv", NET_PROBE);
    let r = receptor(
        &[
            "compact",
            "net.json",
            "--out",
            "small.json",
            "--probe",
            "p.csv",
        ],
        d.path(),
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(
        r.stderr
            .contains("input: 4 -> 2 features (removed 2: zero_outgoing 2)"),
        "{}",
        r.stderr
    );
    assert!(
        r.stderr
            .contains("layer 'h' (relu): 5 -> 2 units (removed 3: dead_proven 1, zero_outgoing 2)"),
        "{}",
        r.stderr
    );
    assert!(
        r.stderr
            .contains("accuracy on p.csv: 1.0 before, 1.0 after"),
        "{}",
        r.stderr
    );
    let v = json(&std::fs::read_to_string(d.path().join("small.json")).unwrap());
    assert_eq!(v["input"]["size"], 2);
    assert_eq!(
        v["layers"][0]["weights"],
        serde_json::json!([[1.0, 0.0], [-1.0, -1.0]])
    );
    assert_eq!(v["layers"][0]["bias"], serde_json::json!([0.0, 0.5]));
    assert_eq!(
        v["layers"][1]["weights"],
        serde_json::json!([[1.0, 0.0], [0.0, 2.0]])
    );
    assert_eq!(v["layers"][1]["bias"], serde_json::json!([0.0, 0.1]));
    assert_eq!(v["layers"][1]["labels"], serde_json::json!(["no", "yes"]));
}

/// Every name in `dir`, sorted.
fn entries(dir: &Path) -> Vec<String> {
    let mut v: Vec<String> = std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    v.sort();
    v
}

/// Box [0, 1]; h: u0 = relu(x0 - 2) (upper bound -1: dead_proven), u1 = relu(x0);
/// out = 3 u0 + u1 (identity).
const DEAD_IN_BOX: &str = r#"{"schema": "receptor-model/1", "name": "box",
  "input": {"size": 1, "low": 0, "high": 1},
  "layers": [
    {"name": "h", "type": "dense", "activation": "relu", "weights": [[1], [1]], "bias": [-2, 0]},
    {"name": "out", "type": "dense", "activation": "identity", "weights": [[3, 1]], "bias": [0]}]}"#;

#[test]
fn compact_refusals_exit_2_and_write_nothing() {
    let d = tempfile::tempdir().unwrap();
    write(d.path(), "net.json", NET);
    write(d.path(), "box.json", DEAD_IN_BOX);
    let before = std::fs::read(d.path().join("net.json")).unwrap();
    // --out is the input itself, by the same or another spelling.
    for out in ["net.json", "./net.json"] {
        let r = receptor(&["compact", "net.json", "--out", out], d.path());
        assert_bad_input(&r, &[out, "input model itself"]);
    }
    assert_eq!(std::fs::read(d.path().join("net.json")).unwrap(), before);
    // --tensors in another folder than --out.
    std::fs::create_dir(d.path().join("sub")).unwrap();
    let r = receptor(
        &[
            "compact",
            "net.json",
            "--out",
            "small.json",
            "--tensors",
            "sub/small.safetensors",
        ],
        d.path(),
    );
    assert_bad_input(&r, &["sub/small.safetensors", "same folder"]);
    // The weaker argument needs its data.
    let r = receptor(
        &[
            "compact",
            "net.json",
            "--out",
            "small.json",
            "--also",
            "dead-on-probe",
        ],
        d.path(),
    );
    assert_bad_input(&r, &["--probe"]);
    let r = receptor(
        &[
            "compact",
            "net.json",
            "--out",
            "small.json",
            "--fold-constant",
            "--fold-tolerance",
            "-1",
        ],
        d.path(),
    );
    assert_bad_input(&r, &["--fold-tolerance"]);
    // A probe outside the box: at x0 = 5, u0 = relu(3) = 3 and the output drops by 9, so
    // the check fails and nothing is written.
    write(d.path(), "far.csv", "x0\n0.5\n5\n");
    let r = receptor(
        &[
            "compact",
            "box.json",
            "--out",
            "small.json",
            "--probe",
            "far.csv",
        ],
        d.path(),
    );
    assert_bad_input(
        &r,
        &[
            "box.json",
            "row 1 of far.csv",
            "outside the input box",
            "nothing was written",
        ],
    );
    assert!(r.stderr.contains("by 9.0"), "{}", r.stderr);
    assert_eq!(
        entries(d.path()),
        ["box.json", "far.csv", "net.json", "sub"]
    );
    // Inside the box the same model compacts (u0 goes).
    let r = receptor(&["compact", "box.json", "--out", "small.json"], d.path());
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(r.stderr.contains("2 -> 1 units"), "{}", r.stderr);
}

#[test]
fn prune_sweep_by_unit_worked_by_hand() {
    // NET's hidden units' L1 norms (incoming weights): u0 1, u1 0, u2 2, u3 1, u4 1; order
    // of removal u1, u0, u3, u4, u2 (ties to the lower index). Fraction f removes
    // floor(5 f + 1e-9) units: 0.2 -> u1 (outputs unchanged: accuracy 1); 0.4 -> u1, u0: the
    // "no" logit is 0, so rows 0 and 2 (label "no", h2 = 0, logits (0, 0.1)) turn "yes":
    // accuracy 2/4; 0.6 and 0.8 remove u3, u4 too, which the output never reads: 2/4.
    // Parameters: 5x4 + 5 + 2x5 + 2 = 37 whole; with 3 units 3x4 + 3 + 2x3 + 2 = 23.
    let d = tempfile::tempdir().unwrap();
    write(d.path(), "net.json", NET);
    write(d.path(), "p.csv", NET_PROBE);
    let r = receptor(
        &[
            "prune-sweep",
            "net.json",
            "--probe",
            "p.csv",
            "--by",
            "unit",
            "--fractions",
            "0,0.2,0.4,0.6,0.8",
        ],
        d.path(),
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let (h, rows) = csv(&r.stdout);
    assert_eq!(
        h,
        [
            "criterion",
            "layer",
            "fraction",
            "removed",
            "units",
            "parameters",
            "accuracy"
        ]
    );
    let removed: Vec<&str> = rows.iter().map(|r| r[3].as_str()).collect();
    assert_eq!(removed, ["0", "1", "2", "3", "4"]);
    let acc: Vec<f64> = rows.iter().map(|r| num(&r[6])).collect();
    assert_eq!(acc, [1.0, 1.0, 0.5, 0.5, 0.5]);
    assert_eq!(rows[0][5], "37");
    assert_eq!(rows[2][5], "23");
    assert!(
        rows.iter()
            .all(|r| r[0] == "l1" && r[1] == "all" && r[4] == "5")
    );
    // --per-layer on a one-hidden-layer net: the same curve, named by the layer.
    let r = receptor(
        &[
            "prune-sweep",
            "net.json",
            "--probe",
            "p.csv",
            "--by",
            "unit",
            "--per-layer",
            "--fractions",
            "0.4",
            "--format",
            "json",
        ],
        d.path(),
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let v = json(&r.stdout);
    assert_eq!(v["rows"][0]["layer"], "h");
    assert_eq!(v["rows"][0]["accuracy"], 0.5);
    // --write-pruned 0.4 writes the model without u0 and u1: 3 hidden units.
    let r = receptor(
        &[
            "prune-sweep",
            "net.json",
            "--by",
            "unit",
            "--write-pruned",
            "0.4",
            "--out",
            "pruned.json",
        ],
        d.path(),
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let v = json(&std::fs::read_to_string(d.path().join("pruned.json")).unwrap());
    assert_eq!(
        v["layers"][0]["weights"],
        serde_json::json!([
            [-1.0, -1.0, 0.0, 0.0],
            [0.0, 0.0, 0.0, 1.0],
            [0.0, 0.0, 1.0, 0.0]
        ])
    );
    assert_eq!(
        v["layers"][1]["weights"],
        serde_json::json!([[0.0, 0.0, 0.0], [2.0, 0.0, 0.0]])
    );
}

#[test]
fn prune_sweep_by_unit_refusals_exit_2_and_write_nothing() {
    let d = tempfile::tempdir().unwrap();
    write(d.path(), "net.json", NET);
    write(d.path(), "p.csv", NET_PROBE);
    let before = std::fs::read(d.path().join("net.json")).unwrap();
    for f in ["1", "1.0"] {
        let r = receptor(
            &[
                "prune-sweep",
                "net.json",
                "--by",
                "unit",
                "--write-pruned",
                f,
                "--out",
                "p.json",
            ],
            d.path(),
        );
        assert_bad_input(&r, &["net.json", "all 5 units of layer 'h'"]);
    }
    let r = receptor(
        &[
            "prune-sweep",
            "net.json",
            "--probe",
            "p.csv",
            "--by",
            "unit",
            "--fractions",
            "0,1",
        ],
        d.path(),
    );
    assert_bad_input(&r, &["net.json", "all 5 units of layer 'h'"]);
    // --out equal to the input, for the unit and the weight mode alike.
    for by in ["unit", "weight"] {
        let r = receptor(
            &[
                "prune-sweep",
                "net.json",
                "--by",
                by,
                "--write-pruned",
                "0.5",
                "--out",
                "net.json",
            ],
            d.path(),
        );
        assert_bad_input(&r, &["net.json", "input model itself"]);
    }
    let r = receptor(
        &["prune-sweep", "net.json", "--probe", "p.csv", "--per-layer"],
        d.path(),
    );
    assert_bad_input(&r, &["--by unit"]);
    let r = receptor(
        &[
            "prune-sweep",
            "net.json",
            "--by",
            "unit",
            "--criterion",
            "activation",
            "--write-pruned",
            "0.5",
            "--out",
            "q.json",
        ],
        d.path(),
    );
    assert_bad_input(&r, &["--probe"]);
    assert_eq!(std::fs::read(d.path().join("net.json")).unwrap(), before);
    assert_eq!(entries(d.path()), ["net.json", "p.csv"]);
}

#[test]
fn compact_folds_a_saturated_tanh_only_when_asked() {
    // Box [0, 1]^2. u0 = tanh(0.5 x0 + 20) lies in [tanh(20), tanh(20.5)], within 1e-17 of
    // 1; u1 = tanh(x1) spans [0, 0.76]. out = (3 u0 + u1 + 0.25, -2 u0), identity.
    // Folding u0 = 1 gives the bias (3.25, -2) and leaves x0 without outgoing weights.
    let d = tempfile::tempdir().unwrap();
    write(
        d.path(),
        "tanh.json",
        r#"{"schema": "receptor-model/1", "name": "tanh",
  "input": {"size": 2, "low": 0, "high": 1},
  "layers": [
    {"name": "h", "type": "dense", "activation": "tanh", "weights": [[0.5, 0], [0, 1]], "bias": [20, 0]},
    {"name": "out", "type": "dense", "activation": "identity", "weights": [[3, 1], [-2, 0]], "bias": [0.25, 0]}]}"#,
    );
    let r = receptor(&["compact", "tanh.json", "--out", "a.json"], d.path());
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(
        r.stderr.contains("layer 'h' (tanh): 2 -> 2 units"),
        "{}",
        r.stderr
    );
    let r = receptor(
        &["compact", "tanh.json", "--out", "b.json", "--fold-constant"],
        d.path(),
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(
        r.stderr
            .contains("folded into the next layer's bias: h[0] = 1.0"),
        "{}",
        r.stderr
    );
    let v = json(&std::fs::read_to_string(d.path().join("b.json")).unwrap());
    assert_eq!(v["input"]["size"], 1);
    assert_eq!(v["layers"][0]["weights"], serde_json::json!([[1.0]]));
    assert_eq!(v["layers"][1]["weights"], serde_json::json!([[1.0], [0.0]]));
    assert_eq!(v["layers"][1]["bias"], serde_json::json!([3.25, -2.0]));
}

/// `receptor fields` on a hand-worked stack (6 x 6 grey input; conv 3x3 stride 1 padding 1;
/// max pool 2; conv 3x3 dilation 2): by the recurrences of Araujo, Norris & Sim (Distill
/// 2019) r = 1 + 2 = 3, j = 1, u = -1 (centre 0); pool: r = 3 + 1 = 4, j = 2, u = -1
/// (centre 0.5); dilated conv (effective kernel 5, padding 2): r = 4 + 4 x 2 = 12, j = 2,
/// u = -1 - 2 x 2 = -5 (centre -5 + 11 / 2 = 0.5); the flatten and dense layers see the whole 6 x 6 input (centre 2.5).
/// `prefer --position` outside the map and on a dense layer are clean bad-option errors.
#[test]
fn fields_table_and_prefer_position_on_a_conv_model() {
    let dir = tempfile::tempdir().unwrap();
    let model = r#"{"schema": "receptor-model/2", "name": "t",
      "input": {"size": 36, "layout": {"kind": "image", "height": 6, "width": 6, "channels": 1},
                "low": 0, "high": 1},
      "layers": [
        {"name": "c1", "type": "conv2d", "activation": "relu", "padding": 1,
         "weights": [[[[1, 0, 0], [0, 1, 0], [0, 0, 1]]]]},
        {"name": "p", "type": "max_pool2d", "kernel": 2},
        {"name": "c2", "type": "conv2d", "activation": "relu", "dilation": [2, 2], "padding": 2,
         "weights": [[[[1, 0, 1], [0, 1, 0], [1, 0, 1]]], [[[0, 1, 0], [1, 0, 1], [0, 1, 0]]]]},
        {"name": "flat", "type": "flatten"},
        {"name": "out", "type": "dense", "activation": "identity",
         "weights": [[1, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 1]]}]}"#;
    write(dir.path(), "m.json", model);
    let r = receptor(&["fields", "m.json"], dir.path());
    assert_eq!(r.code, 0, "{}", r.stderr);
    let want = "layer,type,out_channels,out_height,out_width,rf_height,rf_width,jump_h,jump_w,start_h,start_w\n\
                c1,conv2d,1,6,6,3,3,1,1,0.0,0.0\n\
                p,max_pool2d,1,3,3,4,4,2,2,0.5,0.5\n\
                c2,conv2d,2,3,3,12,12,2,2,0.5,0.5\n\
                flat,flatten,18,1,1,6,6,,,2.5,2.5\n\
                out,dense,1,1,1,6,6,,,2.5,2.5\n";
    assert_eq!(r.stdout, want);
    // The first layer's closed form: the centre (3, 3) of channel 0 reads pixels (2..5, 2..5)
    // with the identity kernel, so the optimum is 1 on its diagonal (z = 3) and the PNG is
    // the 3 x 3 field.
    let r = receptor(
        &[
            "prefer", "m.json", "--layer", "c1", "--unit", "0", "--format", "json", "--png",
            "p.png",
        ],
        dir.path(),
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let v: serde_json::Value = serde_json::from_str(&r.stdout).unwrap();
    assert_eq!(v["rows"][0]["preactivation"], 3.0);
    assert_eq!(v["position"][0]["row"], 3);
    assert_eq!(v["receptive_field"][0]["row_start"], 2);
    assert_eq!(v["receptive_field"][0]["row_end"], 5);
    // The same drawing of the whole 6 x 6 input (a dense layer's preferred input) is taller
    // than the cropped 3 x 3 field (pictures are scaled up to a minimum size, so not twice;
    // both are as wide as the key below them).
    let r = receptor(
        &[
            "prefer", "m.json", "--layer", "out", "--unit", "0", "--png", "full.png",
        ],
        dir.path(),
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let crop = image::open(dir.path().join("p.png")).unwrap();
    let full = image::open(dir.path().join("full.png")).unwrap();
    assert!(crop.width() <= full.width() && crop.height() < full.height());
    let r = receptor(
        &[
            "prefer",
            "m.json",
            "--layer",
            "c2",
            "--unit",
            "0",
            "--position",
            "3,0",
        ],
        dir.path(),
    );
    assert_bad_input(&r, &["position", "3 x 3 map"]);
    let r = receptor(
        &[
            "prefer",
            "m.json",
            "--layer",
            "out",
            "--unit",
            "0",
            "--position",
            "0,0",
        ],
        dir.path(),
    );
    assert_bad_input(&r, &["position", "gives a vector"]);
}

#[test]
fn onnx_models_take_the_box_from_the_command_line_and_convert_writes_it() {
    // gemm_chain.onnx (5 inputs) carries no box: a notice without --low/--high, none with.
    let fixture = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/onnx/gemm_chain.onnx");
    let dir = tempfile::tempdir().unwrap();
    let model = fixture.to_str().unwrap();
    let r = receptor(&["stats", model], dir.path());
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(
        r.stderr.contains("default [-1, 1]") && r.stderr.contains("--low"),
        "{}",
        r.stderr
    );
    let r = receptor(
        &[
            "convert",
            model,
            "--out",
            "m.json",
            "--low",
            "-2",
            "--high",
            "0,1,2,3,4",
        ],
        dir.path(),
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(!r.stderr.contains("default"), "{}", r.stderr);
    let json: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(dir.path().join("m.json")).unwrap()).unwrap();
    assert_eq!(json["input"]["low"], serde_json::json!(-2.0));
    assert_eq!(
        json["input"]["high"],
        serde_json::json!([0.0, 1.0, 2.0, 3.0, 4.0])
    );
    // A box of the wrong length is refused naming the file.
    let r = receptor(&["stats", model, "--low", "0,1"], dir.path());
    assert_bad_input(&r, &["gemm_chain.onnx", "2 values", "(5)"]);
    // convert never writes over its input, nor JSON into a .onnx name.
    let r = receptor(&["convert", "m.json", "--out", "m.json"], dir.path());
    assert_eq!(r.code, 2);
    let r = receptor(&["convert", model, "--out", "x.ONNX"], dir.path());
    assert_eq!(r.code, 2);
    assert!(r.stderr.contains("name the output .json"), "{}", r.stderr);
}

#[test]
fn attribute_of_a_first_layer_unit_is_its_closed_form() {
    // NET's hidden unit u2 has z = 0.5 - x0 - x1, a linear function with gradient
    // (-1, -1, 0, 0): integrated gradients (Sundararajan et al. 2017) are then exactly
    // -1 * (x_i - x'_i) for i = 0, 1 and 0 for the others. Baseline: the box centre 0.5.
    let dir = tempfile::tempdir().unwrap();
    write(dir.path(), "net.json", NET);
    write(
        dir.path(),
        "probe.csv",
        "x0,x1,x2,x3\n0.25,1,0,0.5\n0.75,0,1,1\n",
    );
    let r = receptor(
        &[
            "attribute",
            "net.json",
            "--layer",
            "h",
            "--unit",
            "2",
            "--probe",
            "probe.csv",
            "--row",
            "1",
            "--format",
            "json",
        ],
        dir.path(),
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let v = json(&r.stdout);
    let rows = v["rows"].as_array().expect("rows");
    let want = [-(0.75 - 0.5), -(0.0 - 0.5), 0.0, 0.0];
    for (row, w) in rows.iter().zip(want) {
        assert_abs_diff_eq!(row["attribution"].as_f64().unwrap(), w, epsilon = 1e-6);
    }
    // Completeness: z(x) - z(x') = (0.5 - 0.75 - 0) - (0.5 - 0.5 - 0.5) = 0.25.
    assert_abs_diff_eq!(v["sum"].as_f64().unwrap(), 0.25, epsilon = 1e-6);
    assert_abs_diff_eq!(v["gap"].as_f64().unwrap(), 0.0, epsilon = 1e-6);
    // A row the probe does not have is a clean error naming the file.
    let r = receptor(
        &[
            "attribute",
            "net.json",
            "--layer",
            "h",
            "--unit",
            "2",
            "--probe",
            "probe.csv",
            "--row",
            "2",
        ],
        dir.path(),
    );
    assert_bad_input(&r, &["--row", "probe.csv", "2 rows"]);
}

#[test]
fn prefer_facets_add_their_columns_and_prior_needs_data() {
    let dir = tempfile::tempdir().unwrap();
    write(dir.path(), "net.json", NET);
    write(
        dir.path(),
        "data.csv",
        "x0,x1,x2,x3\n0.1,0.2,0.3,0.4\n0.9,0.1,0.5,0.2\n0.4,0.6,0.1,0.8\n0.3,0.3,0.9,0.1\n",
    );
    let r = receptor(
        &[
            "prefer", "net.json", "--layer", "out", "--unit", "1", "--facets", "2",
        ],
        dir.path(),
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let (header, rows) = csv(&r.stdout);
    assert_eq!(
        &header[..7],
        [
            "layer",
            "unit",
            "facet",
            "preactivation",
            "activation",
            "steps",
            "facet_spread"
        ]
    );
    assert_eq!(rows.len(), 2);
    assert_eq!((rows[0][2].as_str(), rows[1][2].as_str()), ("0", "1"));
    // Without --facets the columns are the usual ones.
    let r = receptor(
        &["prefer", "net.json", "--layer", "out", "--unit", "1"],
        dir.path(),
    );
    let (header, _) = csv(&r.stdout);
    assert_eq!(header[2], "preactivation");
    // With the data prior: z_yes = 0.1 + 2 relu(0.5 - x0 - x1) <= 1.1, and the prior keeps
    // the input no farther from the data's mean than the plain optimum (0, 0, *, *).
    let r = receptor(
        &[
            "prefer", "net.json", "--layer", "out", "--unit", "1", "--prior", "data.csv",
            "--format", "json",
        ],
        dir.path(),
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let v = json(&r.stdout);
    assert!(v["prior_shrinkage"].as_f64().unwrap() >= 0.0);
    assert!(v["rows"][0]["preactivation"].as_f64().unwrap() <= 1.1 + 1e-6);
    let r = receptor(
        &[
            "prefer",
            "net.json",
            "--layer",
            "out",
            "--unit",
            "1",
            "--prior-weight",
            "1",
        ],
        dir.path(),
    );
    assert_eq!(r.code, 2, "--prior-weight needs --prior");
    let r = receptor(
        &[
            "prefer",
            "net.json",
            "--layer",
            "out",
            "--unit",
            "1",
            "--prior",
            "missing.csv",
        ],
        dir.path(),
    );
    assert_bad_input(&r, &["missing.csv"]);
}

// --- timeline ---

/// A 2-2-2 relu/softmax checkpoint on the box [0, 1]^2 at `step` (none when `None`), with
/// hidden weights `w0`, `w1` and biases `b`; the output layer passes h0 and h1 through
/// (prediction: the larger of the two, the first on a tie).
fn checkpoint(step: Option<u64>, w0: [f32; 2], w1: [f32; 2], b: [f32; 2]) -> String {
    let step = step.map_or(String::new(), |s| format!(r#""step": {s},"#));
    format!(
        r#"{{"schema": "receptor-model/1", "name": "run", {step}
  "input": {{"size": 2, "low": 0, "high": 1}},
  "layers": [
    {{"name": "h", "type": "dense", "activation": "relu",
     "weights": [[{}, {}], [{}, {}]], "bias": [{}, {}]}},
    {{"name": "out", "type": "dense", "activation": "softmax",
     "weights": [[1, 0], [0, 1]], "bias": [0, 0]}}]}}"#,
        w0[0], w0[1], w1[0], w1[1], b[0], b[1]
    )
}

/// Four labelled rows for the timeline series.
const RUN_PROBE: &str = "x0,x1,label\n0,0,1\n1,1,0\n0.25,0.75,1\n0.75,0.25,1\n";

#[test]
fn timeline_tables_of_a_constructed_series() {
    let d = tempfile::tempdir().unwrap();
    let run = d.path().join("run");
    std::fs::create_dir(&run).unwrap();
    // Written in an order unlike the steps; the steps order them (100, 200, 300).
    // u0: w = [1, 1]; bias 0.5 at step 100, then -3: upper bound b + 2 = -1 <= 0, so
    //     dead_proven (and never active) from step 200 (interval bounds, Gowal et al. 2018,
    //     exact on a first layer).
    // u1: w = [1, 0], bias 0.5, negated to [-1, 0] at step 300: drift (cosine distance)
    //     1 - (-1) = 2; z = 0.5 - x0 there = (0.5, -0.5, 0.25, -0.25): active 2 of 4, ok.
    write(
        &run,
        "b.json",
        checkpoint(Some(300), [1., 1.], [-1., 0.], [-3., 0.5]),
    );
    write(
        &run,
        "a.json",
        checkpoint(Some(200), [1., 1.], [1., 0.], [-3., 0.5]),
    );
    write(
        &run,
        "c.json",
        checkpoint(Some(100), [1., 1.], [1., 0.], [0.5, 0.5]),
    );
    write(d.path(), "p.csv", RUN_PROBE);
    let r = receptor(&["timeline", "run", "--probe", "p.csv"], d.path());
    assert_eq!(r.code, 0, "{}", r.stderr);
    let (h, rows) = csv(&r.stdout);
    assert_eq!(
        h,
        [
            "layer",
            "unit",
            "first_dead_proven",
            "first_dead_on_probe",
            "last_status",
            "drift",
            "final_l2"
        ]
    );
    assert_eq!(rows.len(), 2, "the hidden layer's units");
    assert_eq!(rows[0][..5], ["h", "0", "200", "200", "dead_proven"]);
    assert_abs_diff_eq!(num(&rows[0][5]), 0.0, epsilon = 1e-12);
    assert_abs_diff_eq!(num(&rows[0][6]), 2f64.sqrt(), epsilon = 1e-12);
    assert_eq!(rows[1][..5], ["h", "1", "", "", "ok"]);
    assert_abs_diff_eq!(num(&rows[1][5]), 2.0, epsilon = 1e-12);
    assert_abs_diff_eq!(num(&rows[1][6]), 1.0, epsilon = 1e-12);

    // Per checkpoint. mean |w_t - w_(t-1)| over the 4 weights of h: 0 at 200 (only a bias
    // changed), 2 / 4 at 300. Accuracy on the labels (1, 0, 1, 1), prediction argmax(h0, h1):
    //   100: h0 = x0 + x1 + 0.5 >= h1 = x0 + 0.5 on every row -> 0 everywhere: 1 of 4;
    //   200: h0 = 0, h1 > 0 -> 1 everywhere: 3 of 4;
    //   300: h1 = relu(0.5 - x0) = (0.5, 0, 0.25, 0) -> (1, 0, 1, 0 on the tie): 3 of 4.
    let r = receptor(
        &["timeline", "run", "--probe", "p.csv", "--per", "checkpoint"],
        d.path(),
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let (h, rows) = csv(&r.stdout);
    assert_eq!(
        h,
        [
            "step",
            "layer",
            "units",
            "dead_proven",
            "dead_on_probe",
            "rarely_active",
            "mean_hoyer",
            "near_zero_frac",
            "mean_abs_update",
            "accuracy"
        ]
    );
    let steps: Vec<&str> = rows.iter().map(|r| r[0].as_str()).collect();
    assert_eq!(steps, ["100", "200", "300"]);
    assert_eq!(rows[0][2..6], ["2", "0", "0", "0"]);
    assert_eq!(rows[1][2..6], ["2", "1", "0", "0"]);
    assert_eq!(rows[0][8], "", "no update before the first checkpoint");
    assert_abs_diff_eq!(num(&rows[1][8]), 0.0, epsilon = 1e-12);
    assert_abs_diff_eq!(num(&rows[2][8]), 0.5, epsilon = 1e-12);
    // Hoyer (2004): [1, 1] -> 0, [1, 0] -> 1: mean 0.5. Near zero (|w| <= 0.01): 1 of 4.
    assert_abs_diff_eq!(num(&rows[0][6]), 0.5, epsilon = 1e-12);
    assert_abs_diff_eq!(num(&rows[0][7]), 0.25, epsilon = 1e-12);
    let acc: Vec<f64> = rows.iter().map(|r| num(&r[9])).collect();
    assert_eq!(acc, [0.25, 0.75, 0.75]);

    // JSON holds both tables.
    let r = receptor(
        &["timeline", "run", "--probe", "p.csv", "--format", "json"],
        d.path(),
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let v = json(&r.stdout);
    assert_eq!(v["key"], "step");
    assert_eq!(v["rows"][0]["first_dead_proven"], 200);
    assert_eq!(v["rows"][1]["first_dead_proven"], serde_json::Value::Null);
    assert_eq!(v["checkpoints"].as_array().unwrap().len(), 3);
    assert_eq!(
        v["checkpoints"][0]["mean_abs_update"],
        serde_json::Value::Null
    );
    assert_eq!(v["checkpoints"][2]["accuracy"], 0.75);
}

#[test]
fn timeline_without_steps_goes_by_file_name_and_refuses_bad_series() {
    let d = tempfile::tempdir().unwrap();
    // No steps: natural order of the names (ckpt-2 before ckpt-10); keys are positions.
    // u0 dies (bias -3) in ckpt-10 only, the last: first_dead_proven = position 2.
    let alive = checkpoint(None, [1., 1.], [1., 0.], [0.5, 0.5]);
    write(d.path(), "ckpt-1.json", &alive);
    write(d.path(), "ckpt-2.json", &alive);
    write(
        d.path(),
        "ckpt-10.json",
        checkpoint(None, [1., 1.], [1., 0.], [-3., 0.5]),
    );
    let files = ["ckpt-10.json", "ckpt-1.json", "ckpt-2.json"];
    let mut args = vec!["timeline"];
    args.extend(files);
    let r = receptor(&args, d.path());
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(r.stderr.contains("uniformly"), "{}", r.stderr);
    let (_, rows) = csv(&r.stdout);
    assert_eq!(rows[0][2], "2");
    assert_eq!(rows[1][2], "");
    // One checkpoint: one row per unit, drift 0.
    let r = receptor(&["timeline", "ckpt-1.json"], d.path());
    assert_eq!(r.code, 0, "{}", r.stderr);
    let (_, rows) = csv(&r.stdout);
    assert_eq!(rows.len(), 2);
    assert_eq!(num(&rows[0][5]), 0.0);

    // A checkpoint with another hidden width: exit 2 naming the file, the layer, the shapes.
    write(
        d.path(),
        "ckpt-3.json",
        r#"{"schema": "receptor-model/1", "name": "run",
  "input": {"size": 2, "low": 0, "high": 1},
  "layers": [
    {"name": "h", "type": "dense", "activation": "relu",
     "weights": [[1, 1], [1, 0], [0, 1]], "bias": [0, 0, 0]},
    {"name": "out", "type": "dense", "activation": "softmax",
     "weights": [[1, 0, 0], [0, 1, 0]], "bias": [0, 0]}]}"#,
    );
    write(d.path(), "p.csv", RUN_PROBE);
    let r = receptor(
        &["timeline", "ckpt-1.json", "ckpt-3.json", "--probe", "p.csv"],
        d.path(),
    );
    assert_bad_input(&r, &["ckpt-3.json", "layer 'h'", "[3, 2]", "[2, 2]"]);
    // An empty folder.
    std::fs::create_dir(d.path().join("empty")).unwrap();
    let r = receptor(&["timeline", "empty"], d.path());
    assert_bad_input(&r, &["empty", "no model files"]);
    // Some files with a step, one without.
    write(
        d.path(),
        "stepped.json",
        checkpoint(Some(5), [1., 1.], [1., 0.], [0.5, 0.5]),
    );
    let r = receptor(&["timeline", "stepped.json", "ckpt-1.json"], d.path());
    assert_bad_input(&r, &["ckpt-1.json", "step"]);
    // A file in the folder that is not JSON, and a checkpoint whose side file is missing.
    let broken = d.path().join("broken");
    std::fs::create_dir(&broken).unwrap();
    write(&broken, "ckpt-1.json", &alive);
    write(&broken, "ckpt-2.json", "{\"schema\": ");
    let r = receptor(&["timeline", "broken"], d.path());
    assert_bad_input(&r, &["ckpt-2.json", "not a JSON model file"]);
    write(
        &broken,
        "ckpt-2.json",
        alive.replace(
            "[[1, 1], [1, 0]]",
            r#"{"safetensors": "gone.safetensors", "tensor": "w"}"#,
        ),
    );
    let r = receptor(&["timeline", "broken", "--probe", "p.csv"], d.path());
    assert_bad_input(&r, &["ckpt-2.json", "gone.safetensors"]);
    // A probe of the wrong width is the probe's error, not a panic.
    write(d.path(), "wide.csv", "a,b,c\n1,2,3\n");
    let r = receptor(
        &["timeline", "ckpt-1.json", "--probe", "wide.csv"],
        d.path(),
    );
    assert_bad_input(&r, &["wide.csv"]);
    let r = receptor(&["timeline", "--help"], d.path());
    assert_eq!(r.code, 0);
    assert!(r.stdout.contains("reference data") && r.stdout.contains("first_dead_proven"));
}

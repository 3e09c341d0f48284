//! Runs the real `receptor` binary on every case of the bad-input corpus in
//! `tests/bad-inputs/` (made by `scripts/make_bad_inputs.py`, one line per case in
//! `INDEX.tsv`) and checks: exit code 2, one message on standard error that names the file
//! and contains the expected description of the problem, no panic, done within seconds,
//! and no large allocation (the process runs under a 2 GiB address-space limit, far below
//! what allocating from any of the corpus's absurd declared sizes would need).

use std::path::Path;
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

const LIMIT_KIB: u64 = 2 * 1024 * 1024;
const TIME_LIMIT: Duration = Duration::from_secs(20);

struct Case {
    file: String,
    kind: String,
    expect: String,
    reason: String,
}

fn cases(dir: &Path) -> Vec<Case> {
    let index = std::fs::read_to_string(dir.join("INDEX.tsv")).expect("INDEX.tsv is readable");
    index
        .lines()
        .filter(|l| !l.starts_with('#') && !l.trim().is_empty())
        .map(|l| {
            let f: Vec<&str> = l.split('\t').collect();
            assert_eq!(f.len(), 4, "INDEX.tsv line has 4 fields: {l}");
            Case {
                file: f[0].into(),
                kind: f[1].into(),
                expect: f[2].into(),
                reason: f[3].into(),
            }
        })
        .collect()
}

fn run_limited(dir: &Path, args: &[&str]) -> (Option<i32>, String, Duration) {
    let bin = env!("CARGO_BIN_EXE_receptor");
    // `ulimit -v` bounds the address space: an allocation sized from a lying header fails
    // (and the process aborts with a non-2 code) instead of succeeding quietly.
    let script = format!("ulimit -v {LIMIT_KIB}; exec \"$0\" \"$@\"");
    let start = Instant::now();
    let mut child = Command::new("sh")
        .arg("-c")
        .arg(script)
        .arg(bin)
        .args(args)
        .current_dir(dir)
        .stdin(Stdio::null())
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .expect("the receptor binary starts");
    let status = loop {
        if let Some(s) = child.try_wait().expect("wait works") {
            break s;
        }
        if start.elapsed() > TIME_LIMIT {
            let _ = child.kill();
            panic!("{args:?} did not finish within {TIME_LIMIT:?}");
        }
        std::thread::sleep(Duration::from_millis(5));
    };
    let mut stderr = String::new();
    use std::io::Read;
    if let Some(mut e) = child.stderr.take() {
        let _ = e.read_to_string(&mut stderr);
    }
    (status.code(), stderr, start.elapsed())
}

#[test]
fn every_bad_input_gives_a_clear_error() {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/bad-inputs");
    let all = cases(&dir);
    assert!(
        all.len() >= 40,
        "the corpus has {} cases; issue asks for at least 40",
        all.len()
    );
    let mut failures = Vec::new();
    let mut slowest = Duration::ZERO;
    for c in &all {
        let args: Vec<&str> = match c.kind.as_str() {
            "model" => vec!["stats", &c.file],
            "probe" => vec!["screen", "good-model.json", "--probe", &c.file],
            k => panic!("unknown kind {k} in INDEX.tsv"),
        };
        let (code, stderr, took) = run_limited(&dir, &args);
        slowest = slowest.max(took);
        let mut why = Vec::new();
        if code != Some(2) {
            why.push(format!("exit code {code:?}, expected 2"));
        }
        if !stderr.contains(c.file.as_str()) {
            why.push("the message does not name the file".to_string());
        }
        if !stderr.contains(c.expect.as_str()) {
            why.push(format!("the message does not contain {:?}", c.expect));
        }
        if stderr.contains("panicked") || stderr.contains("RUST_BACKTRACE") {
            why.push("a panic".to_string());
        }
        if stderr.trim().lines().count() != 1 {
            why.push("not exactly one line on standard error".to_string());
        }
        if !why.is_empty() {
            failures.push(format!(
                "{} ({}): {}\n    stderr: {}",
                c.file,
                c.reason,
                why.join("; "),
                stderr.trim()
            ));
        }
    }
    assert!(
        failures.is_empty(),
        "{} of {} cases failed:\n{}",
        failures.len(),
        all.len(),
        failures.join("\n")
    );
    eprintln!(
        "{} bad inputs refused correctly; slowest took {slowest:?}",
        all.len()
    );
}

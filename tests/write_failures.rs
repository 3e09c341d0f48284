//! Nothing is lost when a write fails: a full disk (a 32 KiB tmpfs) and a read-only folder
//! (the same tmpfs remounted read-only). The real `receptor` binary must exit 2 with a
//! message naming the output file and the operating system's reason, leave the earlier file
//! byte for byte intact, and leave no temporary file behind.
//!
//! Mounting needs root (CI runs as root); elsewhere the test says it was skipped.

use std::path::{Path, PathBuf};
use std::process::Command;

struct Mount(PathBuf);

impl Mount {
    fn tmpfs(dir: &Path, size: &str) -> Option<Mount> {
        let ok = Command::new("mount")
            .args(["-t", "tmpfs", "-o", &format!("size={size}"), "tmpfs"])
            .arg(dir)
            .status()
            .is_ok_and(|s| s.success());
        ok.then(|| Mount(dir.to_path_buf()))
    }

    fn remount_read_only(&self) -> bool {
        Command::new("mount")
            .args(["-o", "remount,ro"])
            .arg(&self.0)
            .status()
            .is_ok_and(|s| s.success())
    }
}

impl Drop for Mount {
    fn drop(&mut self) {
        let _ = Command::new("umount").arg(&self.0).status();
    }
}

fn demo(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("demo-models")
        .join(name)
}

fn forward_into(out: &Path) -> (Option<i32>, String) {
    let o = Command::new(env!("CARGO_BIN_EXE_receptor"))
        .arg("forward")
        .arg(demo("solder-joints.json"))
        .arg("--probe")
        .arg(demo("solder-joints-probe.csv"))
        .arg("--out")
        .arg(out)
        .output()
        .expect("the receptor binary runs");
    (
        o.status.code(),
        String::from_utf8_lossy(&o.stderr).into_owned(),
    )
}

fn entries(dir: &Path) -> Vec<String> {
    let mut v: Vec<String> = std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    v.sort();
    v
}

#[test]
fn a_full_disk_or_a_read_only_folder_loses_nothing() {
    let base = tempfile::tempdir().unwrap();
    let Some(mount) = Mount::tmpfs(base.path(), "32k") else {
        eprintln!("skipped: cannot mount a tmpfs here (needs root)");
        return;
    };
    let out = base.path().join("outputs.csv");
    let earlier = b"row,earlier\n0,kept\n".to_vec();
    std::fs::write(&out, &earlier).unwrap();

    // Full disk: the forward pass over 500 probe rows is about 40 KB of CSV, more than the
    // 28 KiB left on the tmpfs.
    let (code, stderr) = forward_into(&out);
    assert_eq!(code, Some(2), "stderr: {stderr}");
    assert!(stderr.contains("outputs.csv"), "names the file: {stderr}");
    assert!(
        stderr.contains("No space left on device"),
        "says why: {stderr}"
    );
    assert!(!stderr.contains("panicked"), "{stderr}");
    assert_eq!(
        std::fs::read(&out).unwrap(),
        earlier,
        "the earlier file is intact"
    );
    assert_eq!(
        entries(base.path()),
        vec!["outputs.csv"],
        "no temporary file is left"
    );

    // Read-only folder: the temporary file cannot even be created.
    assert!(mount.remount_read_only(), "remount read-only");
    let (code, stderr) = forward_into(&out);
    assert_eq!(code, Some(2), "stderr: {stderr}");
    assert!(stderr.contains("outputs.csv"), "names the file: {stderr}");
    assert!(
        stderr.contains("Read-only file system"),
        "says why: {stderr}"
    );
    assert_eq!(
        std::fs::read(&out).unwrap(),
        earlier,
        "the earlier file is intact"
    );
    assert_eq!(entries(base.path()), vec!["outputs.csv"]);
}

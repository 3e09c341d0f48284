//! Resolving side-file paths safely: relative to the model file, and inside its folder
//! unless the user allows otherwise; and refusing to write over a model or its side files.

use crate::error::{Error, Result};
use std::path::{Component, Path, PathBuf};

/// Resolves `rel` (as written in the model file) against `base_dir`, the model's folder.
///
/// Absolute paths and paths that climb out of the model's folder (`../x`, `a/../../x`) are
/// refused unless `allow_outside` is set; a path such as `w/../x.safetensors` that stays
/// inside is accepted. The check is lexical, on the path as written.
pub fn resolve_side_path(
    origin: &str,
    what: &str,
    base_dir: &Path,
    rel: &str,
    allow_outside: bool,
) -> Result<PathBuf> {
    if rel.is_empty() {
        return Err(Error::model(
            origin,
            format!("{what}: the side-file path is empty"),
        ));
    }
    let p = Path::new(rel);
    let mut depth: i64 = 0;
    let mut outside = false;
    for c in p.components() {
        match c {
            Component::Prefix(_) | Component::RootDir => outside = true,
            Component::CurDir => {}
            Component::ParentDir => {
                depth -= 1;
                if depth < 0 {
                    outside = true;
                }
            }
            Component::Normal(_) => depth += 1,
        }
    }
    if outside && !allow_outside {
        return Err(Error::OutsidePath {
            file: origin.to_string(),
            what: what.to_string(),
            path: rel.to_string(),
            absolute: p.is_absolute(),
        });
    }
    Ok(if p.is_absolute() {
        p.to_path_buf()
    } else {
        base_dir.join(p)
    })
}

/// True when `a` and `b` name the same existing file (or the same path).
fn same_file(a: &Path, b: &Path) -> bool {
    match (std::fs::canonicalize(a), std::fs::canonicalize(b)) {
        (Ok(x), Ok(y)) => x == y,
        _ => a == b,
    }
}

/// The safetensors side files the model file at `model` refers to, resolved against its
/// folder (best effort: an unreadable or malformed file gives none; loading reports it).
fn side_files(model: &Path) -> Vec<PathBuf> {
    let Ok(text) = std::fs::read(model) else {
        return Vec::new();
    };
    let Ok(v) = serde_json::from_slice::<serde_json::Value>(&text) else {
        return Vec::new();
    };
    let base = match model.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    };
    let mut out = Vec::new();
    for layer in v["layers"].as_array().map(Vec::as_slice).unwrap_or(&[]) {
        for key in ["weights", "bias"] {
            if let Some(rel) = layer[key]["safetensors"].as_str() {
                out.push(base.join(rel));
            }
        }
    }
    out
}

/// Refuses an output path that is the model file `model` itself or one of its side files;
/// `what` names the output in the message (an option such as `--out`, or "the chosen
/// file").
pub fn refuse_overwriting_model(model: &Path, out: &Path, what: &str) -> Result<()> {
    if same_file(model, out) {
        return Err(Error::usage(format!(
            "{}: {what} is the input model itself; choose another file (the input is never overwritten)",
            out.display()
        )));
    }
    if side_files(model).iter().any(|s| same_file(s, out)) {
        return Err(Error::usage(format!(
            "{}: {what} is a side file of the input model {}; choose another file (the input is never overwritten)",
            out.display(),
            model.display()
        )));
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn inside_paths_resolve_relative_to_the_model() {
        let b = Path::new("models");
        assert_eq!(
            resolve_side_path("m.json", "t", b, "w.safetensors", false).unwrap(),
            Path::new("models/w.safetensors")
        );
        assert!(resolve_side_path("m.json", "t", b, "w/../x.safetensors", false).is_ok());
        assert!(resolve_side_path("m.json", "t", b, "./a/b.safetensors", false).is_ok());
    }

    #[test]
    fn outside_paths_are_refused_unless_allowed() {
        let b = Path::new("models");
        for bad in ["../x.safetensors", "a/../../x.safetensors", "/etc/passwd"] {
            let e = resolve_side_path("m.json", "layer 'h1' weights", b, bad, false).unwrap_err();
            let msg = e.to_string();
            assert!(msg.contains("m.json") && msg.contains(bad), "{msg}");
            // The core names no command-line flag; each front words the way out itself.
            assert!(matches!(e, Error::OutsidePath { .. }), "{e:?}");
            assert!(!msg.contains("--"), "{msg}");
            assert!(resolve_side_path("m.json", "t", b, bad, true).is_ok());
        }
        assert!(resolve_side_path("m.json", "t", b, "", true).is_err());
    }
}

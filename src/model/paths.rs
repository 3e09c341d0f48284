//! Resolving side-file paths safely: relative to the model file, and inside its folder
//! unless the user allows otherwise.

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

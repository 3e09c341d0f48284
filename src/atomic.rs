//! Writing files so that nothing is ever half-written: a temporary file in the same folder,
//! flushed and synced, then renamed over the target.

use crate::error::{Error, Result};
use std::io::{BufWriter, Write};
use std::path::Path;

/// Writes `path` atomically: `fill` writes the whole content into a temporary file in the
/// same folder, which is then renamed over `path`. On any failure the temporary file is
/// removed and an earlier file at `path` is left untouched.
pub fn write_atomic<F>(path: &Path, fill: F) -> Result<()>
where
    F: FnOnce(&mut dyn Write) -> std::io::Result<()>,
{
    let dir = match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p,
        _ => Path::new("."),
    };
    let tmp = tempfile::Builder::new()
        .prefix(".receptor-")
        .suffix(".tmp")
        .tempfile_in(dir)
        .map_err(|e| Error::io(path, "cannot create a temporary file beside it", e))?;
    {
        let mut w = BufWriter::new(tmp.as_file());
        fill(&mut w).map_err(|e| Error::io(path, "cannot write", e))?;
        w.flush().map_err(|e| Error::io(path, "cannot write", e))?;
    }
    tmp.as_file()
        .sync_all()
        .map_err(|e| Error::io(path, "cannot write", e))?;
    tmp.persist(path)
        .map_err(|e| Error::io(path, "cannot replace", e.error))?;
    Ok(())
}

/// Convenience: writes `bytes` to `path` atomically.
pub fn write_bytes_atomic(path: &Path, bytes: &[u8]) -> Result<()> {
    write_atomic(path, |w| w.write_all(bytes))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn replaces_content_and_leaves_no_temporary() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("out.csv");
        write_bytes_atomic(&p, b"old").unwrap();
        write_bytes_atomic(&p, b"new").unwrap();
        assert_eq!(std::fs::read(&p).unwrap(), b"new");
        assert_eq!(std::fs::read_dir(dir.path()).unwrap().count(), 1);
    }

    #[test]
    fn failed_fill_keeps_earlier_file() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("out.csv");
        write_bytes_atomic(&p, b"old").unwrap();
        let err = write_atomic(&p, |w| {
            w.write_all(b"partial")?;
            Err(std::io::Error::other("disk full (simulated)"))
        })
        .unwrap_err();
        assert!(err.to_string().contains("out.csv"), "{err}");
        assert!(err.to_string().contains("disk full"), "{err}");
        assert_eq!(std::fs::read(&p).unwrap(), b"old");
        assert_eq!(std::fs::read_dir(dir.path()).unwrap().count(), 1);
    }
}

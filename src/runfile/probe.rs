//! File-level checks made before the HDF5 library sees a file: it exists, is a regular
//! non-empty file, and carries the HDF5 signature (at offset 0 or a power-of-two user-block
//! offset from 512 on). This turns "not HDF5" into a plain message instead of a library trace.

use super::RunFileError;
use std::io::{Read, Seek, SeekFrom};
use std::path::Path;

/// The 8-byte HDF5 format signature.
const SIGNATURE: [u8; 8] = [0x89, b'H', b'D', b'F', b'\r', b'\n', 0x1a, b'\n'];

/// Checks `path` is a readable, non-empty file with an HDF5 signature; returns its size.
/// `kind` names the file in messages ("run file", "IQ capture"), `format_name` is the root
/// `format` attribute of its format.
pub fn check_file(path: &Path, kind: &str, format_name: &str) -> Result<u64, RunFileError> {
    let fail = |message: String| RunFileError::File { path: path.to_path_buf(), message };
    let meta = std::fs::metadata(path).map_err(|e| match e.kind() {
        std::io::ErrorKind::NotFound => fail("file does not exist".into()),
        _ => fail(format!("cannot read file: {e}")),
    })?;
    if meta.is_dir() {
        return Err(fail(format!("is a directory, not a {kind}")));
    }
    let size = meta.len();
    if size == 0 {
        return Err(fail("file is empty (0 bytes): an interrupted write?".into()));
    }
    let mut file = std::fs::File::open(path).map_err(|e| fail(format!("cannot read file: {e}")))?;
    let mut offset = 0u64;
    while offset + SIGNATURE.len() as u64 <= size {
        let mut buf = [0u8; 8];
        file.seek(SeekFrom::Start(offset)).and_then(|_| file.read_exact(&mut buf)).map_err(|e| fail(format!("cannot read file: {e}")))?;
        if buf == SIGNATURE {
            return Ok(size);
        }
        offset = if offset == 0 { 512 } else { offset * 2 };
    }
    Err(fail(format!("is not an HDF5 file (no HDF5 signature in its {size} bytes); {kind}s are HDF5, format \"{format_name}\"")))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::runfile::FORMAT_NAME as FORMAT;

    const RUN: &str = "run file";

    #[test]
    fn refuses_missing_empty_and_foreign_files() {
        let dir = tempfile::tempdir().unwrap();
        let missing = check_file(&dir.path().join("none.h5"), RUN, FORMAT).unwrap_err().to_string();
        assert!(missing.contains("none.h5") && missing.contains("does not exist"), "{missing}");
        let empty = dir.path().join("empty.h5");
        std::fs::write(&empty, b"").unwrap();
        assert!(check_file(&empty, RUN, FORMAT).unwrap_err().to_string().contains("empty"));
        let text = dir.path().join("notes.h5");
        std::fs::write(&text, vec![b'x'; 5000]).unwrap();
        assert!(check_file(&text, RUN, FORMAT).unwrap_err().to_string().contains("not an HDF5 file"));
        assert!(check_file(dir.path(), RUN, FORMAT).unwrap_err().to_string().contains("directory"));
    }

    #[test]
    fn finds_the_signature_after_a_user_block() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("ub.h5");
        let mut bytes = vec![0u8; 1024];
        bytes.extend_from_slice(&SIGNATURE);
        std::fs::write(&p, &bytes).unwrap();
        assert_eq!(check_file(&p, RUN, FORMAT).unwrap(), 1032);
    }
}

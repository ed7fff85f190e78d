//! What determines a transcript, hashed: `--resume` only skips items decoded the same way.

use std::fs::File;
use std::io::Read;
use std::path::Path;

use sha2::{Digest, Sha256};

use crate::BatchError;

/// A SHA-256 over the files and settings that determine a transcript.
pub struct Fingerprint(Sha256);

impl Default for Fingerprint {
    fn default() -> Self {
        Fingerprint::new()
    }
}

impl Fingerprint {
    /// An empty fingerprint.
    pub fn new() -> Self {
        Fingerprint(Sha256::new())
    }

    /// Mixes in a file's content (not its name).
    pub fn file(&mut self, path: &Path) -> Result<(), BatchError> {
        let io = |action, source| BatchError::Io {
            path: path.to_path_buf(),
            action,
            source,
        };
        let mut file = File::open(path).map_err(|e| io("open", e))?;
        let mut buffer = vec![0u8; 1 << 16];
        loop {
            let n = file.read(&mut buffer).map_err(|e| io("read", e))?;
            if n == 0 {
                break;
            }
            self.0.update(&buffer[..n]);
        }
        self.0.update([0xff]);
        Ok(())
    }

    /// Mixes in a setting.
    pub fn text(&mut self, text: &str) {
        self.0.update(text.as_bytes());
        self.0.update([0xff]);
    }

    /// The hex digest.
    pub fn finish(self) -> String {
        self.0
            .finalize()
            .iter()
            .map(|b| format!("{b:02x}"))
            .collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn content_and_settings_change_the_fingerprint_names_do_not() {
        let dir = tempfile::tempdir().unwrap();
        let (a, b) = (dir.path().join("a.bin"), dir.path().join("b.bin"));
        std::fs::write(&a, "weights").unwrap();
        std::fs::write(&b, "weights").unwrap();
        let of = |path: &Path, setting: &str| {
            let mut f = Fingerprint::new();
            f.file(path).unwrap();
            f.text(setting);
            f.finish()
        };
        assert_eq!(of(&a, "beam 16"), of(&b, "beam 16"));
        assert_ne!(of(&a, "beam 16"), of(&a, "beam 8"));
        std::fs::write(&b, "other weights").unwrap();
        assert_ne!(of(&a, "beam 16"), of(&b, "beam 16"));
        // SHA-256 of the empty input (FIPS 180-4 test vector), for the empty fingerprint.
        assert_eq!(
            Fingerprint::new().finish(),
            "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855"
        );
        let error = Fingerprint::new()
            .file(&dir.path().join("missing.bin"))
            .unwrap_err()
            .to_string();
        assert!(
            error.contains("missing.bin") && error.contains("cannot open"),
            "{error}"
        );
    }
}

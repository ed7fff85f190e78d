//! Shared wiring of the commands that read a transcript JSON (`review`, `calibrate`,
//! `shortlist`): finding the audio a transcript names, and speaker and dialect labels from a
//! manifest.

use std::collections::HashMap;
use std::path::{Path, PathBuf};

use isogloss_corpus::Manifest;

/// The audio file a transcript names. `transcribe` writes the path as it was given, relative to
/// the folder it ran in; so a relative path is taken from the current folder when it exists
/// there, else from the transcript's folder. `root` overrides both.
pub fn resolve_audio(transcript: &Path, root: Option<&Path>, audio: &str) -> PathBuf {
    let path = Path::new(audio);
    if path.is_absolute() {
        return path.to_path_buf();
    }
    if let Some(root) = root {
        return root.join(path);
    }
    if path.exists() {
        return path.to_path_buf();
    }
    transcript
        .parent()
        .map_or_else(|| path.to_path_buf(), |folder| folder.join(path))
}

/// Speaker and dialect of every manifest row, by id.
pub fn labels(manifest: &Manifest) -> HashMap<String, (String, String)> {
    manifest
        .utterances
        .iter()
        .map(|u| (u.id.clone(), (u.speaker.clone(), u.dialect.clone())))
        .collect()
}

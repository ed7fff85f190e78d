//! End-to-end: `isogloss features AUDIO --out OUT.safetensors [--config FILE]`.

use std::path::{Path, PathBuf};
use std::process::Command;

use isogloss_features::read_features;

fn repository() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../..")
}

/// Runs `isogloss features ARGS…`.
fn isogloss_features(args: &[&std::ffi::OsStr]) -> std::process::Output {
    Command::new(env!("CARGO_BIN_EXE_isogloss"))
        .arg("features")
        .args(args)
        .output()
        .unwrap()
}

#[test]
fn writes_the_default_features_of_a_wav_file() {
    let dir = tempfile::tempdir().unwrap();
    let wav = repository().join("tests/fixtures/features/speech.wav");
    for (config, reference) in [
        (None, "reference-mfcc.safetensors"),
        (
            Some("configs/features-logmel.toml"),
            "reference-logmel.safetensors",
        ),
    ] {
        let out = dir.path().join("speech.safetensors");
        let mut args = vec![wav.as_os_str(), "--out".as_ref(), out.as_os_str()];
        let config_path = config.map(|c| repository().join(c));
        if let Some(path) = &config_path {
            args.extend(["--config".as_ref(), path.as_os_str()]);
        }
        let output = isogloss_features(&args);
        assert!(
            output.status.success(),
            "{}",
            String::from_utf8_lossy(&output.stderr)
        );
        let ours = read_features(&out).unwrap();
        let expected =
            read_features(&repository().join("tests/fixtures/features").join(reference)).unwrap();
        assert_eq!(ours.dim(), expected.dim());
        // Reference: numpy/scipy/librosa (scripts/reference/features_reference.py); the library's
        // own test holds the 1e-3 relative bound, here a loose absolute one shows the wiring.
        let worst = ours
            .iter()
            .zip(&expected)
            .map(|(a, b)| (a - b).abs())
            .fold(0.0, f32::max);
        assert!(worst < 1e-2, "{reference}: {worst}");
    }
}

#[test]
fn bad_input_is_a_clear_error_with_exit_code_1() {
    let dir = tempfile::tempdir().unwrap();
    let text = dir.path().join("notes.wav");
    std::fs::write(&text, "this is not audio").unwrap();
    let out = dir.path().join("x.safetensors");
    let output = isogloss_features(&[text.as_os_str(), "--out".as_ref(), out.as_os_str()]);
    assert_eq!(output.status.code(), Some(1));
    assert!(String::from_utf8_lossy(&output.stderr).contains("notes.wav"));
    assert!(!out.exists());

    let config = dir.path().join("bad.toml");
    std::fs::write(&config, "kind = \"mfcc\"\nmel_filters = \"forty\"\n").unwrap();
    let wav = repository().join("tests/fixtures/features/speech.wav");
    let output = isogloss_features(&[
        wav.as_os_str(),
        "--out".as_ref(),
        out.as_os_str(),
        "--config".as_ref(),
        config.as_os_str(),
    ]);
    assert_eq!(output.status.code(), Some(1));
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert!(
        stderr.contains("bad.toml") && stderr.contains("line 2"),
        "{stderr}"
    );
}

/// A config in the previous release's spellings gives the same features, with one deprecation
/// warning per old spelling that names the file.
#[test]
fn old_config_spellings_still_work_with_a_warning() {
    let dir = tempfile::tempdir().unwrap();
    let new = std::fs::read_to_string(repository().join("configs/features-logmel.toml")).unwrap();
    let mut old = new.replace("kind = \"logmel\"", "kind = \"fbank\"");
    for (old_key, new_key) in isogloss_features::DEPRECATED_KEYS {
        old = old.replace(&format!("\n{new_key} "), &format!("\n{old_key} "));
    }
    let config = dir.path().join("old.toml");
    std::fs::write(&config, old).unwrap();
    let wav = repository().join("tests/fixtures/features/speech.wav");
    let out = dir.path().join("old.safetensors");
    let output = isogloss_features(&[
        wav.as_os_str(),
        "--out".as_ref(),
        out.as_os_str(),
        "--config".as_ref(),
        config.as_os_str(),
    ]);
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert!(output.status.success(), "{stderr}");
    let warnings: Vec<&str> = stderr
        .lines()
        .filter(|l| l.starts_with("warning:") && l.contains("old.toml") && l.contains("deprecated"))
        .collect();
    // 8 renamed keys and kind = "fbank"
    assert_eq!(warnings.len(), 9, "{stderr}");
    assert!(
        stderr.contains("`frame_length` is deprecated; write `window_samples`"),
        "{stderr}"
    );
    let expected =
        read_features(&repository().join("tests/fixtures/features/reference-logmel.safetensors"))
            .unwrap();
    assert_eq!(read_features(&out).unwrap().dim(), expected.dim());
}

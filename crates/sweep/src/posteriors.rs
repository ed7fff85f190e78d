//! Acoustic posteriors computed once per model and utterance, cached on disk.
//!
//! The cache is keyed by content, not by file names or dates: a model's key hashes its weights
//! and its `model.toml`; an entry's key hashes the model key and the audio of the utterances it
//! holds. Entries hold one speaker's utterances, because features are normalized per speaker
//! (CMVN): changing one recording changes the posteriors of that speaker's other utterances too,
//! and of nobody else's. So a changed model recomputes everything, a changed recording exactly
//! its speaker's utterances, and an unchanged sweep nothing.
//!
//! An utterance has one posterior matrix per reading the decoder chooses from (the candidates
//! of the model's test-time search, most confident first; one without a search); an entry
//! names reading `k` of utterance `id` as `k<TAB>id`.

use std::collections::{BTreeMap, HashMap};
use std::path::{Path, PathBuf};

use isogloss_acoustic::AcousticModel;
use isogloss_corpus::{Manifest, Utterance};
use ndarray::Array2;
use safetensors::tensor::{Dtype, TensorView};

use crate::resources::ContentKey;
use crate::SweepError;

/// Posteriors of every utterance of a manifest that could be computed, by utterance id, and the
/// utterances that failed with their messages.
pub struct Posteriors {
    /// Each reading's `[frames, units]` natural-log posteriors, the most confident first, by
    /// utterance id (never an empty list).
    pub by_id: HashMap<String, Vec<Array2<f32>>>,
    /// Utterances whose audio or features failed: `(id, message)`.
    pub failed: Vec<(String, String)>,
    /// How many utterances went through the acoustic model in this call (0 when all were
    /// cached).
    pub computed: usize,
    /// Seconds spent computing features and posteriors in this call.
    pub seconds: f64,
    /// Content key of the whole set (model and every utterance's audio): what decoded results
    /// depend on.
    pub key: String,
}

/// The content key of a model directory.
pub fn model_key(dir: &Path) -> Result<String, SweepError> {
    let mut key = ContentKey::new();
    key.text("model v2");
    key.file(&dir.join("model.safetensors"))?;
    key.file(&dir.join("model.toml"))?;
    Ok(key.finish())
}

/// Posteriors of every utterance of `manifest` under `model`, through the cache in `cache_dir`.
pub fn posteriors(
    model: &AcousticModel,
    model_key: &str,
    manifest: &Manifest,
    cache_dir: &Path,
) -> Result<Posteriors, SweepError> {
    let started = std::time::Instant::now();
    let dir = cache_dir.join(model_key);
    std::fs::create_dir_all(&dir).map_err(|source| SweepError::Io {
        path: dir.clone(),
        source,
    })?;
    let mut audio_keys: HashMap<PathBuf, String> = HashMap::new();
    let mut by_speaker: BTreeMap<&str, Vec<&Utterance>> = BTreeMap::new();
    for utterance in &manifest.utterances {
        by_speaker
            .entry(utterance.speaker.as_str())
            .or_default()
            .push(utterance);
    }
    let mut result = Posteriors {
        by_id: HashMap::new(),
        failed: Vec::new(),
        computed: 0,
        seconds: 0.0,
        key: String::new(),
    };
    let mut set_key = ContentKey::new();
    let mut missing: Vec<(PathBuf, Vec<&Utterance>)> = Vec::new();
    for (speaker, utterances) in by_speaker {
        let mut key = ContentKey::new();
        key.text(model_key);
        key.text(speaker);
        for utterance in &utterances {
            if !audio_keys.contains_key(&utterance.audio) {
                let mut audio = ContentKey::new();
                // An unreadable file is reported by the acoustic pass, with its line.
                if audio.file(&utterance.audio).is_err() {
                    audio.text("unreadable");
                }
                audio_keys.insert(utterance.audio.clone(), audio.finish());
            }
            key.text(&utterance.id);
            key.text(&audio_keys[&utterance.audio]);
            key.text(&format!("{:?} {:?}", utterance.start, utterance.end));
        }
        let entry_key = key.finish();
        set_key.text(&entry_key);
        let path = dir.join(format!("{entry_key}.safetensors"));
        match read_entry(&path) {
            Some(entry) if utterances.iter().all(|u| entry.contains_key(&u.id)) => {
                result.by_id.extend(entry);
            }
            _ => missing.push((path, utterances)),
        }
    }
    if !missing.is_empty() {
        let subset = Manifest {
            path: manifest.path.clone(),
            transcript_columns: manifest.transcript_columns.clone(),
            utterances: missing
                .iter()
                .flat_map(|(_, utterances)| utterances.iter().map(|&u| u.clone()))
                .collect(),
        };
        let computed = isogloss_acoustic::pipeline::manifest_posteriors(model, &subset, &|_, _| {})
            .map_err(|e| SweepError::Build(e.to_string()))?;
        result.computed = subset.utterances.len();
        let mut computed: HashMap<String, Result<Vec<Array2<f32>>, String>> = subset
            .utterances
            .iter()
            .map(|u| u.id.clone())
            .zip(computed)
            .collect();
        for (path, utterances) in missing {
            let mut entry = Vec::new();
            let mut complete = true;
            for utterance in utterances {
                match computed.remove(&utterance.id) {
                    Some(Ok(posteriors)) => entry.push((utterance.id.clone(), posteriors)),
                    Some(Err(message)) => {
                        complete = false;
                        result.failed.push((utterance.id.clone(), message));
                    }
                    None => complete = false,
                }
            }
            // A speaker with a failed utterance is not cached: the next run tries again.
            if complete {
                write_entry(&path, &entry)?;
            }
            result.by_id.extend(entry);
        }
    }
    result.seconds = started.elapsed().as_secs_f64();
    result.key = set_key.finish();
    Ok(result)
}

fn read_entry(path: &Path) -> Option<HashMap<String, Vec<Array2<f32>>>> {
    let bytes = std::fs::read(path).ok()?;
    let tensors = safetensors::SafeTensors::deserialize(&bytes).ok()?;
    let mut readings: BTreeMap<(String, usize), Array2<f32>> = BTreeMap::new();
    for (name, view) in tensors.tensors() {
        let (k, id) = name.split_once('\t')?;
        let k: usize = k.parse().ok()?;
        let shape = view.shape();
        if view.dtype() != Dtype::F32 || shape.len() != 2 {
            return None;
        }
        let values: Vec<f32> = view
            .data()
            .chunks_exact(4)
            .map(|b| f32::from_le_bytes([b[0], b[1], b[2], b[3]]))
            .collect();
        readings.insert(
            (id.to_string(), k),
            Array2::from_shape_vec((shape[0], shape[1]), values).ok()?,
        );
    }
    let mut entry: HashMap<String, Vec<Array2<f32>>> = HashMap::new();
    // In (id, k) order, so each list fills in reading order; a gap makes the entry unusable.
    for ((id, k), posteriors) in readings {
        let list = entry.entry(id).or_default();
        if list.len() != k {
            return None;
        }
        list.push(posteriors);
    }
    Some(entry)
}

fn write_entry(path: &Path, entry: &[(String, Vec<Array2<f32>>)]) -> Result<(), SweepError> {
    let buffers: Vec<(String, Vec<u8>, Vec<usize>)> = entry
        .iter()
        .flat_map(|(id, readings)| {
            readings.iter().enumerate().map(move |(k, posteriors)| {
                let bytes = posteriors.iter().flat_map(|v| v.to_le_bytes()).collect();
                (format!("{k}\t{id}"), bytes, posteriors.shape().to_vec())
            })
        })
        .collect();
    let views: Vec<(String, TensorView<'_>)> = buffers
        .iter()
        .map(|(id, bytes, shape)| {
            TensorView::new(Dtype::F32, shape.clone(), bytes)
                .map(|view| (id.clone(), view))
                .map_err(|e| SweepError::Build(format!("{}: {e}", path.display())))
        })
        .collect::<Result<_, _>>()?;
    let bytes = safetensors::serialize(views, None)
        .map_err(|e| SweepError::Build(format!("{}: {e}", path.display())))?;
    let temporary = path.with_extension("tmp");
    std::fs::write(&temporary, bytes)
        .and_then(|()| std::fs::rename(&temporary, path))
        .map_err(|source| SweepError::Io {
            path: path.to_path_buf(),
            source,
        })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Every reading of every utterance comes back in its order; an entry with a reading
    /// missing in the middle is not used (the cache recomputes it).
    #[test]
    fn an_entry_keeps_each_utterances_readings_in_order() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("entry.safetensors");
        let reading = |k: f32, frames: usize| {
            Array2::from_shape_fn((frames, 3), |(t, u)| k + (t * 3 + u) as f32)
        };
        let entry = vec![
            (
                "a".to_string(),
                vec![reading(0.0, 2), reading(10.0, 2), reading(20.0, 1)],
            ),
            ("b\twith a tab".to_string(), vec![reading(30.0, 0)]),
        ];
        write_entry(&path, &entry).unwrap();
        let read = read_entry(&path).unwrap();
        assert_eq!(read.len(), 2);
        for (id, readings) in &entry {
            assert_eq!(&read[id], readings, "{id}");
        }
        // Readings 0 and 2 only: a gap.
        let views = [("0\ta", reading(0.0, 1)), ("2\ta", reading(2.0, 1))];
        let buffers: Vec<(String, Vec<u8>, Vec<usize>)> = views
            .iter()
            .map(|(name, m)| {
                let bytes = m.iter().flat_map(|v| v.to_le_bytes()).collect();
                (name.to_string(), bytes, m.shape().to_vec())
            })
            .collect();
        let tensors: Vec<(String, TensorView<'_>)> = buffers
            .iter()
            .map(|(name, bytes, shape)| {
                (
                    name.clone(),
                    TensorView::new(Dtype::F32, shape.clone(), bytes).unwrap(),
                )
            })
            .collect();
        std::fs::write(&path, safetensors::serialize(tensors, None).unwrap()).unwrap();
        assert!(read_entry(&path).is_none());
    }
}

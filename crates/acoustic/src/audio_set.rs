//! Training audio kept as 16-bit PCM in one cache file, and features computed from it afresh in
//! every epoch: speed perturbation, waveform augmentation, feature extraction, normalisation and
//! SpecAugment happen per utterance and epoch (on the fly), never as cached perturbed copies.
//!
//! Why a PCM file and not features: augmentation that models rooms, noise and channels works on
//! the waveform, and an utterance should look different in every epoch. Decoding compressed audio
//! every epoch would cost more than training; decoded PCM costs 115 MB per hour of speech on disk,
//! read back through the operating system's page cache (so a corpus larger than memory still
//! trains, at the disk's speed), and a resumed run reuses it.
//!
//! The file `NAME.pcm` holds the utterances' samples back to back (little-endian `i16`, 16 kHz);
//! `NAME.pcm.json` indexes it (id, first sample, length) and names the manifest digest it was made
//! from. The index is written after the samples, both atomically, so an index exists only for a
//! complete file.

use std::collections::BTreeMap;
use std::fs::File;
use std::io::{BufWriter, Read, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};
use std::sync::Mutex;

use isogloss_audio::augment::{Augmenter, BabbleSource};
use isogloss_corpus::Manifest;
use isogloss_features::{Cmvn, CmvnMode, FeatureConfig, FeatureExtractor, SpecAugment, VtlpConfig};
use isogloss_speaker::IvectorExtractor;
use ndarray::{concatenate, Array2, Axis};
use rand::Rng;
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;
use serde::{Deserialize, Serialize};

use crate::data::TrainingData;
use crate::pipeline::SegmentReader;
use crate::speaker_vectors::online_vectors;
use crate::AcousticError;

/// Full scale of the stored 16-bit samples.
const FULL_SCALE: f32 = 32_767.0;

/// Files decoded in parallel before their samples are appended to the cache file (bounds the
/// memory the build needs, whatever the corpus size).
const FILES_PER_ROUND: usize = 64;

#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
struct IndexEntry {
    id: String,
    first: u64,
    samples: u64,
}

#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
struct Index {
    manifest_sha256: String,
    entries: Vec<IndexEntry>,
}

/// Decoded utterances of one manifest in a PCM cache file.
pub struct PcmStore {
    path: PathBuf,
    file: Mutex<File>,
    /// By manifest row: where the utterance's samples are, or `None` when its audio failed.
    entries: Vec<Option<(u64, u64)>>,
}

/// What [`PcmStore::open_or_build`] could not decode: manifest row and message.
pub type DecodeFailures = Vec<(usize, String)>;

impl PcmStore {
    /// Opens the cache at `path` made from this manifest (same digest), or decodes every
    /// utterance of `manifest` into it. Utterances whose audio fails are listed with their error
    /// and left out; the others are unaffected. `on_file_done(done, total)` reports progress.
    pub fn open_or_build(
        path: &Path,
        manifest: &Manifest,
        manifest_sha256: &str,
        on_file_done: &(dyn Fn(usize, usize) + Sync),
    ) -> Result<(PcmStore, DecodeFailures), AcousticError> {
        Self::open_or_build_with(
            path,
            manifest,
            manifest_sha256,
            &isogloss_audio::read_segments,
            on_file_done,
        )
    }

    /// [`PcmStore::open_or_build`] with `read` decoding each audio file's segments (what tests
    /// replace to make one file fail or panic). A panic inside `read` is that file's failure.
    pub fn open_or_build_with(
        path: &Path,
        manifest: &Manifest,
        manifest_sha256: &str,
        read: &SegmentReader<'_>,
        on_file_done: &(dyn Fn(usize, usize) + Sync),
    ) -> Result<(PcmStore, DecodeFailures), AcousticError> {
        let index_path = index_path(path);
        let io = |path: &Path| {
            let path = path.to_path_buf();
            move |source| AcousticError::Io { path, source }
        };
        if let Ok(text) = std::fs::read_to_string(&index_path) {
            if let Ok(index) = serde_json::from_str::<Index>(&text) {
                if index.manifest_sha256 == manifest_sha256 {
                    if let Some(store) = Self::from_index(path, manifest, &index)? {
                        return Ok(store);
                    }
                }
            }
        }
        if let Some(dir) = path.parent() {
            std::fs::create_dir_all(dir).map_err(io(dir))?;
        }
        let mut by_file: BTreeMap<&Path, Vec<usize>> = BTreeMap::new();
        for (i, utterance) in manifest.utterances.iter().enumerate() {
            by_file
                .entry(utterance.audio.as_path())
                .or_default()
                .push(i);
        }
        let files: Vec<(&Path, Vec<usize>)> = by_file.into_iter().collect();
        let temporary = path.with_extension("pcm.partial");
        let mut writer = BufWriter::new(File::create(&temporary).map_err(io(&temporary))?);
        let mut entries = Vec::new();
        let mut failures = Vec::new();
        let mut next = 0u64;
        let mut done = 0;
        for round in files.chunks(FILES_PER_ROUND) {
            let decoded: Vec<Vec<DecodedRow>> = round
                .par_iter()
                .map(|(audio, rows)| decode_file(manifest, audio, rows, read))
                .collect();
            for (row, result) in decoded.into_iter().flatten() {
                match result {
                    Ok(samples) => {
                        let bytes: Vec<u8> = samples.iter().flat_map(|s| s.to_le_bytes()).collect();
                        writer.write_all(&bytes).map_err(io(&temporary))?;
                        entries.push(IndexEntry {
                            id: manifest.utterances[row].id.clone(),
                            first: next,
                            samples: samples.len() as u64,
                        });
                        next += samples.len() as u64;
                    }
                    Err(message) => failures.push((row, message)),
                }
            }
            done += round.len();
            on_file_done(done, files.len());
        }
        writer.flush().map_err(io(&temporary))?;
        writer
            .into_inner()
            .map_err(|e| AcousticError::Io {
                path: temporary.clone(),
                source: e.into_error(),
            })?
            .sync_all()
            .map_err(io(&temporary))?;
        std::fs::rename(&temporary, path).map_err(io(path))?;
        let index = Index {
            manifest_sha256: manifest_sha256.to_string(),
            entries,
        };
        let text = serde_json::to_string(&index)
            .map_err(|e| AcousticError::Config(format!("PCM index does not serialise: {e}")))?;
        crate::io::write_atomically(&index_path, text.as_bytes())?;
        let store =
            Self::from_index(path, manifest, &index)?.ok_or_else(|| AcousticError::Input {
                path: path.to_path_buf(),
                problem: "the PCM cache just written does not match its index".into(),
            })?;
        Ok((store.0, failures))
    }

    /// The store described by `index`, or `None` when the file does not match it (then it is
    /// rebuilt). Rows of the manifest missing from the index are reported as failures.
    fn from_index(
        path: &Path,
        manifest: &Manifest,
        index: &Index,
    ) -> Result<Option<(PcmStore, DecodeFailures)>, AcousticError> {
        let Ok(file) = File::open(path) else {
            return Ok(None);
        };
        let length = file
            .metadata()
            .map_err(|source| AcousticError::Io {
                path: path.to_path_buf(),
                source,
            })?
            .len();
        let total: u64 = index.entries.iter().map(|e| e.samples).sum();
        if total * 2 != length {
            return Ok(None);
        }
        let by_id: BTreeMap<&str, &IndexEntry> =
            index.entries.iter().map(|e| (e.id.as_str(), e)).collect();
        let mut entries = Vec::with_capacity(manifest.utterances.len());
        let mut failures = Vec::new();
        for (row, utterance) in manifest.utterances.iter().enumerate() {
            match by_id.get(utterance.id.as_str()) {
                Some(entry) => entries.push(Some((entry.first, entry.samples))),
                None => {
                    failures.push((
                        row,
                        format!(
                            "{}, line {} ({}): the audio could not be decoded when the cache was built",
                            manifest.path.display(),
                            utterance.line,
                            utterance.id
                        ),
                    ));
                    entries.push(None);
                }
            }
        }
        Ok(Some((
            PcmStore {
                path: path.to_path_buf(),
                file: Mutex::new(file),
                entries,
            },
            failures,
        )))
    }

    /// Number of samples of manifest row `row`, or `None` when its audio failed.
    pub fn sample_count(&self, row: usize) -> Option<usize> {
        self.entries
            .get(row)
            .copied()
            .flatten()
            .map(|(_, count)| count as usize)
    }

    /// Samples of manifest row `row` in [−1, 1], or `None` when its audio failed.
    pub fn samples(&self, row: usize) -> Result<Option<Vec<f32>>, AcousticError> {
        let Some((first, count)) = self.entries.get(row).copied().flatten() else {
            return Ok(None);
        };
        let mut bytes = vec![0u8; count as usize * 2];
        {
            let mut file = self
                .file
                .lock()
                .map_err(|_| AcousticError::Config("PCM cache lock poisoned".into()))?;
            let io = |source| AcousticError::Io {
                path: self.path.clone(),
                source,
            };
            file.seek(SeekFrom::Start(first * 2)).map_err(io)?;
            file.read_exact(&mut bytes).map_err(io)?;
        }
        Ok(Some(
            bytes
                .chunks_exact(2)
                .map(|b| f32::from(i16::from_le_bytes([b[0], b[1]])) / FULL_SCALE)
                .collect(),
        ))
    }
}

fn index_path(path: &Path) -> PathBuf {
    let mut name = path.as_os_str().to_owned();
    name.push(".json");
    PathBuf::from(name)
}

/// A manifest row and its 16-bit samples, or why they could not be read.
type DecodedRow = (usize, Result<Vec<i16>, String>);

fn decode_file(
    manifest: &Manifest,
    audio: &Path,
    rows: &[usize],
    read: &SegmentReader<'_>,
) -> Vec<DecodedRow> {
    let segments: Vec<_> = rows
        .iter()
        .map(|&i| manifest.utterances[i].segment())
        .collect();
    let item = |i: usize| {
        let u = &manifest.utterances[i];
        format!("{}, line {} ({})", manifest.path.display(), u.line, u.id)
    };
    // A panic while decoding one file is that file's failure, not the end of training.
    match isogloss_audio::isolated(audio, || read(audio, &segments)) {
        Ok(decoded) => rows
            .iter()
            .zip(decoded)
            .map(|(&i, samples)| {
                if samples.iter().any(|s| !s.is_finite()) {
                    return (
                        i,
                        Err(format!("{}: the audio holds non-finite samples", item(i))),
                    );
                }
                let pcm = samples
                    .iter()
                    .map(|s| (s * FULL_SCALE).round().clamp(-FULL_SCALE, FULL_SCALE) as i16)
                    .collect();
                (i, Ok(pcm))
            })
            .collect(),
        Err(e) => rows
            .iter()
            .map(|&i| (i, Err(format!("{}: {e}", item(i)))))
            .collect(),
    }
}

/// How one epoch's version of an utterance is made from its samples.
pub struct Perturbation {
    /// Speed factors drawn uniformly (1.0 = unchanged).
    pub speed_factors: Vec<f32>,
    /// Room, noise, band and gain steps, if any can be drawn.
    pub waveform: Option<Augmenter>,
    /// Vocal-tract length perturbation of the mel filters.
    pub vtlp: VtlpConfig,
    /// SpecAugment masks after normalisation, with the number of Δ blocks.
    pub masks: Option<(SpecAugment, usize)>,
}

/// One training utterance of an [`AudioSet`].
pub struct AudioUtterance {
    /// Utterance id.
    pub id: String,
    /// Manifest row (index into the store).
    pub row: usize,
    /// Speaker (for per-speaker normalisation).
    pub speaker: String,
    /// Unit indices (no blank).
    pub labels: Vec<u32>,
    /// Frames of the unperturbed features.
    pub frames: usize,
}

/// Training utterances whose features are computed from their PCM samples in every epoch.
pub struct AudioSet {
    store: PcmStore,
    utterances: Vec<AudioUtterance>,
    extractor: FeatureExtractor,
    cmvn: CmvnMode,
    unit_variance: bool,
    speaker_cmvn: BTreeMap<String, Cmvn>,
    perturbation: Perturbation,
    speaker_vectors: Option<IvectorExtractor>,
}

impl AudioSet {
    /// A set over `utterances` of `store`; `speaker_cmvn` holds per-speaker statistics (of the
    /// unperturbed audio) when the front end normalises per speaker.
    pub fn new(
        store: PcmStore,
        utterances: Vec<AudioUtterance>,
        features: &FeatureConfig,
        speaker_cmvn: BTreeMap<String, Cmvn>,
        perturbation: Perturbation,
    ) -> Result<Self, AcousticError> {
        Ok(AudioSet {
            store,
            utterances,
            extractor: FeatureExtractor::new(features)?,
            cmvn: features.cmvn,
            unit_variance: features.unit_variance,
            speaker_cmvn,
            perturbation,
            speaker_vectors: None,
        })
    }

    /// Appends to every epoch's features the online speaker vector of each frame, computed from
    /// that epoch's features before the masks ([`crate::speaker_vectors`]).
    pub fn set_speaker_vectors(&mut self, extractor: IvectorExtractor) {
        self.speaker_vectors = Some(extractor);
    }

    /// Id, speaker and unperturbed normalised features of every utterance (what the i-vector
    /// extractor is trained on), computed in parallel.
    pub fn clean_training_features(
        &self,
    ) -> Result<crate::speaker_vectors::TrainingFeatures, AcousticError> {
        (0..self.utterances.len())
            .into_par_iter()
            .map(|i| {
                let utterance = &self.utterances[i];
                Ok((
                    utterance.id.clone(),
                    utterance.speaker.clone(),
                    self.clean_features(i)?,
                ))
            })
            .collect()
    }

    /// The unperturbed, normalised features of utterance `index` (what the i-vector extractor
    /// is trained on).
    fn clean_features(&self, index: usize) -> Result<Array2<f32>, AcousticError> {
        let utterance = &self.utterances[index];
        let samples = self.store.samples(utterance.row)?.unwrap_or_default();
        let mut matrix = self.extractor.extract(&samples);
        self.normalise(&mut matrix, utterance);
        Ok(matrix)
    }

    fn normalise(&self, matrix: &mut Array2<f32>, utterance: &AudioUtterance) {
        let cmvn = match self.cmvn {
            CmvnMode::None => None,
            CmvnMode::Utterance => {
                Cmvn::from_features(matrix, self.unit_variance, &utterance.id).ok()
            }
            CmvnMode::Speaker => self.speaker_cmvn.get(&utterance.speaker).cloned(),
        };
        if let Some(cmvn) = cmvn {
            // Shapes agree by construction (same extractor); an error here would be a bug.
            let _ = cmvn.apply(matrix, &utterance.id);
        }
    }
}

/// Babble talkers are the other training utterances (read from the PCM cache when drawn).
impl BabbleSource for AudioSet {
    fn utterance_count(&self) -> usize {
        self.utterances.len()
    }

    fn utterance(&self, index: usize) -> Option<std::borrow::Cow<'_, [f32]>> {
        let row = self.utterances.get(index)?.row;
        self.store
            .samples(row)
            .ok()
            .flatten()
            .map(std::borrow::Cow::Owned)
    }
}

impl TrainingData for AudioSet {
    fn len(&self) -> usize {
        self.utterances.len()
    }

    fn id(&self, index: usize) -> &str {
        &self.utterances[index].id
    }

    fn labels(&self, index: usize) -> &[u32] {
        &self.utterances[index].labels
    }

    fn frames(&self, index: usize) -> usize {
        self.utterances[index].frames
    }

    fn features(
        &self,
        index: usize,
        rng: &mut ChaCha8Rng,
        fits: &dyn Fn(usize) -> bool,
    ) -> Array2<f32> {
        let utterance = &self.utterances[index];
        let perturbation = &self.perturbation;
        // The store was checked when the set was made; a read error now (the cache deleted
        // under a running job) leaves the utterance silent for this epoch rather than stopping
        // the run.
        let clean = self
            .store
            .samples(utterance.row)
            .ok()
            .flatten()
            .unwrap_or_default();
        let factor = if perturbation.speed_factors.is_empty() {
            1.0
        } else {
            perturbation.speed_factors[rng.random_range(0..perturbation.speed_factors.len())]
        };
        let mut samples = if factor != 1.0 {
            let perturbed = isogloss_audio::speed_perturb(&clean, f64::from(factor));
            if fits(self.extractor.config().frame_count(perturbed.len())) {
                perturbed
            } else {
                clean
            }
        } else {
            clean
        };
        if let Some(augmenter) = &perturbation.waveform {
            // A failed step (no babble talker could be read) leaves the utterance as it is.
            let _ = augmenter.apply(&mut samples, rng, Some(self as &dyn BabbleSource));
        }
        let warp = perturbation.vtlp.draw(rng).and_then(|factor| {
            perturbation
                .vtlp
                .warp(factor, self.extractor.config().sample_rate)
                .ok()
        });
        let mut matrix = match warp {
            Some(warp) => self
                .extractor
                .extract_warped(&samples, &warp)
                .unwrap_or_else(|_| self.extractor.extract(&samples)),
            None => self.extractor.extract(&samples),
        };
        self.normalise(&mut matrix, utterance);
        // The vectors see the features as perturbed in this epoch, not the masks.
        let vectors = self
            .speaker_vectors
            .as_ref()
            .map(|extractor| online_vectors(extractor, &utterance.id, matrix.view()));
        if let Some((spec, blocks)) = &perturbation.masks {
            spec.apply_blocks(&mut matrix, *blocks, rng);
        }
        match vectors {
            None => matrix,
            // Features the extractor refuses (a non-finite value) get non-finite vectors: the
            // batch's loss is then not finite, and the batch is skipped and reported with its
            // utterances, as a non-finite feature would be without speaker vectors.
            Some(vectors) => {
                let dimension = self
                    .speaker_vectors
                    .as_ref()
                    .map_or(0, IvectorExtractor::output_dimension);
                let vectors = vectors
                    .unwrap_or_else(|_| Array2::from_elem((matrix.nrows(), dimension), f32::NAN));
                concatenate(Axis(1), &[matrix.view(), vectors.view()]).unwrap_or(matrix)
            }
        }
    }
}

//! An extractor on disk: `ivector.toml` (what it takes and the settings it was trained with)
//! and `ivector.safetensors` (its parameters, f64), side by side in a directory such as a model
//! directory.
//!
//! Tensors: `ubm.weights` `[C]`, `ubm.means` `[C, D]`, `ubm.variances` `[C, D]`,
//! `total_variability` `[C, D, R]`, and when configured `postprocessing.mean` `[R]` and
//! `postprocessing.lda` `[R_out, R]`. Loading checks every shape against the description.

use std::collections::HashMap;
use std::path::Path;

use ndarray::{Array1, Array2};
use safetensors::tensor::TensorView;
use safetensors::{Dtype, SafeTensors};
use serde::{Deserialize, Serialize};

use crate::config::ExtractorConfig;
use crate::extractor::{FeatureLayout, IvectorExtractor};
use crate::postprocess::Postprocessing;
use crate::total_variability::TotalVariability;
use crate::ubm::DiagGmm;
use crate::SpeakerError;

/// File name of the description.
pub const EXTRACTOR_DESCRIPTION: &str = "ivector.toml";
/// File name of the parameters.
pub const EXTRACTOR_TENSORS: &str = "ivector.safetensors";
/// Version of the on-disk layout.
const FORMAT: u32 = 1;

#[derive(Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct Description {
    format: u32,
    feature_dims: usize,
    frame_shift_seconds: f64,
    gaussians: usize,
    dimension: usize,
    output_dimension: usize,
    config: ExtractorConfig,
}

fn write_atomically(path: &Path, bytes: &[u8]) -> Result<(), SpeakerError> {
    let io_error = |source| SpeakerError::Io {
        path: path.to_path_buf(),
        action: "writing",
        source,
    };
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    let partial = path.with_file_name(format!(".{name}.partial-{}", std::process::id()));
    std::fs::write(&partial, bytes).map_err(io_error)?;
    std::fs::rename(&partial, path).map_err(|source| {
        let _ = std::fs::remove_file(&partial);
        io_error(source)
    })
}

fn le_bytes(values: impl Iterator<Item = f64>) -> Vec<u8> {
    values.flat_map(|v| v.to_le_bytes()).collect()
}

impl IvectorExtractor {
    /// Writes `ivector.toml` and `ivector.safetensors` into `dir` (which must exist), each
    /// through a temporary file and a rename.
    pub fn save(&self, dir: &Path) -> Result<(), SpeakerError> {
        let tensors_path = dir.join(EXTRACTOR_TENSORS);
        let (gaussians, dims) = (self.ubm.gaussians(), self.ubm.dims());
        let rank = self.total_variability.rank();
        let mut named: Vec<(String, Vec<usize>, Vec<u8>)> = vec![
            (
                "ubm.weights".into(),
                vec![gaussians],
                le_bytes(self.ubm.weights().iter().copied()),
            ),
            (
                "ubm.means".into(),
                vec![gaussians, dims],
                le_bytes(self.ubm.means().iter().copied()),
            ),
            (
                "ubm.variances".into(),
                vec![gaussians, dims],
                le_bytes(self.ubm.variances().iter().copied()),
            ),
            (
                "total_variability".into(),
                vec![gaussians, dims, rank],
                le_bytes(self.total_variability.matrix().iter().copied()),
            ),
        ];
        if let Some(mean) = &self.postprocessing.mean {
            named.push((
                "postprocessing.mean".into(),
                vec![mean.len()],
                le_bytes(mean.iter().copied()),
            ));
        }
        if let Some(lda) = &self.postprocessing.lda {
            named.push((
                "postprocessing.lda".into(),
                vec![lda.nrows(), lda.ncols()],
                le_bytes(lda.iter().copied()),
            ));
        }
        let malformed = |message: String| SpeakerError::Extractor {
            path: tensors_path.clone(),
            problem: message,
        };
        let views = named
            .iter()
            .map(|(name, shape, bytes)| {
                TensorView::new(Dtype::F64, shape.clone(), bytes)
                    .map(|view| (name.clone(), view))
                    .map_err(|e| malformed(e.to_string()))
            })
            .collect::<Result<Vec<_>, _>>()?;
        let serialized =
            safetensors::serialize(views, None).map_err(|e| malformed(e.to_string()))?;
        let description = Description {
            format: FORMAT,
            feature_dims: self.layout.dims,
            frame_shift_seconds: self.layout.frame_shift_seconds,
            gaussians,
            dimension: rank,
            output_dimension: self.output_dimension(),
            config: self.config.clone(),
        };
        let text = toml::to_string(&description).map_err(|e| SpeakerError::Extractor {
            path: dir.join(EXTRACTOR_DESCRIPTION),
            problem: e.to_string(),
        })?;
        write_atomically(&tensors_path, &serialized)?;
        write_atomically(&dir.join(EXTRACTOR_DESCRIPTION), text.as_bytes())
    }

    /// Reads an extractor saved by [`IvectorExtractor::save`] from `dir`, checking every tensor's
    /// type and shape against the description.
    pub fn load(dir: &Path) -> Result<IvectorExtractor, SpeakerError> {
        let description_path = dir.join(EXTRACTOR_DESCRIPTION);
        let text =
            std::fs::read_to_string(&description_path).map_err(|source| SpeakerError::Io {
                path: description_path.clone(),
                action: "reading",
                source,
            })?;
        let bad_description = |problem: String| SpeakerError::Extractor {
            path: description_path.clone(),
            problem,
        };
        let description: Description = toml::from_str(&text).map_err(|e| {
            bad_description(format!("not a valid i-vector extractor description: {e}"))
        })?;
        if description.format != FORMAT {
            return Err(bad_description(format!(
                "format {} is not supported (this build reads format {FORMAT})",
                description.format
            )));
        }
        description
            .config
            .validate()
            .map_err(|e| bad_description(e.to_string()))?;
        let config = &description.config;
        if description.gaussians != config.ubm.gaussians
            || description.dimension != config.dimension
            || description.output_dimension != config.output_dimension()
        {
            return Err(bad_description(format!(
                "gaussians = {}, dimension = {}, output_dimension = {} disagree with its [config] ({}, {}, {})",
                description.gaussians,
                description.dimension,
                description.output_dimension,
                config.ubm.gaussians,
                config.dimension,
                config.output_dimension()
            )));
        }
        if description.feature_dims == 0
            || !(description.frame_shift_seconds > 0.0
                && description.frame_shift_seconds.is_finite())
        {
            return Err(bad_description(format!(
                "feature_dims = {} and frame_shift_seconds = {} must be positive",
                description.feature_dims, description.frame_shift_seconds
            )));
        }

        let tensors_path = dir.join(EXTRACTOR_TENSORS);
        let bytes = std::fs::read(&tensors_path).map_err(|source| SpeakerError::Io {
            path: tensors_path.clone(),
            action: "reading",
            source,
        })?;
        let bad_tensors = |problem: String| SpeakerError::Extractor {
            path: tensors_path.clone(),
            problem,
        };
        let file = SafeTensors::deserialize(&bytes)
            .map_err(|e| bad_tensors(format!("not a valid safetensors file: {e}")))?;
        let mut tensors: HashMap<String, (Vec<usize>, Vec<f64>)> = HashMap::new();
        for (name, view) in file.tensors() {
            if view.dtype() != Dtype::F64 {
                return Err(bad_tensors(format!(
                    "tensor `{name}` has type {:?}, expected F64",
                    view.dtype()
                )));
            }
            let values = view
                .data()
                .chunks_exact(8)
                .map(|c| f64::from_le_bytes([c[0], c[1], c[2], c[3], c[4], c[5], c[6], c[7]]))
                .collect();
            tensors.insert(name, (view.shape().to_vec(), values));
        }
        let (c, d, r) = (
            description.gaussians,
            description.feature_dims,
            description.dimension,
        );
        let mut take = |name: &str, shape: &[usize]| -> Result<Vec<f64>, SpeakerError> {
            let (found, values) = tensors.remove(name).ok_or_else(|| {
                bad_tensors(format!(
                    "tensor `{name}` is missing (the description {} asks for it)",
                    description_path.display()
                ))
            })?;
            if found != shape {
                return Err(bad_tensors(format!(
                    "tensor `{name}` has shape {found:?}, but {} says {shape:?}",
                    description_path.display()
                )));
            }
            Ok(values)
        };
        let shaped = |shape: (usize, usize), values: Vec<f64>| {
            Array2::from_shape_vec(shape, values).map_err(|e| bad_tensors(e.to_string()))
        };
        let weights = Array1::from(take("ubm.weights", &[c])?);
        let means = shaped((c, d), take("ubm.means", &[c, d])?)?;
        let variances = shaped((c, d), take("ubm.variances", &[c, d])?)?;
        let matrix = shaped((c * d, r), take("total_variability", &[c, d, r])?)?;
        let mean = if config.subtract_mean {
            Some(Array1::from(take("postprocessing.mean", &[r])?))
        } else {
            None
        };
        let lda = if config.lda_dimension > 0 {
            let shape = (config.lda_dimension, r);
            Some(shaped(
                shape,
                take("postprocessing.lda", &[shape.0, shape.1])?,
            )?)
        } else {
            None
        };
        if let Some(extra) = tensors.keys().next() {
            return Err(bad_tensors(format!(
                "unexpected tensor `{extra}` (not in the description {})",
                description_path.display()
            )));
        }
        let invalid = |e: SpeakerError| bad_tensors(e.to_string());
        let ubm = DiagGmm::new(weights, means, variances).map_err(invalid)?;
        let total_variability = TotalVariability::new(matrix, &ubm).map_err(invalid)?;
        let postprocessing = Postprocessing {
            mean,
            lda,
            length_normalize: config.length_normalize,
        };
        IvectorExtractor::from_parts(
            description.config,
            FeatureLayout {
                dims: description.feature_dims,
                frame_shift_seconds: description.frame_shift_seconds,
            },
            ubm,
            total_variability,
            postprocessing,
        )
        .map_err(invalid)
    }
}

//! Feature files: safetensors holding one f32 tensor `features` of shape `[frames, dims]`.

use std::path::Path;

use ndarray::Array2;
use safetensors::tensor::TensorView;
use safetensors::{Dtype, SafeTensors};

use crate::FeatureError;

/// Name of the one tensor in a feature file (`docs/formats.md`, feature files).
pub const FEATURES_TENSOR: &str = "features";

/// Writes `features` to `path` as safetensors. The file is written next to its final name and then
/// renamed, so an interrupted run never leaves a truncated feature file behind.
pub fn write_features(path: &Path, features: &Array2<f32>) -> Result<(), FeatureError> {
    let bytes: Vec<u8> = features.iter().flat_map(|v| v.to_le_bytes()).collect();
    let malformed = |message: String| FeatureError::Safetensors {
        path: path.to_path_buf(),
        message,
    };
    let view = TensorView::new(Dtype::F32, vec![features.nrows(), features.ncols()], &bytes)
        .map_err(|error| malformed(error.to_string()))?;
    let serialized = safetensors::serialize([(FEATURES_TENSOR, view)], None)
        .map_err(|error| malformed(error.to_string()))?;
    let io_error = |source| FeatureError::Io {
        path: path.to_path_buf(),
        action: "writing",
        source,
    };
    let file_name = path
        .file_name()
        .map(|name| name.to_string_lossy().into_owned())
        .unwrap_or_default();
    let partial = path.with_file_name(format!(".{file_name}.partial-{}", std::process::id()));
    std::fs::write(&partial, serialized).map_err(io_error)?;
    std::fs::rename(&partial, path).map_err(|source| {
        let _ = std::fs::remove_file(&partial);
        io_error(source)
    })
}

/// Reads a feature file written by [`write_features`] (or any safetensors file with an f32 tensor
/// `features` of rank 2).
pub fn read_features(path: &Path) -> Result<Array2<f32>, FeatureError> {
    let bytes = std::fs::read(path).map_err(|source| FeatureError::Io {
        path: path.to_path_buf(),
        action: "reading",
        source,
    })?;
    let tensors = SafeTensors::deserialize(&bytes).map_err(|error| FeatureError::Safetensors {
        path: path.to_path_buf(),
        message: error.to_string(),
    })?;
    let unexpected = |found: String| FeatureError::UnexpectedTensor {
        path: path.to_path_buf(),
        expected: format!("an f32 tensor `{FEATURES_TENSOR}` of shape [frames, dims]"),
        found,
    };
    let tensor = tensors.tensor(FEATURES_TENSOR).map_err(|_| {
        let mut names = tensors.names();
        names.sort_unstable();
        unexpected(format!("tensors {names:?}"))
    })?;
    if tensor.dtype() != Dtype::F32 {
        return Err(unexpected(format!("dtype {:?}", tensor.dtype())));
    }
    let &[frames, dims] = tensor.shape() else {
        return Err(unexpected(format!("shape {:?}", tensor.shape())));
    };
    let values: Vec<f32> = tensor
        .data()
        .chunks_exact(4)
        .map(|chunk| f32::from_le_bytes([chunk[0], chunk[1], chunk[2], chunk[3]]))
        .collect();
    // safetensors has checked that the data length matches dtype and shape.
    Array2::from_shape_vec((frames, dims), values)
        .map_err(|error| unexpected(format!("data not matching its shape: {error}")))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn round_trips_exactly_including_zero_frames() {
        let dir = tempfile::tempdir().unwrap();
        for features in [
            Array2::from_shape_fn((7, 39), |(t, d)| t as f32 * 0.5 - d as f32 / 3.0),
            Array2::zeros((0, 40)),
        ] {
            let path = dir.path().join("utt.safetensors");
            write_features(&path, &features).unwrap();
            assert_eq!(read_features(&path).unwrap(), features);
        }
        // No partial file is left behind.
        assert_eq!(std::fs::read_dir(dir.path()).unwrap().count(), 1);
    }

    #[test]
    fn bad_files_are_clear_errors_naming_the_file() {
        let dir = tempfile::tempdir().unwrap();
        let missing = dir.path().join("missing.safetensors");
        let error = read_features(&missing).unwrap_err().to_string();
        assert!(
            error.contains("missing.safetensors") && error.contains("reading"),
            "{error}"
        );

        let text = dir.path().join("text.safetensors");
        std::fs::write(&text, "not a tensor file").unwrap();
        let error = read_features(&text).unwrap_err().to_string();
        assert!(error.contains("text.safetensors"), "{error}");

        let wrong_name = dir.path().join("posteriors.safetensors");
        let bytes = [0u8; 8];
        let view = TensorView::new(Dtype::F32, vec![1, 2], &bytes).unwrap();
        std::fs::write(
            &wrong_name,
            safetensors::serialize([("logits", view)], None).unwrap(),
        )
        .unwrap();
        let error = read_features(&wrong_name).unwrap_err().to_string();
        assert!(
            error.contains("`features`") && error.contains("logits"),
            "{error}"
        );

        let wrong_rank = dir.path().join("rank.safetensors");
        let view = TensorView::new(Dtype::F32, vec![2], &bytes).unwrap();
        std::fs::write(
            &wrong_rank,
            safetensors::serialize([("features", view)], None).unwrap(),
        )
        .unwrap();
        let error = read_features(&wrong_rank).unwrap_err().to_string();
        assert!(error.contains("shape [2]"), "{error}");

        let wrong_type = dir.path().join("type.safetensors");
        let view = TensorView::new(Dtype::F64, vec![1, 1], &bytes).unwrap();
        std::fs::write(
            &wrong_type,
            safetensors::serialize([("features", view)], None).unwrap(),
        )
        .unwrap();
        let error = read_features(&wrong_type).unwrap_err().to_string();
        assert!(error.contains("F64"), "{error}");
    }
}

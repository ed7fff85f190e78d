//! Writing tensors and files safely.

use std::collections::BTreeMap;
use std::path::Path;

use crate::AcousticError;

/// Serialises named f32 tensors (name, shape, row-major values) to safetensors bytes.
pub fn serialize_tensors(
    tensors: &[(String, Vec<usize>, Vec<f32>)],
    metadata: Option<BTreeMap<String, String>>,
) -> Result<Vec<u8>, AcousticError> {
    let bytes: Vec<(String, Vec<usize>, Vec<u8>)> = tensors
        .iter()
        .map(|(name, shape, values)| {
            let data = values.iter().flat_map(|v| v.to_le_bytes()).collect();
            (name.clone(), shape.clone(), data)
        })
        .collect();
    let mut views = Vec::with_capacity(bytes.len());
    for (name, shape, data) in &bytes {
        let view =
            safetensors::tensor::TensorView::new(safetensors::Dtype::F32, shape.clone(), data)
                .map_err(|e| AcousticError::Shape(format!("tensor `{name}`: {e}")))?;
        views.push((name.clone(), view));
    }
    let metadata = metadata.map(|m| m.into_iter().collect());
    safetensors::serialize(views, metadata)
        .map_err(|e| AcousticError::Shape(format!("cannot serialise tensors: {e}")))
}

/// Writes `bytes` to a temporary file next to `path`, then renames it over `path`, so that a
/// crash leaves either the old or the new file, never a torn one (the corpus crate's writer).
pub fn write_atomically(path: &Path, bytes: &[u8]) -> Result<(), AcousticError> {
    Ok(isogloss_corpus::tsv::write_atomically(path, bytes)?)
}

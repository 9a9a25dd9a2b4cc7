//! The structurally smaller model: every tensor slice of the removed units
//! deleted, and `config.json` with the new counts.

use super::cut::UnitCut;
use crate::arch::units::{resized_config, UnitKind};
use crate::arch::{self, ArchConfig};
use crate::error::{Error, Result};
use crate::io::Model;
use std::collections::BTreeMap;

/// The tensors and config of the smaller model.
#[derive(Clone, Debug)]
pub struct Shrunk {
    /// New values, row-major in storage orientation, by tensor name.
    pub values: BTreeMap<String, Vec<f64>>,
    /// New shapes of the tensors in `values` that changed shape.
    pub shapes: BTreeMap<String, Vec<usize>>,
    /// The new `config.json`.
    pub config: serde_json::Value,
    /// The keys of `config.json` that changed, with their new values.
    pub changes: serde_json::Value,
    /// Parameters of the whole model before.
    pub params_before: usize,
    /// Parameters after.
    pub params_after: usize,
}

/// Keep only the indices `keep` along `axis` of a row-major tensor of
/// `shape`: the result has `shape[axis] = keep.len()`.
///
/// # Panics
/// If `axis` is out of range or an index is not below `shape[axis]`
/// (caller contract).
#[track_caller]
pub fn take_along(values: &[f64], shape: &[usize], axis: usize, keep: &[usize]) -> Vec<f64> {
    assert!(axis < shape.len(), "axis {axis} of a {}-D tensor", shape.len());
    assert!(keep.iter().all(|&k| k < shape[axis]), "index beyond axis {axis} of {shape:?}");
    // View the tensor as [outer, shape[axis], inner].
    let outer: usize = shape[..axis].iter().product();
    let inner: usize = shape[axis + 1..].iter().product();
    let mut out = Vec::with_capacity(outer * keep.len() * inner);
    for o in 0..outer {
        let base = o * shape[axis] * inner;
        for &k in keep {
            out.extend_from_slice(&values[base + k * inner..base + (k + 1) * inner]);
        }
    }
    out
}

/// Delete the removed units of `cuts` from `model`, starting from the
/// pruned values `replaced` (storage orientation; other tensors are read
/// from the model).
///
/// # Errors
/// An unreadable tensor or config.
pub fn shrink(
    model: &Model,
    replaced: &BTreeMap<String, Vec<f64>>,
    cuts: &[UnitCut],
) -> Result<Shrunk> {
    let mut values = replaced.clone();
    let mut shapes: BTreeMap<String, Vec<usize>> = BTreeMap::new();
    for cut in cuts {
        for s in &cut.units.slices {
            let info = model.get(&s.tensor).ok_or_else(|| {
                Error::input(format!(
                    "{}: no tensor '{}'",
                    model.layout().root().display(),
                    s.tensor
                ))
            })?;
            let shape = shapes.get(&s.tensor).cloned().unwrap_or_else(|| info.shape.clone());
            let current = match values.remove(&s.tensor) {
                Some(v) => v,
                None => model.read_f64(&s.tensor)?,
            };
            let keep = cut.kept_entries(s.per_unit);
            let mut new_shape = shape.clone();
            new_shape[s.axis] = keep.len();
            values.insert(s.tensor.clone(), take_along(&current, &shape, s.axis, &keep));
            shapes.insert(s.tensor.clone(), new_shape);
        }
    }
    let after_of =
        |kind: UnitKind| cuts.iter().find(|c| c.units.kind == kind).map(|c| c.kept.len());
    let cfg = ArchConfig::read(&arch::model_dir(model))?;
    let config = resized_config(&cfg, after_of(UnitKind::Neuron), after_of(UnitKind::Head))?;
    let mut changes = serde_json::Map::new();
    if let (Some(new), Some(old)) = (config.as_object(), cfg.json.as_object()) {
        for (k, v) in new {
            if old.get(k) != Some(v) {
                changes.insert(k.clone(), v.clone());
            }
        }
    }
    let params_before: usize = model.tensors().iter().map(|t| t.params()).sum();
    let params_after = model
        .tensors()
        .iter()
        .map(|t| shapes.get(&t.name).map_or(t.params(), |s| s.iter().product()))
        .sum();
    Ok(Shrunk {
        values,
        shapes,
        config,
        changes: serde_json::Value::Object(changes),
        params_before,
        params_after,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn take_along_keeps_rows_columns_and_middle_slices() {
        // [[0,1,2],[3,4,5]]: rows {1}, columns {2, 0}.
        let v: Vec<f64> = (0..6).map(f64::from).collect();
        assert_eq!(take_along(&v, &[2, 3], 0, &[1]), vec![3.0, 4.0, 5.0]);
        assert_eq!(take_along(&v, &[2, 3], 1, &[0, 2]), vec![0.0, 2.0, 3.0, 5.0]);
        // 3-D [2, 2, 2], middle axis index 1: elements with j = 1.
        let v: Vec<f64> = (0..8).map(f64::from).collect();
        assert_eq!(take_along(&v, &[2, 2, 2], 1, &[1]), vec![2.0, 3.0, 6.0, 7.0]);
        // 1-D bias.
        assert_eq!(take_along(&[7.0, 8.0, 9.0], &[3], 0, &[2]), vec![9.0]);
    }
}

//! Checked readers for the fields of a spatial layer (per-axis counts, padding, number lists, the
//! allowed keys) and the size guard applied before a layer's window table is built. Every error names
//! the layer and field and says what was expected; nothing is allocated from an unchecked size.

use nalgebra::DVector;
use serde_json::Value;

use super::Shape;
use crate::model::ModelError;

pub(super) fn invalid(place: &str, message: String) -> ModelError {
    ModelError::Invalid {
        place: place.into(),
        message,
    }
}

/// Reads `[a]` or `[a, b]` (one entry per spatial axis; height first) into (height, width) pairs, with
/// `default` when absent.
pub(super) fn per_axis(
    value: Option<&Value>,
    shape: &Shape,
    default: usize,
    place: &str,
) -> Result<(usize, usize), ModelError> {
    let Some(value) = value else {
        return Ok((default, default));
    };
    let numbers = read_counts(value, place)?;
    match (shape.spatial_rank, numbers.as_slice()) {
        (1, [w]) => Ok((1, *w)),
        (2, [h, w]) => Ok((*h, *w)),
        (rank, _) => Err(invalid(
            place,
            format!(
                "has {} entries, expected {rank} (one per spatial axis)",
                numbers.len()
            ),
        )),
    }
}

fn read_counts(value: &Value, place: &str) -> Result<Vec<usize>, ModelError> {
    let list = value
        .as_array()
        .ok_or_else(|| invalid(place, "expected a list of non-negative integers".into()))?;
    list.iter()
        .map(|v| {
            v.as_u64()
                .map(|n| n as usize)
                .ok_or_else(|| invalid(place, format!("{v} is not a non-negative integer")))
        })
        .collect()
}

/// Padding `[before, after]` per axis: `[l, r]` for 1-D, `[top, left, bottom, right]` for 2-D.
pub(super) fn padding(
    value: Option<&Value>,
    shape: &Shape,
    place: &str,
) -> Result<(usize, usize, usize, usize), ModelError> {
    let Some(value) = value else {
        return Ok((0, 0, 0, 0));
    };
    let numbers = read_counts(value, place)?;
    match (shape.spatial_rank, numbers.as_slice()) {
        (1, [l, r]) => Ok((0, *l, 0, *r)),
        (2, [t, l, b, r]) => Ok((*t, *l, *b, *r)),
        (rank, _) => Err(invalid(
            place,
            format!(
                "has {} entries, expected {} (before and after each spatial axis)",
                numbers.len(),
                2 * rank
            ),
        )),
    }
}

fn numbers(value: &Value, place: &str) -> Result<Vec<f64>, ModelError> {
    let list = value
        .as_array()
        .ok_or_else(|| invalid(place, "expected a list of numbers".into()))?;
    list.iter()
        .enumerate()
        .map(|(i, v)| {
            v.as_f64()
                .filter(|x| x.is_finite())
                .ok_or_else(|| invalid(place, format!("entry {i} is not a finite number")))
        })
        .collect()
}

pub(super) fn vector(
    object: &Value,
    field: &str,
    len: usize,
    place: &str,
) -> Result<DVector<f64>, ModelError> {
    let place = format!("{place}.{field}");
    let value = object
        .get(field)
        .ok_or_else(|| invalid(&place, "is missing".into()))?;
    let v = numbers(value, &place)?;
    if v.len() != len {
        return Err(invalid(
            &place,
            format!("has {} values, expected {len}", v.len()),
        ));
    }
    Ok(DVector::from_vec(v))
}

pub(super) fn require_spatial(shape: &Shape, place: &str, kind: &str) -> Result<(), ModelError> {
    if shape.spatial_rank == 0 {
        return Err(invalid(
            place,
            format!(
                "{kind} needs spatial features, found a flat vector of {} (state input.shape, e.g. \
                 [channels, length], and put {kind} before any flatten or dense layer)",
                shape.size()
            ),
        ));
    }
    Ok(())
}

pub(super) fn check_fields(
    object: &Value,
    allowed: &[&str],
    place: &str,
) -> Result<(), ModelError> {
    if let Some(map) = object.as_object() {
        for key in map.keys() {
            if key != "kind" && !allowed.contains(&key.as_str()) {
                return Err(invalid(
                    place,
                    format!("unknown field \"{key}\", expected one of {allowed:?}"),
                ));
            }
        }
    }
    Ok(())
}

/// Refuses a layer whose window table (`out_h · out_w · entries`) or input would exceed the parameter
/// limit: sizes claimed by `input.shape` are not backed by any number in the file, so they are checked
/// before anything is allocated from them.
pub(super) fn check_unfolded(
    h: usize,
    w: usize,
    entries: usize,
    shape: &Shape,
    place: &str,
) -> Result<(), ModelError> {
    let limit = crate::limits::MAX_PARAMETERS;
    let table = h.checked_mul(w).and_then(|p| p.checked_mul(entries));
    if table.is_none_or(|t| t > limit) || shape.size() > limit {
        return Err(invalid(
            place,
            format!(
                "an input of {:?} unfolds into more than {limit} window entries (the size limit)",
                shape.dims()
            ),
        ));
    }
    Ok(())
}

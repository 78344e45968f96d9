//! Constant tensors and node attributes of an ONNX graph, decoded into plain f64 arrays.
//!
//! A tensor's element count is computed from its dims with overflow checks and compared with the data
//! actually present (raw bytes or the typed field) before any array is allocated, so a file cannot make
//! ballast allocate more than it holds. External data, sparse tensors and element types other than
//! float32, float64, int32, int64 and string are refused with an error naming the tensor.

use super::schema::{tensor_proto::DataType, AttributeProto, NodeProto, TensorProto};
use super::OnnxError;

/// A constant tensor: its shape and its values in row-major order (strings kept apart).
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Constant {
    /// The shape (empty for a scalar).
    pub dims: Vec<usize>,
    /// The values as f64 (empty for string tensors).
    pub values: Vec<f64>,
    /// The values of a string tensor.
    pub strings: Option<Vec<String>>,
}

impl Constant {
    /// A float tensor from its shape and values.
    pub fn from_values(dims: Vec<usize>, values: Vec<f64>) -> Constant {
        Constant {
            dims,
            values,
            strings: None,
        }
    }
}

fn tensor_error(name: &str, message: String) -> OnnxError {
    OnnxError::Tensor {
        name: name.to_owned(),
        message,
    }
}

/// Decodes a tensor, checking its claimed size against the data present.
pub(crate) fn decode_tensor(tensor: &TensorProto) -> Result<Constant, OnnxError> {
    let name = tensor.name.clone().unwrap_or_default();
    if tensor.data_location == Some(1) || !tensor.external_data.is_empty() {
        return Err(tensor_error(
            &name,
            "stores its data in an external file, which is not supported (save the model with all tensors inside the file)".into(),
        ));
    }
    if tensor.segment.is_some() {
        return Err(tensor_error(
            &name,
            "is a segment of a larger tensor, which is not supported".into(),
        ));
    }
    let mut dims = Vec::with_capacity(tensor.dims.len().min(64));
    let mut count: usize = 1;
    for (i, d) in tensor.dims.iter().enumerate() {
        let d = usize::try_from(*d)
            .map_err(|_| tensor_error(&name, format!("dimension {i} is {d}, expected ≥ 0")))?;
        count = count
            .checked_mul(d)
            .ok_or_else(|| tensor_error(&name, "the element count overflows".into()))?;
        dims.push(d);
    }
    let data_type = tensor.data_type.unwrap_or(0);
    let raw = tensor.raw_data.as_deref();
    let check = |present: usize, what: &str| -> Result<(), OnnxError> {
        if present != count {
            return Err(tensor_error(
                &name,
                format!("shape {dims:?} needs {count} values, but {what} holds {present}"),
            ));
        }
        Ok(())
    };
    let values: Vec<f64> = match DataType::try_from(data_type) {
        Ok(DataType::Float) => match raw {
            Some(bytes) => {
                check(bytes.len() / 4, "raw_data")?;
                check_exact(&name, bytes.len(), count, 4)?;
                bytes
                    .chunks_exact(4)
                    .map(|c| f64::from(f32::from_le_bytes([c[0], c[1], c[2], c[3]])))
                    .collect()
            }
            None => {
                check(tensor.float_data.len(), "float_data")?;
                tensor.float_data.iter().map(|v| f64::from(*v)).collect()
            }
        },
        Ok(DataType::Double) => match raw {
            Some(bytes) => {
                check(bytes.len() / 8, "raw_data")?;
                check_exact(&name, bytes.len(), count, 8)?;
                bytes
                    .chunks_exact(8)
                    .map(|c| f64::from_le_bytes([c[0], c[1], c[2], c[3], c[4], c[5], c[6], c[7]]))
                    .collect()
            }
            None => {
                check(tensor.double_data.len(), "double_data")?;
                tensor.double_data.clone()
            }
        },
        Ok(DataType::Int64) => match raw {
            Some(bytes) => {
                check(bytes.len() / 8, "raw_data")?;
                check_exact(&name, bytes.len(), count, 8)?;
                bytes
                    .chunks_exact(8)
                    .map(|c| {
                        i64::from_le_bytes([c[0], c[1], c[2], c[3], c[4], c[5], c[6], c[7]]) as f64
                    })
                    .collect()
            }
            None => {
                check(tensor.int64_data.len(), "int64_data")?;
                tensor.int64_data.iter().map(|v| *v as f64).collect()
            }
        },
        Ok(DataType::Int32) => match raw {
            Some(bytes) => {
                check(bytes.len() / 4, "raw_data")?;
                check_exact(&name, bytes.len(), count, 4)?;
                bytes
                    .chunks_exact(4)
                    .map(|c| f64::from(i32::from_le_bytes([c[0], c[1], c[2], c[3]])))
                    .collect()
            }
            None => {
                check(tensor.int32_data.len(), "int32_data")?;
                tensor.int32_data.iter().map(|v| f64::from(*v)).collect()
            }
        },
        Ok(DataType::String) => {
            check(tensor.string_data.len(), "string_data")?;
            let strings = tensor
                .string_data
                .iter()
                .enumerate()
                .map(|(i, s)| {
                    String::from_utf8(s.clone())
                        .map_err(|_| tensor_error(&name, format!("string {i} is not valid UTF-8")))
                })
                .collect::<Result<Vec<_>, _>>()?;
            return Ok(Constant {
                dims,
                values: Vec::new(),
                strings: Some(strings),
            });
        }
        Ok(other) => {
            return Err(tensor_error(
                &name,
                format!(
                "element type {} is not supported (expected FLOAT, DOUBLE, INT32, INT64 or STRING)",
                other.as_str_name()
            ),
            ))
        }
        Err(_) => {
            return Err(tensor_error(
                &name,
                format!("unknown element type {data_type}"),
            ))
        }
    };
    Ok(Constant {
        dims,
        values,
        strings: None,
    })
}

fn check_exact(name: &str, bytes: usize, count: usize, width: usize) -> Result<(), OnnxError> {
    if bytes != count * width {
        return Err(tensor_error(
            name,
            format!(
                "raw_data has {bytes} bytes, expected {} ({count} values of {width} bytes)",
                count * width
            ),
        ));
    }
    Ok(())
}

/// The attribute `name` of `node`, if present.
pub(crate) fn attribute<'a>(node: &'a NodeProto, name: &str) -> Option<&'a AttributeProto> {
    node.attribute
        .iter()
        .find(|a| a.name.as_deref() == Some(name))
}

/// An integer attribute, or `default` when absent.
pub(crate) fn int_attribute(node: &NodeProto, name: &str, default: i64) -> i64 {
    attribute(node, name).and_then(|a| a.i).unwrap_or(default)
}

/// A float attribute, or `default` when absent.
pub(crate) fn float_attribute(node: &NodeProto, name: &str, default: f64) -> f64 {
    attribute(node, name)
        .and_then(|a| a.f)
        .map(f64::from)
        .unwrap_or(default)
}

/// A float-list attribute (empty when absent).
pub(crate) fn floats_attribute(node: &NodeProto, name: &str) -> Vec<f64> {
    attribute(node, name)
        .map(|a| a.floats.iter().map(|v| f64::from(*v)).collect())
        .unwrap_or_default()
}

/// An int-list attribute (empty when absent).
pub(crate) fn ints_attribute(node: &NodeProto, name: &str) -> Vec<i64> {
    attribute(node, name)
        .map(|a| a.ints.clone())
        .unwrap_or_default()
}

/// A string attribute (lossy UTF-8), or `None` when absent.
pub(crate) fn string_attribute(node: &NodeProto, name: &str) -> Option<String> {
    attribute(node, name)
        .and_then(|a| a.s.as_ref())
        .map(|s| String::from_utf8_lossy(s).into_owned())
}

/// A string-list attribute (lossy UTF-8; empty when absent).
pub(crate) fn strings_attribute(node: &NodeProto, name: &str) -> Vec<String> {
    attribute(node, name)
        .map(|a| {
            a.strings
                .iter()
                .map(|s| String::from_utf8_lossy(s).into_owned())
                .collect()
        })
        .unwrap_or_default()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn float_tensor(dims: Vec<i64>, raw: Option<Vec<u8>>, floats: Vec<f32>) -> TensorProto {
        TensorProto {
            name: Some("t".into()),
            dims,
            data_type: Some(DataType::Float as i32),
            raw_data: raw,
            float_data: floats,
            ..Default::default()
        }
    }

    #[test]
    fn raw_and_typed_floats_decode_alike() {
        let values = [1.5f32, -2.0, 0.25, 8.0, 3.0, -0.5];
        let raw: Vec<u8> = values.iter().flat_map(|v| v.to_le_bytes()).collect();
        let a = decode_tensor(&float_tensor(vec![2, 3], Some(raw), vec![])).unwrap();
        let b = decode_tensor(&float_tensor(vec![2, 3], None, values.to_vec())).unwrap();
        assert_eq!(a.dims, vec![2, 3]);
        assert_eq!(a.values.len(), 6);
        for (x, y) in a.values.iter().zip(&b.values) {
            approx::assert_abs_diff_eq!(*x, *y);
        }
        approx::assert_abs_diff_eq!(a.values[3], 8.0);
    }

    #[test]
    fn claimed_size_is_checked_against_present_bytes() {
        // dims claim 10^12 elements but only 8 bytes are present: an error, not an allocation.
        let e = decode_tensor(&float_tensor(
            vec![1_000_000, 1_000_000],
            Some(vec![0; 8]),
            vec![],
        ))
        .unwrap_err();
        assert!(e.to_string().contains("needs 1000000000000 values"), "{e}");
        let e = decode_tensor(&float_tensor(vec![i64::MAX, i64::MAX], None, vec![])).unwrap_err();
        assert!(e.to_string().contains("overflows"), "{e}");
        let e = decode_tensor(&float_tensor(vec![-3], None, vec![])).unwrap_err();
        assert!(e.to_string().contains("expected ≥ 0"), "{e}");
        let e = decode_tensor(&float_tensor(vec![2], Some(vec![0; 9]), vec![])).unwrap_err();
        assert!(e.to_string().contains("9 bytes"), "{e}");
    }

    #[test]
    fn external_data_and_float16_are_refused() {
        let mut t = float_tensor(vec![1], None, vec![1.0]);
        t.data_location = Some(1);
        assert!(decode_tensor(&t)
            .unwrap_err()
            .to_string()
            .contains("external file"));
        let mut t = float_tensor(vec![1], Some(vec![0, 0]), vec![]);
        t.data_type = Some(DataType::Float16 as i32);
        assert!(decode_tensor(&t)
            .unwrap_err()
            .to_string()
            .contains("FLOAT16"));
    }
}

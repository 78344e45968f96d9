//! Exact rational arithmetic for the floating-point soundness test: reading Python's `float.hex()`
//! strings without any decimal parser, and the models of tests/reference/out/fp_stress/manifest.json as
//! real functions (num-rational `BigRational`), independent of ballast's own code.
//!
//! Guarantees: `hex_rational` returns exactly the double written; `ExactModel::logits` computes
//! `(x − mean) / std`, dense and ReLU layers with no rounding; `class` applies the format's rule (largest
//! logit, ties to the lower index; a one-output model is `[0, z]`); `in_region` decides membership in
//! ball ∩ input range with an exact `≤`.

use ballast::model::{Layer, Model};
use ballast::threat::Norm;
use nalgebra::{DMatrix, DVector};
use num_bigint::BigInt;
use num_rational::BigRational;
use num_traits::{Signed, Zero};
use serde_json::Value;

/// The parts of a double written by Python's `float.hex()` (`[-]0x1.hhhhp±e`): sign, hex digits and the
/// power of two the integer of those digits is scaled by.
fn hex_parts(text: &str) -> (bool, String, i64) {
    let (negative, body) = match text.strip_prefix('-') {
        Some(rest) => (true, rest),
        None => (false, text),
    };
    let body = body.strip_prefix("0x").expect("hex float starts with 0x");
    let (mantissa, exponent) = body.split_once('p').expect("hex float has an exponent");
    let (whole, fraction) = mantissa.split_once('.').unwrap_or((mantissa, ""));
    let e = exponent.parse::<i64>().expect("exponent") - 4 * fraction.len() as i64;
    (negative, format!("{whole}{fraction}"), e)
}

/// A `float.hex()` double as the exact rational it denotes.
pub fn hex_rational(text: &str) -> BigRational {
    let (negative, digits, e) = hex_parts(text);
    let m = BigInt::parse_bytes(digits.as_bytes(), 16).expect("hex digits");
    let power = BigRational::from_integer(num_traits::pow(
        BigInt::from(2u8),
        e.unsigned_abs() as usize,
    ));
    let magnitude = if e >= 0 {
        BigRational::from_integer(m) * power
    } else {
        BigRational::from_integer(m) / power
    };
    if negative {
        -magnitude
    } else {
        magnitude
    }
}

/// A `float.hex()` double as an f64 built from mantissa and exponent (no decimal parser), checked to
/// equal the rational it denotes.
pub fn hex_f64(text: &str) -> f64 {
    let (negative, digits, e) = hex_parts(text);
    let m = u64::from_str_radix(&digits, 16).expect("at most 14 hex digits");
    let magnitude = m as f64 * 2f64.powi(i32::try_from(e).expect("exponent range"));
    let v = if negative { -magnitude } else { magnitude };
    assert_eq!(exact(v), hex_rational(text), "{text} as an f64");
    v
}

/// `model` with every normalize / dense number and the input range replaced by the manifest's doubles:
/// the model exactly as written, whatever the JSON reader does with the decimal strings.
pub fn exactly_read(model: &Model, exact: &Value) -> Model {
    let list = |v: &Value| -> Vec<f64> {
        let items = v.as_array().expect("list");
        items
            .iter()
            .map(|x| hex_f64(x.as_str().expect("number")))
            .collect()
    };
    let mut dense = exact["dense"].as_array().expect("dense layers").iter();
    let mut out = model.clone();
    for layer in &mut out.layers {
        match layer {
            Layer::Normalize { mean, std } => {
                *mean = DVector::from_vec(list(&exact["mean"]));
                *std = DVector::from_vec(list(&exact["std"]));
            }
            Layer::Dense { weights, bias } => {
                let d = dense.next().expect("as many dense layers");
                let rows: Vec<Vec<f64>> =
                    d["weights"].as_array().unwrap().iter().map(list).collect();
                *weights = DMatrix::from_fn(rows.len(), rows[0].len(), |i, j| rows[i][j]);
                *bias = DVector::from_vec(list(&d["bias"]));
            }
            Layer::Relu => {}
            _ => unreachable!("the exact references hold dense models only"),
        }
    }
    let range = |v: &Value, unbounded: f64| -> Vec<f64> {
        let items = v.as_array().expect("list");
        items
            .iter()
            .map(|x| x.as_str().map_or(unbounded, hex_f64))
            .collect()
    };
    out.input.lower = range(&exact["lower"], f64::NEG_INFINITY);
    out.input.upper = range(&exact["upper"], f64::INFINITY);
    out
}

pub fn exact(v: f64) -> BigRational {
    BigRational::from_float(v).expect("finite")
}

pub fn hex_list(v: &Value) -> Vec<Option<BigRational>> {
    v.as_array()
        .expect("list")
        .iter()
        .map(|x| x.as_str().map(hex_rational))
        .collect()
}

pub fn hex_vec(v: &Value) -> Vec<BigRational> {
    hex_list(v)
        .into_iter()
        .map(|x| x.expect("number"))
        .collect()
}

/// The model of the manifest as a real function (normalize exact, then dense / ReLU).
pub struct ExactModel {
    pub mean: Vec<BigRational>,
    pub std: Vec<BigRational>,
    pub dense: Vec<(Vec<Vec<BigRational>>, Vec<BigRational>)>,
    pub lower: Vec<Option<BigRational>>,
    pub upper: Vec<Option<BigRational>>,
    pub samples: Vec<Vec<BigRational>>,
}

impl ExactModel {
    pub fn from_manifest(exact: &Value) -> ExactModel {
        let dense = exact["dense"]
            .as_array()
            .unwrap()
            .iter()
            .map(|d| {
                let rows = d["weights"].as_array().unwrap().iter().map(hex_vec);
                (rows.collect(), hex_vec(&d["bias"]))
            })
            .collect();
        ExactModel {
            mean: hex_vec(&exact["mean"]),
            std: hex_vec(&exact["std"]),
            dense,
            lower: hex_list(&exact["lower"]),
            upper: hex_list(&exact["upper"]),
            samples: exact["samples"]
                .as_array()
                .unwrap()
                .iter()
                .map(hex_vec)
                .collect(),
        }
    }

    /// Exact logits; a one-output model gives `[0, z]` (class 1 iff z > 0, the format's rule).
    pub fn logits(&self, x: &[BigRational]) -> Vec<BigRational> {
        let mut h: Vec<BigRational> = x
            .iter()
            .zip(&self.mean)
            .zip(&self.std)
            .map(|((v, m), s)| (v - m) / s)
            .collect();
        for (k, (weights, bias)) in self.dense.iter().enumerate() {
            h = weights
                .iter()
                .zip(bias)
                .map(|(row, b)| {
                    row.iter()
                        .zip(&h)
                        .fold(b.clone(), |acc, (w, v)| acc + w * v)
                })
                .collect();
            if k + 1 < self.dense.len() {
                h = h
                    .into_iter()
                    .map(|v| {
                        if v.is_negative() {
                            BigRational::zero()
                        } else {
                            v
                        }
                    })
                    .collect();
            }
        }
        if h.len() == 1 {
            vec![BigRational::zero(), h.remove(0)]
        } else {
            h
        }
    }

    /// Largest logit, ties to the lower index (the format's rule), in exact arithmetic.
    pub fn class(&self, x: &[BigRational]) -> usize {
        let logits = self.logits(x);
        let mut best = 0;
        for j in 1..logits.len() {
            if logits[j] > logits[best] {
                best = j;
            }
        }
        best
    }

    /// Exact membership of `x` in the ball of radius `eps` around `center` ∩ the input range.
    pub fn in_region(
        &self,
        center: &[BigRational],
        eps: &BigRational,
        norm: Norm,
        x: &[BigRational],
    ) -> bool {
        for (i, v) in x.iter().enumerate() {
            let below = self.lower[i].as_ref().is_some_and(|lo| v < lo);
            let above = self.upper[i].as_ref().is_some_and(|hi| v > hi);
            if below || above {
                return false;
            }
        }
        let d = x.iter().zip(center).map(|(v, c)| v - c);
        match norm {
            Norm::Linf => d.into_iter().all(|t| t.abs() <= *eps),
            Norm::L2 => d.fold(BigRational::zero(), |acc, t| acc + &t * &t) <= eps * eps,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use num_traits::One;

    #[test]
    fn hex_rational_reads_python_float_hex() {
        // Values of Python's float.hex() (documented format `[sign]0xh.hhhp[+-]e`), checked against the
        // doubles they denote.
        assert_eq!(hex_rational("0x1.8000000000000p+1"), exact(3.0));
        assert_eq!(
            hex_rational("-0x1.0000000000000p-20"),
            exact(-(2f64.powi(-20)))
        );
        assert_eq!(hex_rational("0x0.0p+0"), BigRational::zero());
        assert_eq!(hex_rational("0x1.999999999999ap-4"), exact(0.1));
        assert_eq!(
            hex_rational("0x1.7d78400000000p+26"),
            BigRational::from_integer(BigInt::from(100_000_000u32))
        );
        assert_eq!(hex_f64("-0x1.7d78400000000p+26"), -1e8);
        assert_eq!(hex_f64("0x1.999999999999ap-4"), 0.1);
        assert_ne!(
            hex_rational("0x1.999999999999ap-4"),
            BigRational::new(BigInt::one(), BigInt::from(10))
        );
    }
}

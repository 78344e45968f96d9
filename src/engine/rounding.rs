//! Rounding-error bookkeeping: the constants of the a-priori error analysis and the arithmetic a model
//! is deployed in.
//!
//! Every error bound here follows the standard model of floating-point arithmetic: for a dot product of
//! length `n` evaluated in any order, `|fl(aᵀb) − aᵀb| ≤ γₙ Σ|aᵢ||bᵢ|` with `γₙ = n·u / (1 − n·u)` and `u`
//! the unit roundoff (Higham, *Accuracy and Stability of Numerical Algorithms*, 2nd ed., §3.1,
//! Lemma 3.1 and eq. 3.4). Nothing here rounds anything; it only says how large an error can be.

use serde::{Deserialize, Serialize};

/// Unit roundoff of IEEE 754 binary64 (round to nearest): 2⁻⁵³.
pub const UNIT_ROUNDOFF_F64: f64 = 1.0 / 9_007_199_254_740_992.0;

/// Unit roundoff of IEEE 754 binary32 (round to nearest): 2⁻²⁴.
pub const UNIT_ROUNDOFF_F32: f64 = 1.0 / 16_777_216.0;

/// `γₙ = n·u / (1 − n·u)` (Higham §3.1); `+∞` when `n·u ≥ 1` (no useful bound).
pub fn gamma(n: usize, unit_roundoff: f64) -> f64 {
    let nu = n as f64 * unit_roundoff;
    if nu >= 1.0 {
        f64::INFINITY
    } else {
        nu / (1.0 - nu)
    }
}

/// The floating-point format a model is evaluated in where it is deployed.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Default, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Arithmetic {
    /// IEEE 754 binary64 (the default).
    #[default]
    Float64,
    /// IEEE 754 binary32 (e.g. a model exported from a float32 ONNX graph).
    Float32,
}

impl Arithmetic {
    /// The unit roundoff of the format.
    pub fn unit_roundoff(self) -> f64 {
        match self {
            Arithmetic::Float64 => UNIT_ROUNDOFF_F64,
            Arithmetic::Float32 => UNIT_ROUNDOFF_F32,
        }
    }

    /// The name used in model files, reports and sheets (`float64`, `float32`).
    pub fn name(self) -> &'static str {
        match self {
            Arithmetic::Float64 => "float64",
            Arithmetic::Float32 => "float32",
        }
    }

    /// Rounds a double to this format (identity for float64).
    pub fn round(self, value: f64) -> f64 {
        match self {
            Arithmetic::Float64 => value,
            Arithmetic::Float32 => value as f32 as f64,
        }
    }
}

impl std::str::FromStr for Arithmetic {
    type Err = String;
    fn from_str(s: &str) -> Result<Arithmetic, String> {
        match s {
            "float64" | "f64" | "double" => Ok(Arithmetic::Float64),
            "float32" | "f32" | "float" => Ok(Arithmetic::Float32),
            other => Err(format!(
                "unknown arithmetic \"{other}\", expected float64 or float32"
            )),
        }
    }
}

/// The error multiplier the bound computations use for sums of magnitudes: `2·γ_N` in binary64, where
/// `N` covers the longest dot product of the network plus the additions that accumulate constants
/// across layers (see docs/bounds.md, "Rounding"). The factor 2 also covers the rounding of the
/// allowance computation itself, which is a sum of non-negative terms with relative error below `γ_N`.
pub fn allowance_factor(longest_dot: usize, depth: usize) -> f64 {
    2.0 * gamma(longest_dot + 3 * depth + 4, UNIT_ROUNDOFF_F64)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn gamma_matches_its_definition() {
        // γ₁₀ for binary64: 10u/(1 − 10u), Higham §3.1.
        let u = UNIT_ROUNDOFF_F64;
        assert!((gamma(10, u) - 10.0 * u / (1.0 - 10.0 * u)).abs() < 1e-30);
        assert_eq!(gamma(1 << 25, UNIT_ROUNDOFF_F32), f64::INFINITY);
    }

    #[test]
    fn unit_roundoffs_are_half_an_ulp_of_one() {
        // Common practice: u = ε/2 with ε the gap between 1 and the next representable number.
        assert_eq!(UNIT_ROUNDOFF_F64, f64::EPSILON / 2.0);
        assert_eq!(UNIT_ROUNDOFF_F32, f32::EPSILON as f64 / 2.0);
    }

    #[test]
    fn a_dot_product_error_stays_within_gamma() {
        // A sum with heavy cancellation: exact value 1, computed naively loses it; the bound covers it.
        let a = [1e16, 1.0, -1e16];
        let b = [1.0, 1.0, 1.0];
        let computed: f64 = a.iter().zip(&b).map(|(x, y)| x * y).sum();
        let magnitude: f64 = a.iter().zip(&b).map(|(x, y)| (x * y).abs()).sum();
        assert!((computed - 1.0).abs() <= gamma(3, UNIT_ROUNDOFF_F64) * magnitude);
    }
}

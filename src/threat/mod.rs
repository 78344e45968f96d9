//! The threat model: which perturbations of an input the requirement covers.
//!
//! A [`Budget`] gives a norm and a radius per feature in the feature's own raw units (radius 0 = the
//! feature is fixed). Around a sample it becomes a [`Region`]: the ball
//! `{x : ‖D⁻¹(x − c)‖ ≤ 1}` with `D = diag(radii)` (for L-inf: `|x_i − c_i| ≤ r_i`; for L2:
//! `Σ ((x_i − c_i)/r_i)² ≤ 1`, fixed features held at `c_i`), intersected with the model's valid input
//! range. With one number for all features this is the usual L-inf or L2 ball of that radius.
//!
//! The region is described exactly (centre, radii, range); the boxes derived from it are rounded
//! outward for bounds and inward for the points attacks produce, and membership is decided without
//! tolerance ([`Region`], [`exact`]).

pub mod exact;
mod region;
pub mod requirement;

pub use region::Region;

use std::fmt;

/// The norm of the perturbation ball.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Norm {
    /// Largest per-feature change (box).
    Linf,
    /// Euclidean length of the change (scaled per feature by the radii).
    L2,
}

impl fmt::Display for Norm {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(match self {
            Norm::Linf => "linf",
            Norm::L2 => "l2",
        })
    }
}

impl std::str::FromStr for Norm {
    type Err = String;
    fn from_str(s: &str) -> Result<Norm, String> {
        match s.to_ascii_lowercase().as_str() {
            "linf" | "l-inf" | "inf" => Ok(Norm::Linf),
            "l2" => Ok(Norm::L2),
            other => Err(format!("unknown norm \"{other}\", expected linf or l2")),
        }
    }
}

/// A perturbation budget: a norm and a radius per feature (raw input units, ≥ 0).
#[derive(Debug, Clone, PartialEq)]
pub struct Budget {
    /// The ball's norm.
    pub norm: Norm,
    /// Radius per input feature; 0 fixes the feature.
    pub radii: Vec<f64>,
}

impl Budget {
    /// The same radius for all `dim` features.
    pub fn uniform(norm: Norm, epsilon: f64, dim: usize) -> Budget {
        Budget {
            norm,
            radii: vec![epsilon; dim],
        }
    }

    /// The budget with every radius multiplied by `factor` (used by sweeps and radius search).
    pub fn scaled(&self, factor: f64) -> Budget {
        Budget {
            norm: self.norm,
            radii: self.radii.iter().map(|r| r * factor).collect(),
        }
    }

    /// The region around `center` clipped to the input range `[lower, upper]`.
    pub fn region(&self, center: &[f64], lower: &[f64], upper: &[f64]) -> Region {
        Region::new(center, self, lower, upper)
    }
}

/// `‖b − a‖` in `norm`.
pub fn distance(norm: Norm, a: &[f64], b: &[f64]) -> f64 {
    match norm {
        Norm::Linf => a
            .iter()
            .zip(b)
            .map(|(x, y)| (x - y).abs())
            .fold(0.0, f64::max),
        Norm::L2 => a
            .iter()
            .zip(b)
            .map(|(x, y)| (x - y) * (x - y))
            .sum::<f64>()
            .sqrt(),
    }
}

/// Which class changes count as a violation of the requirement.
#[derive(Debug, Clone, PartialEq, Default)]
pub enum Targets {
    /// Any change of the predicted class counts.
    #[default]
    Any,
    /// Only changes *into* these classes count (e.g. a fault called `normal`); `from` optionally limits
    /// which true classes the rule applies to (samples of other classes are checked against `Any`).
    Into {
        /// Classes a sample must never be moved into.
        classes: Vec<usize>,
        /// True classes the restriction applies to; `None` = all.
        from: Option<Vec<usize>>,
    },
}

impl Targets {
    /// The other classes `j` whose margin `logit_y − logit_j` must stay positive for a sample of class `y`.
    pub fn forbidden_for(&self, y: usize, class_count: usize) -> Vec<usize> {
        match self {
            Targets::Any => (0..class_count).filter(|j| *j != y).collect(),
            Targets::Into { classes, from } => {
                let applies = from.as_ref().map(|f| f.contains(&y)).unwrap_or(true);
                if !applies {
                    return (0..class_count).filter(|j| *j != y).collect();
                }
                classes
                    .iter()
                    .copied()
                    .filter(|j| *j != y && *j < class_count)
                    .collect()
            }
        }
    }
}

//! The threat model: which perturbations of an input the requirement covers.
//!
//! A [`Budget`] gives a norm and a radius per feature in the feature's own raw units (radius 0 = the
//! feature is fixed). Around a sample it becomes a [`Region`]: the ball
//! `{x : ‖D⁻¹(x − c)‖ ≤ 1}` with `D = diag(radii)` (for L-inf: `|x_i − c_i| ≤ r_i`; for L2:
//! `Σ ((x_i − c_i)/r_i)² ≤ 1`, fixed features held at `c_i`), intersected with the model's valid input
//! range. With one number for all features this is the usual L-inf or L2 ball of that radius.

pub mod exact;
pub mod requirement;

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

/// The set of inputs a requirement covers around one sample: ball ∩ valid input range.
#[derive(Debug, Clone, PartialEq)]
pub struct Region {
    /// The unperturbed sample.
    pub center: Vec<f64>,
    /// The ball's norm.
    pub norm: Norm,
    /// Radius per feature (0 = fixed).
    pub radii: Vec<f64>,
    /// Lower corner of the smallest box containing the region (for L-inf it *is* the region).
    pub lower: Vec<f64>,
    /// Upper corner of that box.
    pub upper: Vec<f64>,
}

/// Relative slack allowed when checking that a point lies in a region (floating-point rounding only).
pub const MEMBERSHIP_TOLERANCE: f64 = 1e-12;

impl Region {
    /// Builds the region; `lower`/`upper` is the model's valid input range.
    pub fn new(center: &[f64], budget: &Budget, lower: &[f64], upper: &[f64]) -> Region {
        let n = center.len();
        let mut lo = Vec::with_capacity(n);
        let mut hi = Vec::with_capacity(n);
        for (i, (&c, &r)) in center.iter().zip(&budget.radii).enumerate() {
            lo.push((c - r).max(lower[i]).min(c));
            hi.push((c + r).min(upper[i]).max(c));
        }
        Region {
            center: center.to_vec(),
            norm: budget.norm,
            radii: budget.radii.clone(),
            lower: lo,
            upper: hi,
        }
    }

    /// Input dimension.
    pub fn dim(&self) -> usize {
        self.center.len()
    }

    /// True when `x` lies in the region (up to [`MEMBERSHIP_TOLERANCE`] for rounding).
    pub fn contains(&self, x: &[f64]) -> bool {
        if x.len() != self.center.len() {
            return false;
        }
        for (i, &v) in x.iter().enumerate() {
            let slack = MEMBERSHIP_TOLERANCE * (1.0 + self.center[i].abs());
            if !(v >= self.lower[i] - slack && v <= self.upper[i] + slack) {
                return false;
            }
        }
        match self.norm {
            Norm::Linf => true,
            Norm::L2 => self.scaled_norm(x) <= 1.0 + 1e-9,
        }
    }

    /// `‖D⁻¹(x − c)‖` in the region's norm: ≤ 1 inside the ball. A change in a fixed feature gives ∞.
    pub fn scaled_norm(&self, x: &[f64]) -> f64 {
        let mut acc: f64 = 0.0;
        for (i, &v) in x.iter().enumerate() {
            let d = v - self.center[i];
            let r = self.radii[i];
            let q = if r > 0.0 {
                d.abs() / r
            } else if d.abs() <= MEMBERSHIP_TOLERANCE * (1.0 + self.center[i].abs()) {
                0.0
            } else {
                f64::INFINITY
            };
            match self.norm {
                Norm::Linf => acc = acc.max(q),
                Norm::L2 => acc += q * q,
            }
        }
        match self.norm {
            Norm::Linf => acc,
            Norm::L2 => acc.sqrt(),
        }
    }

    /// Plain (unscaled) distance `‖x − c‖` in the region's norm, in raw input units.
    pub fn distance(&self, x: &[f64]) -> f64 {
        distance(self.norm, &self.center, x)
    }

    /// Moves `x` into the region: scale the change onto the ball (in the radii's metric), then clip to
    /// the box. Clipping only shrinks coordinates of the change, so the result stays in the ball.
    pub fn project(&self, x: &mut [f64]) {
        if self.norm == Norm::L2 {
            let mut acc = 0.0;
            for ((&v, &c), &r) in x.iter().zip(&self.center).zip(&self.radii) {
                if r > 0.0 {
                    let q = (v - c) / r;
                    acc += q * q;
                }
            }
            let length = acc.sqrt();
            if length > 1.0 {
                for (v, &c) in x.iter_mut().zip(&self.center) {
                    *v = c + (*v - c) / length;
                }
            }
        }
        for ((v, &lo), &hi) in x.iter_mut().zip(&self.lower).zip(&self.upper) {
            *v = v.clamp(lo, hi);
        }
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

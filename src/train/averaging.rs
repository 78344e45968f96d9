//! Iterate averaging for primal recovery: the uniform average of the weights and multipliers over
//! the last steps of a primal-dual run.
//!
//! On a convex problem the last iterate of stochastic primal-dual steps jitters around the saddle
//! point by the step size and the batch noise, while the running average converges (averaging of
//! stochastic approximation iterates, Polyak & Juditsky, 1992; ergodic averages for stochastic
//! saddle-point problems, Nemirovski, Juditsky, Lan & Shapiro, 2009; primal recovery from dual
//! methods, Nedić & Ozdaglar, 2009). On a non-convex network the average of weights from one basin
//! is the weight averaging of Izmailov et al. (2018); it is a training heuristic there, and whatever
//! it returns is judged by sound bounds afterwards. What it guarantees: the average is exact (sums in
//! f64 over the added iterates) and of the same shape as the iterates.

use crate::model::Network;

use super::backprop::{add_scaled, zeros_like};

/// The running sums of the iterates added so far.
#[derive(Debug, Clone)]
pub struct IterateAverage {
    network_sum: Network,
    multiplier_sum: Vec<f64>,
    count: usize,
}

impl IterateAverage {
    /// An empty average for iterates shaped like `network` with `multipliers` multipliers.
    pub fn new(network: &Network, multipliers: usize) -> IterateAverage {
        IterateAverage {
            network_sum: zeros_like(network),
            multiplier_sum: vec![0.0; multipliers],
            count: 0,
        }
    }

    /// Adds one iterate.
    pub fn add(&mut self, network: &Network, multipliers: &[f64]) {
        add_scaled(&mut self.network_sum, network, 1.0);
        for (sum, m) in self.multiplier_sum.iter_mut().zip(multipliers) {
            *sum += m;
        }
        self.count += 1;
    }

    /// How many iterates were added.
    pub fn count(&self) -> usize {
        self.count
    }

    /// The average weights (`None` before the first iterate).
    pub fn network(&self) -> Option<Network> {
        if self.count == 0 {
            return None;
        }
        let mut average = zeros_like(&self.network_sum);
        add_scaled(&mut average, &self.network_sum, 1.0 / self.count as f64);
        Some(average)
    }

    /// The average multipliers (`None` before the first iterate).
    pub fn multipliers(&self) -> Option<Vec<f64>> {
        (self.count > 0).then(|| {
            self.multiplier_sum
                .iter()
                .map(|s| s / self.count as f64)
                .collect()
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use nalgebra::{DMatrix, DVector};

    fn network(value: f64) -> Network {
        Network::from_dense(vec![crate::model::Dense {
            weights: DMatrix::from_element(1, 2, value),
            bias: DVector::from_element(1, -value),
        }])
    }

    #[test]
    fn the_average_is_the_mean_of_the_added_iterates() {
        let mut average = IterateAverage::new(&network(0.0), 2);
        assert!(average.network().is_none() && average.multipliers().is_none());
        average.add(&network(1.0), &[0.5, 0.0]);
        average.add(&network(4.0), &[1.5, 2.0]);
        let mean = average.network().expect("two iterates");
        assert!((mean.layers[0].to_dense().weights[(0, 1)] - 2.5).abs() < 1e-12);
        assert!((mean.layers[0].to_dense().bias[0] + 2.5).abs() < 1e-12);
        assert_eq!(average.multipliers(), Some(vec![1.0, 1.0]));
        assert_eq!(average.count(), 2);
    }
}

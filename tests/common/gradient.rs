//! Central finite differences against an analytic gradient, parameter slot by parameter slot
//! (common practice: reverse-mode gradients must agree with central differences, error O(h²)).

use ballast::model::Network;
use nalgebra::DMatrix;

/// Central finite difference of `loss` with respect to every trainable parameter of `network`
/// (every slot of every layer's `parameters_mut()`: weights and biases of dense layers, kernels and
/// biases of convolutions), compared with `analytic` (relative tolerance on the larger of the two,
/// absolute floor `floor`). Fails when the analytic gradient is (nearly) zero: the check would be
/// vacuous.
pub fn check_gradient(
    network: &Network,
    analytic: &Network,
    loss: &dyn Fn(&Network) -> f64,
    floor: f64,
) {
    let h = 1e-6;
    let mut checked = 0;
    for (k, layer) in network.layers.iter().enumerate() {
        let slots: Vec<usize> = layer.parameters().iter().map(|p| p.len()).collect();
        for (slot, len) in slots.into_iter().enumerate() {
            for i in 0..len {
                let mut plus = network.clone();
                plus.layers[k].parameters_mut()[slot][i] += h;
                let mut minus = network.clone();
                minus.layers[k].parameters_mut()[slot][i] -= h;
                let numeric = (loss(&plus) - loss(&minus)) / (2.0 * h);
                let exact = analytic.layers[k].parameters()[slot][i];
                assert!(
                    (numeric - exact).abs() <= 1e-5 * numeric.abs().max(exact.abs()) + floor,
                    "layer {k} parameter slot {slot} entry {i}: finite difference {numeric}, \
                     backprop {exact}"
                );
                checked += 1;
            }
        }
    }
    assert!(checked > 0);
    let size: f64 = analytic
        .layers
        .iter()
        .flat_map(|l| l.parameters())
        .flatten()
        .map(|v| v.abs())
        .sum();
    assert!(
        size > 1e-6,
        "the analytic gradient is (nearly) zero: the check would be vacuous"
    );
}

/// A batch of `samples` columns of `dim` values uniform in [−1, 1) (seeded).
pub fn random_batch(dim: usize, samples: usize, seed: u64) -> DMatrix<f64> {
    use rand::{Rng, SeedableRng};
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    DMatrix::from_fn(dim, samples, |_, _| rng.gen_range(-1.0..1.0))
}

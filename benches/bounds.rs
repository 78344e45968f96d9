//! Benchmarks of the sound bounds (src/bound/), recorded in docs/bounds-benchmark form in
//! docs/benchmarks/bounds.md.
//!
//! Run with `cargo bench --bench bounds` (add `-- quick` for a shorter run). Plain wall-clock timing
//! (best of several repetitions), because one repetition of (a) already takes seconds:
//!
//! (a) batched interval and linear bounds for 1,000 samples on a random 784-256-256-10 network, with the
//!     achieved GFLOP/s next to the machine's dense f64 matrix-multiply rate (nalgebra `DMatrix` product,
//!     measured here on one core and on both cores);
//! (b) optimised linear bounds versus the LP on the digits fixture (first 100 test rows, L-inf
//!     ε ∈ {0.01, 0.02, 0.05}): certified counts and time per sample, next to scipy/HiGHS's counts and
//!     time from tests/reference/out/lp_digits.json;
//! (c) tightness of the four methods on both digits models at larger ε.

use std::path::Path;
use std::time::Instant;

use ballast::bound::{self, interval, linear, optimised, Method};
use ballast::data::{load_csv, DataOptions};
use ballast::model::{Dense, Model, Network};
use ballast::threat::{Budget, Norm, Region};
use nalgebra::{DMatrix, DVector};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};
use rayon::prelude::*;

fn best_of<T>(repetitions: usize, mut run: impl FnMut() -> T) -> (f64, T) {
    let mut best = f64::INFINITY;
    let mut last = None;
    for _ in 0..repetitions {
        let start = Instant::now();
        let value = run();
        best = best.min(start.elapsed().as_secs_f64());
        last = Some(value);
    }
    (best, last.expect("at least one repetition"))
}

fn random_network(rng: &mut ChaCha8Rng, sizes: &[usize]) -> Network {
    Network::from_dense(
        sizes
            .windows(2)
            .map(|pair| {
                let scale = (2.0 / pair[0] as f64).sqrt();
                let mut normal = || -> f64 { StandardNormal.sample(&mut *rng) };
                let weights = DMatrix::from_fn(pair[1], pair[0], |_, _| scale * normal());
                let bias = DVector::from_fn(pair[1], |_, _| 0.05 * normal());
                Dense { weights, bias }
            })
            .collect(),
    )
}

fn gemm_rate(threads: usize, repetitions: usize) -> f64 {
    // Shapes of the dominant product in (a): (2·256 rows) × 256 times 256 × 784.
    let mut rng = ChaCha8Rng::seed_from_u64(1);
    let a = DMatrix::from_fn(512, 256, |_, _| rng.gen_range(-1.0..1.0));
    let b = DMatrix::from_fn(256, 784, |_, _| rng.gen_range(-1.0..1.0));
    let flops = 2.0 * 512.0 * 256.0 * 784.0 * threads as f64 * 4.0;
    let (seconds, _) = best_of(repetitions, || {
        (0..threads)
            .into_par_iter()
            .map(|_| (0..4).map(|_| (&a * &b)[(0, 0)]).sum::<f64>())
            .sum::<f64>()
    });
    flops / seconds / 1e9
}

fn part_a(quick: bool) {
    let samples = if quick { 200 } else { 1000 };
    let repetitions = if quick { 1 } else { 3 };
    let mut rng = ChaCha8Rng::seed_from_u64(2026);
    let network = random_network(&mut rng, &[784, 256, 256, 10]);
    let epsilon = 0.002;
    let regions: Vec<Region> = (0..samples)
        .map(|_| {
            let x: Vec<f64> = (0..784).map(|_| rng.gen_range(0.0..1.0)).collect();
            Budget::uniform(Norm::Linf, epsilon, 784).region(&x, &[0.0; 784], &[1.0; 784])
        })
        .collect();
    let labels: Vec<usize> = regions
        .iter()
        .map(|r| ballast::model::predicted_class(network.forward(&r.center).as_slice()))
        .collect();
    let targets: Vec<Vec<usize>> = labels
        .iter()
        .map(|&y| (0..10).filter(|j| *j != y).collect())
        .collect();

    let (interval_seconds, interval_result) = best_of(repetitions, || {
        interval::batch_margin_lower_bounds(&network, &regions, &labels, &targets).unwrap()
    });
    // Two products (centres by W, radii by |W|) per layer per sample.
    let interval_flops: f64 = network
        .layers
        .iter()
        .take(network.layers.len() - 1)
        .map(|l| 2.0 * 2.0 * (l.parameter_count() * samples) as f64)
        .sum();
    let (linear_seconds, linear_result) = best_of(repetitions, || {
        linear::batch_margin_lower_bounds(&network, &regions, &labels, &targets).unwrap()
    });
    let unstable: Vec<f64> = (0..2)
        .map(|k| {
            linear_result
                .samples
                .iter()
                .map(|s| s.pre_activation[k].unstable_units().len() as f64)
                .sum::<f64>()
                / samples as f64
        })
        .collect();
    let unstable_interval: Vec<f64> = (0..2)
        .map(|k| {
            let (lo, hi) = (&interval_result.lower[k], &interval_result.upper[k]);
            lo.iter()
                .zip(hi.iter())
                .filter(|(l, u)| **l < 0.0 && **u > 0.0)
                .count() as f64
                / samples as f64
        })
        .collect();
    // Multiply-adds of the backward passes: two columns per unstable unit of the second hidden layer
    // (through two layers), nine margin columns per sample (through all three).
    let sizes: Vec<f64> = network
        .layers
        .iter()
        .map(|l| l.parameter_count() as f64)
        .collect();
    let linear_flops = 2.0
        * samples as f64
        * (2.0 * unstable_interval[1] * (sizes[0] + sizes[1]) + 9.0 * sizes.iter().sum::<f64>());
    let certified_interval = interval_result
        .margins
        .iter()
        .filter(|m| m.iter().all(|v| *v > bound::CERTIFY_TOLERANCE))
        .count();
    let certified_linear = linear_result
        .samples
        .iter()
        .filter(|s| s.certified())
        .count();
    let one_core = gemm_rate(1, repetitions.max(2));
    let two_cores = gemm_rate(rayon::current_num_threads(), repetitions.max(2));
    println!(
        "## (a) batched bounds, random 784-256-256-10, {samples} samples, L-inf eps {epsilon}"
    );
    println!();
    println!("| measure | value |");
    println!("| --- | --- |");
    println!("| rayon threads | {} |", rayon::current_num_threads());
    println!("| nalgebra DMatrix gemm (512x256 · 256x784), 1 core | {one_core:.2} GFLOP/s |");
    println!("| nalgebra DMatrix gemm, all cores | {two_cores:.2} GFLOP/s |");
    println!(
        "| interval batch | {:.4} s, {:.0} samples/s, {:.2} GFLOP/s, certified {certified_interval} |",
        interval_seconds,
        samples as f64 / interval_seconds,
        interval_flops / interval_seconds / 1e9
    );
    println!(
        "| linear batch | {:.3} s, {:.1} samples/s, {:.2} GFLOP/s ({:.0}% of all-core gemm), certified {certified_linear} |",
        linear_seconds,
        samples as f64 / linear_seconds,
        linear_flops / linear_seconds / 1e9,
        100.0 * linear_flops / linear_seconds / 1e9 / two_cores
    );
    println!(
        "| unstable units per sample (interval: layer 1, 2) | {:.1}, {:.1} |",
        unstable_interval[0], unstable_interval[1]
    );
    println!(
        "| unstable units per sample (linear: layer 1, 2) | {:.1}, {:.1} |",
        unstable[0], unstable[1]
    );
    println!();
}

#[derive(serde::Deserialize)]
struct Reference {
    versions: serde_json::Value,
    cases: Vec<Case>,
}

#[derive(serde::Deserialize)]
struct Case {
    epsilon: f64,
    certified: usize,
    seconds_per_sample: f64,
}

fn part_b(quick: bool) {
    let model = Model::load(Path::new("tests/data/digits_mlp.model.json")).expect("digits model");
    let data = load_csv(
        Path::new("tests/data/digits_test.csv"),
        &model,
        &DataOptions::default(),
    )
    .expect("digits data");
    let text = std::fs::read_to_string("tests/reference/out/lp_digits.json").expect("LP reference");
    let reference: Reference = serde_json::from_str(&text).expect("LP reference JSON");
    let network = model.classifier();
    let rows = 100;
    let repetitions = if quick { 1 } else { 5 };
    println!("## (b) digits 64-32-10, first {rows} test rows, L-inf, one thread");
    println!();
    println!("scipy/HiGHS reference versions: {}", reference.versions);
    println!();
    println!("| eps | method | certified | ms per sample | vs scipy LP time |");
    println!("| --- | --- | --- | --- | --- |");
    for case in &reference.cases {
        let regions: Vec<Region> = (0..rows)
            .map(|r| {
                Budget::uniform(Norm::Linf, case.epsilon, 64).region(
                    data.sample(r),
                    &model.input.lower,
                    &model.input.upper,
                )
            })
            .collect();
        let scipy_ms = case.seconds_per_sample * 1e3;
        println!(
            "| {} | scipy LP on interval bounds | {} | {:.3} | 1 |",
            case.epsilon, case.certified, scipy_ms
        );
        for method in [Method::Interval, Method::Linear, Method::OptimisedLinear] {
            let reps = repetitions;
            let (seconds, certified) = best_of(reps, || {
                (0..rows)
                    .filter(|&r| {
                        let y = data.labels[r];
                        let targets: Vec<usize> = (0..10).filter(|j| *j != y).collect();
                        let result = if method == Method::OptimisedLinear {
                            optimised::margin_lower_bounds(
                                &network,
                                &regions[r],
                                y,
                                &targets,
                                None,
                                &optimised::SlopeOptions::default(),
                            )
                        } else {
                            bound::margin_lower_bounds(
                                &network,
                                &regions[r],
                                y,
                                &targets,
                                method,
                                None,
                            )
                        };
                        result.expect("bounds").certified()
                    })
                    .count()
            });
            let ms = seconds / rows as f64 * 1e3;
            println!(
                "| {} | ballast {} | {certified} | {ms:.4} | 1/{:.0} |",
                case.epsilon,
                method.name(),
                scipy_ms / ms
            );
        }
    }
    println!();
}

/// (c) Tightness: certified counts and the mean smallest margin bound per method on both digits models
/// (first 100 test rows, L-inf), optimised slopes run for all 20 steps.
fn part_c() {
    let data_model =
        Model::load(Path::new("tests/data/digits_mlp.model.json")).expect("digits model");
    let data = load_csv(
        Path::new("tests/data/digits_test.csv"),
        &data_model,
        &DataOptions::default(),
    )
    .expect("digits data");
    println!("## (c) tightness on the digits models, first 100 test rows, L-inf");
    println!();
    println!("| model | eps | certified (interval / linear / optimised) | mean smallest bound (same order) |");
    println!("| --- | --- | --- | --- |");
    for file in [
        "tests/data/digits_mlp.model.json",
        "tests/data/digits_mlp_deep.model.json",
    ] {
        let model = Model::load(Path::new(file)).expect("digits model");
        let network = model.classifier();
        for epsilon in [0.05, 0.08, 0.1] {
            let mut certified = [0usize; 3];
            let mut worst = [0.0f64; 3];
            for r in 0..100 {
                let region = Budget::uniform(Norm::Linf, epsilon, 64).region(
                    data.sample(r),
                    &model.input.lower,
                    &model.input.upper,
                );
                let y = data.labels[r];
                let targets: Vec<usize> = (0..10).filter(|j| *j != y).collect();
                let options = optimised::SlopeOptions::default();
                let results = [
                    bound::margin_lower_bounds(
                        &network,
                        &region,
                        y,
                        &targets,
                        Method::Interval,
                        None,
                    ),
                    bound::margin_lower_bounds(
                        &network,
                        &region,
                        y,
                        &targets,
                        Method::Linear,
                        None,
                    ),
                    optimised::margin_lower_bounds(&network, &region, y, &targets, None, &options),
                ];
                for (m, result) in results.into_iter().enumerate() {
                    let result = result.expect("bounds");
                    certified[m] += usize::from(result.certified());
                    worst[m] += result.worst() / 100.0;
                }
            }
            println!(
                "| {} | {epsilon} | {} / {} / {} | {:.4} / {:.4} / {:.4} |",
                model.name.clone().unwrap_or_default(),
                certified[0],
                certified[1],
                certified[2],
                worst[0],
                worst[1],
                worst[2]
            );
        }
    }
    println!();
}

fn main() {
    let quick = std::env::args().any(|a| a == "quick");
    println!(
        "ballast bounds benchmark ({} threads)",
        rayon::current_num_threads()
    );
    println!();
    part_b(quick);
    part_c();
    part_a(quick);
}

//! Attack throughput of the batched (lockstep) attack.
//!
//! - `pgd100x5_wide_*`: a 784-256-256-10 ReLU network — the 784-input benchmark fixture
//!   `target/bench-fixtures/wide_256x2.model.json` with the correctly classified rows among the 200 of
//!   `wide_test.csv` when present (made by `tests/reference/wide_fixtures.py`), otherwise a random
//!   network of that shape (ChaCha8 seed 17, uniform weights scaled by 1/√fan-in) with 200 random
//!   inputs in [0, 1] labelled by the network itself — L-inf ε = 0.02, PGD 100 steps × 5 restarts
//!   (the first from the sample), untargeted, no FGSM, early exit per sample: the schedule of
//!   `tests/reference/pgd_batched_reference.py` without `--targeted`; f64 and f32 search.
//! - `pgd100x5_digits`: the digits MLP fixture (64-32-10), correctly classified samples among the first
//!   100 test rows, L-inf ε = 0.05, PGD 100 × 5, full budget; all samples in one batch, and one sample at
//!   a time (`attack_sample` in a loop) to show what batching brings.
//!
//! Throughput is samples per second. `benches/attack_compare.sh` times the `attack` command on the
//! full 200-row wide workload next to a batched numpy PGD.

use std::path::Path;

use ballast::attack::{
    attack_batch, attack_sample, sample_seed, AttackProblem, AttackSettings, SearchPrecision,
};
use ballast::data::{load_csv, DataOptions};
use ballast::model::{predicted_class, Dense, Model, Network};
use ballast::threat::{Budget, Norm, Targets};
use criterion::{criterion_group, criterion_main, Criterion, Throughput};
use nalgebra::{DMatrix, DVector};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

const WIDE_MODEL: &str = "target/bench-fixtures/wide_256x2.model.json";
const WIDE_DATA: &str = "target/bench-fixtures/wide_test.csv";
const WIDE_ROWS: usize = 200;

/// PGD 100 × 5, untargeted, no FGSM; `stop_at_first` as given.
fn untargeted(stop_at_first: bool, precision: SearchPrecision) -> AttackSettings {
    AttackSettings {
        steps: 100,
        restarts: 5,
        fgsm_first: false,
        targeted: false,
        stop_at_first,
        precision,
        ..AttackSettings::default()
    }
}

/// Sample `index` at `x` with every other class forbidden; inputs in [0, 1].
fn problem(
    index: usize,
    x: &[f64],
    label: usize,
    budget: &Budget,
    classes: usize,
) -> AttackProblem {
    AttackProblem {
        index,
        region: budget.region(x, &vec![0.0; x.len()], &vec![1.0; x.len()]),
        label,
        forbidden: Targets::Any.forbidden_for(label, classes),
        extra_starts: Vec::new(),
    }
}

/// The wide workload: the fixture when it exists, a random network of the same shape otherwise.
fn wide() -> (String, Network, Vec<AttackProblem>) {
    let budget = Budget::uniform(Norm::Linf, 0.02, 784);
    if Path::new(WIDE_MODEL).exists() && Path::new(WIDE_DATA).exists() {
        let model = Model::load(Path::new(WIDE_MODEL)).expect("fixture model");
        let data = load_csv(Path::new(WIDE_DATA), &model, &DataOptions::default()).expect("data");
        let network = model.classifier();
        let problems = (0..WIDE_ROWS)
            .filter(|&i| {
                predicted_class(network.forward(data.sample(i)).as_slice()) == data.labels[i]
            })
            .map(|i| problem(i, data.sample(i), data.labels[i], &budget, 10))
            .collect();
        return ("fixture".into(), network, problems);
    }
    let mut rng = ChaCha8Rng::seed_from_u64(17);
    let sizes = [784, 256, 256, 10];
    let network = Network::from_dense(
        sizes
            .windows(2)
            .map(|w| {
                let scale = 1.0 / (w[0] as f64).sqrt();
                Dense {
                    weights: DMatrix::from_fn(w[1], w[0], |_, _| scale * rng.gen_range(-1.0..1.0)),
                    bias: DVector::from_fn(w[1], |_, _| 0.1 * rng.gen_range(-1.0..1.0)),
                }
            })
            .collect(),
    );
    let problems = (0..WIDE_ROWS)
        .map(|i| {
            let x: Vec<f64> = (0..784).map(|_| rng.gen_range(0.0..1.0)).collect();
            let label = predicted_class(network.forward(&x).as_slice());
            problem(i, &x, label, &budget, 10)
        })
        .collect();
    ("random".into(), network, problems)
}

fn pgd_wide(c: &mut Criterion) {
    let (source, network, problems) = wide();
    let mut group = c.benchmark_group(format!("pgd100x5_wide_{source}"));
    group.sample_size(10);
    group.throughput(Throughput::Elements(problems.len() as u64));
    for (name, precision) in [
        ("f64", SearchPrecision::Double),
        ("f32", SearchPrecision::Single),
    ] {
        let settings = untargeted(true, precision);
        group.bench_function(format!("early_exit_{name}"), |b| {
            b.iter(|| attack_batch(&network, &problems, &settings).expect("valid"))
        });
    }
    group.finish();
}

fn digits() -> (Network, Vec<AttackProblem>) {
    let model = Model::load(Path::new("tests/data/digits_mlp.model.json")).expect("fixture model");
    let data = load_csv(
        Path::new("tests/data/digits_test.csv"),
        &model,
        &DataOptions::default(),
    )
    .expect("fixture data");
    let network = model.classifier();
    let budget = Budget::uniform(Norm::Linf, 0.05, model.input.dim);
    assert!(
        model.input.lower.iter().all(|v| *v == 0.0) && model.input.upper.iter().all(|v| *v == 1.0)
    );
    let problems = (0..100)
        .filter(|&i| predicted_class(network.forward(data.sample(i)).as_slice()) == data.labels[i])
        .map(|i| {
            problem(
                i,
                data.sample(i),
                data.labels[i],
                &budget,
                model.class_count(),
            )
        })
        .collect();
    (network, problems)
}

fn pgd_digits(c: &mut Criterion) {
    let (network, problems) = digits();
    let full = untargeted(false, SearchPrecision::Double);
    let mut group = c.benchmark_group("pgd100x5_digits");
    group.sample_size(10);
    group.throughput(Throughput::Elements(problems.len() as u64));
    group.bench_function("full_budget_batch", |b| {
        b.iter(|| attack_batch(&network, &problems, &full).expect("valid"))
    });
    group.bench_function("full_budget_one_at_a_time", |b| {
        b.iter(|| {
            problems
                .iter()
                .map(|p| {
                    let seed = sample_seed(full.seed, p.index);
                    attack_sample(&network, &p.region, p.label, &p.forbidden, &full, seed, &[])
                        .expect("valid")
                })
                .collect::<Vec<_>>()
        })
    });
    group.finish();
}

criterion_group!(benches, pgd_wide, pgd_digits);
criterion_main!(benches);

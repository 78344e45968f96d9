//! Attack throughput: PGD with 100 steps × 5 restarts (L-inf, eps 0.05) on the digits MLP fixture,
//! correctly classified samples among the first 100 test rows. The `full budget` variants run every
//! step (no early exit, no FGSM, no targeted runs: 500 gradient steps per sample, the same work as the
//! numpy reference's full-budget mode); `defaults` is the shipped schedule with early exit.
//! `benches/attack_compare.sh` runs this and the numpy reference in one go.

use std::path::Path;

use ballast::attack::{attack_batch, attack_sample, sample_seed, AttackProblem, AttackSettings};
use ballast::data::{load_csv, DataOptions};
use ballast::model::{predicted_class, Model};
use ballast::threat::{Budget, Norm, Targets};
use criterion::{criterion_group, criterion_main, Criterion, Throughput};

fn problems() -> (Model, Vec<AttackProblem>) {
    let model = Model::load(Path::new("tests/data/digits_mlp.model.json")).expect("fixture model");
    let data = load_csv(
        Path::new("tests/data/digits_test.csv"),
        &model,
        &DataOptions::default(),
    )
    .expect("fixture data");
    let network = model.classifier();
    let budget = Budget::uniform(Norm::Linf, 0.05, model.input.dim);
    let problems = (0..100)
        .filter(|&i| predicted_class(network.forward(data.sample(i)).as_slice()) == data.labels[i])
        .map(|i| AttackProblem {
            index: i,
            region: budget.region(data.sample(i), &model.input.lower, &model.input.upper),
            label: data.labels[i],
            forbidden: Targets::Any.forbidden_for(data.labels[i], model.class_count()),
            extra_starts: Vec::new(),
        })
        .collect();
    (model, problems)
}

fn pgd_throughput(c: &mut Criterion) {
    let (model, problems) = problems();
    let network = model.classifier();
    let full = AttackSettings {
        steps: 100,
        restarts: 5,
        fgsm_first: false,
        targeted: false,
        stop_at_first: false,
        ..AttackSettings::default()
    };
    let mut group = c.benchmark_group("pgd100x5_digits");
    group.sample_size(10);
    group.throughput(Throughput::Elements(problems.len() as u64));
    group.bench_function("full_budget_2_threads", |b| {
        b.iter(|| attack_batch(&network, &problems, &full).expect("valid"))
    });
    group.bench_function("full_budget_1_thread", |b| {
        b.iter(|| {
            problems
                .iter()
                .map(|p| {
                    attack_sample(
                        &network,
                        &p.region,
                        p.label,
                        &p.forbidden,
                        &full,
                        sample_seed(full.seed, p.index),
                        &[],
                    )
                    .expect("valid")
                })
                .collect::<Vec<_>>()
        })
    });
    let defaults = AttackSettings::default();
    group.bench_function("defaults_early_exit_2_threads", |b| {
        b.iter(|| attack_batch(&network, &problems, &defaults).expect("valid"))
    });
    group.finish();
}

criterion_group!(benches, pgd_throughput);
criterion_main!(benches);

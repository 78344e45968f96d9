//! Training benchmarks (not tests): `cargo bench --bench train [-- speed|tradeoff]`.
//!
//! - speed: certified (linear + interval bound) retraining of the 64-64-32-10 digits fixture on
//!   1,400 digits samples for 30 epochs, wall-clock time; the same on a 784-input 784-256-256-10
//!   network for 2 epochs when its fixtures are in target/bench-fixtures/;
//! - tradeoff: on the digits data (tests/data/digits_train.csv split 80/20 into training and
//!   validation rows, which are also the acceptance data; the held-out tests/data/digits_test.csv only
//!   measured), L-inf eps 0.07 on pixels in [0, 1]: a plain 64-32-10 MLP trained from scratch with
//!   clean cross-entropy only, then primal-dual retraining of it for floors {0.6, 0.7, 0.8, 0.9}
//!   against fixed penalty weights {0.01, 0.03, 0.1, 0.3, 1, 3, 10}: clean vs certified accuracy
//!   (certify pipeline, bounds only), plotted as SVG. The `BALLAST_BENCH_*` variables below change
//!   the setting (docs/benchmarks/train.md lists them).
//!
//! Results are printed and written to target/bench-train/ (the SVG and a Markdown table) for copying
//! into docs/benchmarks/train.md.

use std::path::Path;
use std::time::Instant;

use ballast::certify::{certify, CertifyOptions, PipelineOptions, Sources};
use ballast::data::{load_csv, DataOptions, Dataset};
use ballast::model::Model;
use ballast::threat::requirement::Requirement;
use ballast::threat::{Budget, Norm, Targets};
use ballast::train::bound_gradient::certified_cross_entropy;
use ballast::train::constrained::{
    train_constrained_epochs, ConstrainedEpoch, ConstrainedSettings, ConstrainedState, Constraint,
    Formulation,
};
use ballast::train::curves::{plot_svg, Series};
use ballast::train::plain::split_validation;
use ballast::train::plain::TrainableModel;
use ballast::train::retrain::{retrain, Keep, NearMisses, RetrainSettings};
use ballast::train::robust::RobustLoss;
use ballast::train::{
    he_network, train_cross_entropy_with_validation, OptimizerKind, TrainSettings,
};

/// L-inf radius of the trade-off benchmark (digits pixels in [0, 1]); `BALLAST_BENCH_EPS` overrides.
const EPSILON: f64 = 0.07;
/// Hidden layer sizes of the plain model; `BALLAST_BENCH_HIDDEN` (e.g. `128` or `64,32`) overrides.
const HIDDEN: &[usize] = &[32];
/// Epochs of the plain (clean-only) model.
const PLAIN_EPOCHS: usize = 200;
/// First-round epochs of every retraining run.
const EPOCHS: usize = 60;
/// Weight `β` of the linear bound in the training loss after the epsilon ramp (1 = linear bounds only,
/// the same kind of bound the certify pipeline starts from).
const FINAL_LINEAR_WEIGHT: f64 = 1.0;

fn constrained_settings(
    epochs: usize,
    seed: u64,
    budget: Budget,
    targets: Targets,
    formulation: Formulation,
    floor: f64,
    final_linear_weight: f64,
) -> ConstrainedSettings {
    ConstrainedSettings {
        train: TrainSettings {
            epochs,
            batch_size: 64,
            // `BALLAST_BENCH_RATE` overrides the retraining's Adam step size.
            optimizer: OptimizerKind::adam(env_or("BALLAST_BENCH_RATE", 0.002)),
            weight_decay: 0.0,
            seed,
            validation_fraction: 0.0,
            patience: None,
        },
        budget,
        targets,
        loss: RobustLoss::LinearInterval {
            final_linear_weight,
        },
        // `BALLAST_BENCH_SLACK` overrides the first round's constraint slack.
        constraint: Constraint::RobustError {
            floor,
            slack: env_or("BALLAST_BENCH_SLACK", 0.0),
        },
        terms: Vec::new(),
        relax: None,
        formulation,
        ramp_epochs: (epochs * 2) / 5,
        measure_certified: true,
        // `BALLAST_BENCH_GAP_CORRECTION=0` turns the generalisation-gap correction off.
        gap_correction: env_or("BALLAST_BENCH_GAP_CORRECTION", 1u8) == 1,
        checks_per_epoch: env_or("BALLAST_BENCH_CHECKS", 16usize),
        // `BALLAST_BENCH_FINAL_RATE` sets the step-size factor reached at the end of the first round.
        final_rate_factor: env_or("BALLAST_BENCH_FINAL_RATE", 0.1),
        average_tail: 0.0,
    }
}

fn speed() {
    let model = Model::load(Path::new("tests/data/digits_mlp_deep.model.json")).expect("fixture");
    let options = DataOptions::default();
    let train = load_csv(Path::new("tests/data/digits_train.csv"), &model, &options).expect("data");
    let test = load_csv(Path::new("tests/data/digits_test.csv"), &model, &options).expect("data");
    let mut features = nalgebra::DMatrix::zeros(64, 1400);
    let mut labels = Vec::with_capacity(1400);
    for i in 0..1400 {
        let (source, j) = if i < train.len() {
            (&train, i)
        } else {
            (&test, i - train.len())
        };
        features.column_mut(i).copy_from_slice(source.sample(j));
        labels.push(source.labels[j]);
    }
    let data = Dataset { features, labels };
    let budget = Budget::uniform(Norm::Linf, 0.01, 64);
    let (seconds, last) = timed_training(&model, &data, 30, budget, 0.8);
    println!(
        "speed: 64-64-32-10, 1400 samples, 30 epochs, linear+interval certified loss, eps 0.01 linf: {seconds:.1} s \
         (final clean loss {:.4}, robust loss {:.4}, training robust error {:.3}, λ {:.3})",
        last.clean_loss, last.robust_loss, last.robust_error, last.multipliers[0]
    );
}

/// Primal-dual certified retraining of `model` on `data` for `epochs` epochs with the speed protocol's
/// settings (no per-epoch validation): the wall-clock seconds and the last epoch.
fn timed_training(
    model: &Model,
    data: &Dataset,
    epochs: usize,
    budget: Budget,
    floor: f64,
) -> (f64, ConstrainedEpoch) {
    let formulation = Formulation::PrimalDual {
        dual_step: 0.05,
        initial_multiplier: 0.0,
        per_class: false,
    };
    let settings = constrained_settings(epochs, 1, budget, Targets::Any, formulation, floor, 0.0);
    let trainable = TrainableModel::new(model);
    let mut state = ConstrainedState::new(&trainable, &settings, 10);
    let start = Instant::now();
    let run = train_constrained_epochs(
        &trainable,
        &mut state,
        data,
        None,
        &settings,
        epochs,
        &mut |_| {},
    )
    .expect("training runs");
    let seconds = start.elapsed().as_secs_f64();
    (seconds, run.last().expect("epochs").clone())
}

/// The certified loss and its gradient alone on the 784-input network (the rest of a training step
/// — the per-batch constraint measurement by linear bounds — dominates [`speed_wide`]): every row of
/// `wide_test.csv` in batches of 64, L-inf eps 0.02, β = 1 and β = 0.5, five passes each; skipped
/// when the fixtures are missing.
fn loss_wide() {
    let folder = Path::new("target/bench-fixtures");
    let Ok(model) = Model::load(&folder.join("wide_256x2.model.json")) else {
        return;
    };
    let data = load_csv(
        &folder.join("wide_test.csv"),
        &model,
        &DataOptions::default(),
    )
    .expect("data");
    let network = model.network();
    let classes = network.output_dim();
    let budget = Budget::uniform(Norm::Linf, 0.02, model.input.dim);
    let regions: Vec<_> = (0..data.len())
        .map(|s| budget.region(data.sample(s), &model.input.lower, &model.input.upper))
        .collect();
    let targets: Vec<Vec<usize>> = data
        .labels
        .iter()
        .map(|&y| (0..classes).filter(|j| *j != y).collect())
        .collect();
    for beta in [1.0, 0.5] {
        let start = Instant::now();
        for _ in 0..5 {
            for first in (0..data.len()).step_by(64) {
                let end = (first + 64).min(data.len());
                let weights = vec![1.0; end - first];
                let batch = certified_cross_entropy(
                    &network,
                    &regions[first..end],
                    &data.labels[first..end],
                    &targets[first..end],
                    &weights,
                    beta,
                )
                .expect("bounds");
                assert!(batch.loss.is_finite());
            }
        }
        let seconds = start.elapsed().as_secs_f64() / 5.0;
        println!(
            "speed (784 inputs): certified loss and gradient alone, β = {beta}, {} rows in batches \
             of 64: {seconds:.2} s per pass",
            data.len()
        );
    }
}

/// The speed protocol on a 784-input network (`target/bench-fixtures/wide_256x2.model.json`,
/// 784-256-256-10, on the 200 rows of `target/bench-fixtures/wide_test.csv`, L-inf eps 0.02, 2
/// epochs): skipped when the fixtures are missing.
fn speed_wide() {
    let folder = Path::new("target/bench-fixtures");
    let Ok(model) = Model::load(&folder.join("wide_256x2.model.json")) else {
        println!("speed (784 inputs): skipped, no target/bench-fixtures/wide_256x2.model.json");
        return;
    };
    let options = DataOptions::default();
    let data = load_csv(&folder.join("wide_test.csv"), &model, &options).expect("data");
    let budget = Budget::uniform(Norm::Linf, 0.02, model.input.dim);
    let (seconds, last) = timed_training(&model, &data, 2, budget, 0.5);
    println!(
        "speed (784 inputs): 784-256-256-10, {} samples, 2 epochs, linear+interval certified loss, \
         eps 0.02 linf: {seconds:.1} s (final clean loss {:.4}, robust loss {:.4})",
        data.len(),
        last.clean_loss,
        last.robust_loss
    );
}

struct Run {
    label: String,
    penalty: Option<f64>,
    floor: Option<f64>,
    /// Clean and certified accuracy on the validation rows (the retrainer's acceptance data).
    clean: f64,
    certified: f64,
    /// The same on the held-out test rows (never seen by training or selection).
    test_clean: f64,
    test_certified: f64,
    kept_epoch: f64,
    rounds: usize,
    seconds: f64,
}

fn env_or<T: std::str::FromStr>(name: &str, default: T) -> T {
    std::env::var(name)
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(default)
}

/// The comma-separated numbers in the environment variable `name` (empty for none), else `default`.
fn env_list(name: &str, default: &[f64]) -> Vec<f64> {
    std::env::var(name)
        .map(|v| v.split(',').filter_map(|p| p.trim().parse().ok()).collect())
        .unwrap_or_else(|_| default.to_vec())
}

/// Clean and certified accuracy of `model` on `data` from the certify pipeline (bounds only).
fn certify_figures(model: &Model, data: &Dataset, requirement: &Requirement) -> (f64, f64) {
    let options = CertifyOptions {
        pipeline: PipelineOptions::default(),
        label_column: "label".into(),
        ..CertifyOptions::default()
    };
    let report = certify(
        model,
        data,
        requirement,
        &Sources::in_memory(model, data),
        &options,
    )
    .expect("certify runs");
    (
        report.summary.clean_accuracy,
        report.summary.certified_accuracy,
    )
}

fn tradeoff() {
    let fixture = Model::load(Path::new("tests/data/digits_mlp.model.json")).expect("fixture");
    let options = DataOptions::default();
    let all_train =
        load_csv(Path::new("tests/data/digits_train.csv"), &fixture, &options).expect("data");
    let held_out =
        load_csv(Path::new("tests/data/digits_test.csv"), &fixture, &options).expect("data");
    // 20% of the training rows are validation data: the retrainer steers and selects on them and
    // certifies them as its acceptance set (the CLI's default); the test rows are only measured.
    let (train, validation) = split_validation(&all_train, 0.2, 5);
    let validation = validation.expect("enough rows");
    let epsilon = env_or("BALLAST_BENCH_EPS", EPSILON);
    let hidden: Vec<usize> = std::env::var("BALLAST_BENCH_HIDDEN")
        .ok()
        .map(|v| {
            v.split(',')
                .map(|h| h.trim().parse().expect("hidden size"))
                .collect()
        })
        .unwrap_or_else(|| HIDDEN.to_vec());
    let epochs = env_or("BALLAST_BENCH_EPOCHS", EPOCHS);
    let mut base = Requirement::uniform(Norm::Linf, epsilon);
    // The plain model: the fixture's 64-32-10 layout (no normalize layer) trained from scratch with
    // clean cross-entropy only, no weight decay.
    let start = Instant::now();
    let scratch = TrainableModel::new(&fixture).model_with(&he_network(64, &hidden, 10, 3));
    // `BALLAST_BENCH_PLAIN_EARLY_STOP=1`: keep the plain model's epoch of lowest validation loss
    // (patience 20) instead of the last of all epochs.
    let early_stop = env_or("BALLAST_BENCH_PLAIN_EARLY_STOP", 0u8) == 1;
    let (plain, plain_log) = train_cross_entropy_with_validation(
        &scratch,
        &train,
        early_stop.then_some(&validation),
        &TrainSettings {
            epochs: PLAIN_EPOCHS,
            batch_size: 64,
            optimizer: OptimizerKind::adam(0.002),
            weight_decay: 0.0,
            seed: 3,
            validation_fraction: 0.0,
            patience: early_stop.then_some(20),
        },
    )
    .expect("plain training runs");
    println!("plain model: best epoch {}", plain_log.best_epoch);
    let plain_seconds = start.elapsed().as_secs_f64();
    // `BALLAST_BENCH_PROBES=0.05,0.06` (or empty) limits the probes: the LP stage is slow on wide models.
    for probe in env_list("BALLAST_BENCH_PROBES", &[0.04, 0.05, 0.06, 0.07, 0.08]) {
        let (clean, certified) =
            certify_figures(&plain, &held_out, &Requirement::uniform(Norm::Linf, probe));
        println!("plain model at eps {probe}: test clean {clean:.4}, certified {certified:.4}");
    }
    let (plain_clean, plain_certified) = certify_figures(&plain, &validation, &base);
    let (plain_test_clean, plain_test_certified) = certify_figures(&plain, &held_out, &base);
    println!(
        "plain model {hidden:?} ({PLAIN_EPOCHS} epochs, {plain_seconds:.1} s) at eps {epsilon}: validation clean {plain_clean:.4}, certified {plain_certified:.4}; test clean {plain_test_clean:.4}, certified {plain_test_certified:.4}"
    );
    let budget = base.budget(epsilon, fixture.input.dim);
    let mut runs = Vec::new();
    let mut run = |label: String,
                   formulation: Formulation,
                   floor: f64,
                   rounds: usize,
                   penalty: Option<f64>| {
        base.floor = Some(floor);
        let settings = RetrainSettings {
            constrained: constrained_settings(
                epochs,
                // `BALLAST_BENCH_SEED` changes the retraining seed (shuffling, attacks).
                env_or("BALLAST_BENCH_SEED", 7u64),
                budget.clone(),
                Targets::Any,
                formulation,
                floor,
                FINAL_LINEAR_WEIGHT,
            ),
            round_epochs: epochs / 2,
            max_rounds: rounds,
            slack_step: 0.03,
            pipeline: PipelineOptions::default(),
            // `BALLAST_BENCH_KEEP=best` keeps the lowest-loss feasible epoch instead.
            keep: if std::env::var("BALLAST_BENCH_KEEP").as_deref() == Ok("best") {
                Keep::BestFeasible
            } else {
                Keep::EarliestFeasible
            },
            // `BALLAST_BENCH_NEAR_MISS`: near-miss margin (default 0.03; 0 = off);
            // `BALLAST_BENCH_NEAR_MISS_TRIES`: pipeline runs per round (default 3).
            near_misses: NearMisses {
                margin: env_or("BALLAST_BENCH_NEAR_MISS", 0.03),
                tries: env_or("BALLAST_BENCH_NEAR_MISS_TRIES", 3usize),
            },
            confidence: Default::default(),
            lines: Vec::new(),
        };
        let start = Instant::now();
        let result = retrain(
            &plain,
            &train,
            Some(&validation),
            &validation,
            &base,
            &settings,
            &mut |_| {},
        )
        .expect("retrain runs");
        let seconds = start.elapsed().as_secs_f64();
        let folder = Path::new("target/bench-train");
        std::fs::create_dir_all(folder).expect("folder");
        let mut epochs_csv = String::from("epoch,lambda,val_clean_loss,val_certified_linear\n");
        for e in &result.epochs {
            epochs_csv.push_str(&format!(
                "{},{:.6},{:.6},{:.4}\n",
                e.epoch,
                e.multipliers[0],
                e.validation_clean_loss.unwrap_or(f64::NAN),
                e.validation_certified_accuracy.unwrap_or(f64::NAN)
            ));
        }
        std::fs::write(
            folder.join(format!("epochs-{}.csv", label.replace(' ', "-"))),
            epochs_csv,
        )
        .expect("epoch log");
        std::fs::write(
            folder.join(format!("checks-{}.csv", label.replace(' ', "-"))),
            ballast::cli::retrain::checks_csv(&result),
        )
        .expect("check log");
        let last = result.rounds.last().expect("a round");
        let (test_clean, test_certified) = certify_figures(&result.model, &held_out, &base);
        let r = Run {
            label,
            penalty,
            floor: penalty.is_none().then_some(floor),
            clean: last.clean_accuracy,
            certified: last.certified_accuracy,
            test_clean,
            test_certified,
            kept_epoch: last.selected_epoch,
            rounds: result.rounds.len(),
            seconds,
        };
        let judged: Vec<String> = result
            .rounds
            .iter()
            .flat_map(|r| &r.near_misses_judged)
            .map(|j| {
                format!(
                    "{} {:.4}→{:.4}",
                    j.epoch, j.linear_certified, j.pipeline_certified
                )
            })
            .collect();
        let judged = judged.join(", ");
        println!(
            "{}: validation clean {:.4}, certified {:.4}; test clean {:.4}, certified {:.4}; kept epoch {}{}, rounds {}, near misses judged [{judged}], {:.1} s",
            r.label, r.clean, r.certified, r.test_clean, r.test_certified, r.kept_epoch,
            if last.near_miss { " (near miss)" } else { "" }, r.rounds, r.seconds
        );
        runs.push(r);
    };
    // `BALLAST_BENCH_FLOORS` and `BALLAST_BENCH_PENALTIES` (comma lists, empty for none) pick the runs.
    for floor in env_list("BALLAST_BENCH_FLOORS", &[0.6, 0.7, 0.8, 0.9]) {
        let formulation = Formulation::PrimalDual {
            dual_step: 0.05,
            initial_multiplier: 0.0,
            per_class: false,
        };
        run(
            format!("primal-dual floor {floor}"),
            formulation,
            floor,
            3,
            None,
        );
    }
    for weight in env_list(
        "BALLAST_BENCH_PENALTIES",
        &[0.01, 0.03, 0.1, 0.3, 1.0, 3.0, 10.0],
    ) {
        run(
            format!("penalty {weight}"),
            Formulation::Penalty { weight },
            0.0,
            1,
            Some(weight),
        );
    }
    let folder = Path::new("target/bench-train");
    std::fs::create_dir_all(folder).expect("folder");
    for (file, which, plain_point) in [
        (
            "tradeoff.svg",
            "validation rows = acceptance data",
            (plain_certified, plain_clean),
        ),
        (
            "tradeoff-test.svg",
            "held-out test rows",
            (plain_test_certified, plain_test_clean),
        ),
    ] {
        let test = file.contains("test");
        let points = |keep: &dyn Fn(&Run) -> bool| -> Vec<(f64, f64)> {
            runs.iter()
                .filter(|r| keep(r))
                .map(|r| {
                    if test {
                        (r.test_certified, r.test_clean)
                    } else {
                        (r.certified, r.clean)
                    }
                })
                .collect()
        };
        let svg = plot_svg(
            &format!("Digits, L-inf eps {epsilon}: clean vs certified accuracy ({which})"),
            "certified accuracy",
            "clean accuracy",
            &[
                Series {
                    name: "primal-dual".into(),
                    points: points(&|r| r.penalty.is_none()),
                    markers_only: true,
                },
                Series {
                    name: "fixed penalty".into(),
                    points: points(&|r| r.penalty.is_some()),
                    markers_only: true,
                },
                Series {
                    name: "plain model".into(),
                    points: vec![plain_point],
                    markers_only: true,
                },
            ],
        );
        std::fs::write(folder.join(file), svg).expect("svg");
    }
    let mut table = String::from(
        "| run | floor | penalty | kept epoch | validation clean | validation certified | test clean | test certified | rounds | seconds |\n| --- | --- | --- | --- | --- | --- | --- | --- | --- | --- |\n",
    );
    table.push_str(&format!(
        "| plain model (clean only) |  |  |  | {plain_clean:.4} | {plain_certified:.4} | {plain_test_clean:.4} | {plain_test_certified:.4} |  | {plain_seconds:.1} |\n"
    ));
    for r in &runs {
        table.push_str(&format!(
            "| {} | {} | {} | {} | {:.4} | {:.4} | {:.4} | {:.4} | {} | {:.1} |\n",
            r.label,
            r.floor.map(|f| f.to_string()).unwrap_or_default(),
            r.penalty.map(|p| p.to_string()).unwrap_or_default(),
            r.kept_epoch,
            r.clean,
            r.certified,
            r.test_clean,
            r.test_certified,
            r.rounds,
            r.seconds
        ));
    }
    std::fs::write(folder.join("tradeoff.md"), &table).expect("table");
    println!("{table}");
}

fn main() {
    let which: Vec<String> = std::env::args()
        .skip(1)
        .filter(|a| !a.starts_with('-'))
        .collect();
    let all = which.is_empty();
    if all || which.iter().any(|w| w == "speed") {
        speed();
        speed_wide();
        loss_wide();
    }
    if all || which.iter().any(|w| w == "tradeoff") {
        tradeoff();
    }
}

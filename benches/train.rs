//! Training benchmarks (not tests): `cargo bench --bench train [-- speed|tradeoff]`.
//!
//! - speed: certified (linear + interval bound) retraining of the 64-64-32-10 digits fixture on
//!   1,400 digits samples for 30 epochs, wall-clock time;
//! - tradeoff: on the digits data (tests/data/digits_train.csv for training, the held-out
//!   tests/data/digits_test.csv for every measured figure), L-inf eps 0.07 on pixels in [0, 1]: a plain
//!   64-32-10 MLP trained from scratch with clean cross-entropy only, then primal-dual retraining of it
//!   for floors {0.6, 0.7, 0.8, 0.9} against fixed penalty weights {0.1, 0.3, 1, 3, 10}: clean vs
//!   certified accuracy (certify pipeline, bounds only), plotted as SVG.
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
use ballast::train::constrained::{
    train_constrained_epochs, ConstrainedSettings, ConstrainedState, Constraint, Formulation,
};
use ballast::train::curves::{plot_svg, Series};
use ballast::train::plain::TrainableModel;
use ballast::train::retrain::{retrain, RetrainSettings};
use ballast::train::robust::RobustLoss;
use ballast::train::{
    he_network, train_cross_entropy_with_validation, OptimizerKind, TrainSettings,
};

/// L-inf radius of the trade-off benchmark (digits pixels in [0, 1]).
const EPSILON: f64 = 0.07;
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
            optimizer: OptimizerKind::adam(0.002),
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
        constraint: Constraint::RobustError { floor, slack: 0.02 },
        formulation,
        ramp_epochs: (epochs * 2) / 5,
        measure_certified: false,
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
    let settings = constrained_settings(
        30,
        1,
        Budget::uniform(Norm::Linf, 0.01, 64),
        Targets::Any,
        Formulation::PrimalDual {
            dual_step: 0.05,
            initial_multiplier: 0.0,
            per_class: false,
        },
        0.8,
        0.0,
    );
    let trainable = TrainableModel::new(&model);
    let mut state = ConstrainedState::new(&trainable, &settings, 10);
    let start = Instant::now();
    let epochs = train_constrained_epochs(
        &trainable,
        &mut state,
        &data,
        None,
        &settings,
        30,
        &mut |_| {},
    )
    .expect("training runs");
    let seconds = start.elapsed().as_secs_f64();
    let last = epochs.last().expect("epochs");
    println!(
        "speed: 64-64-32-10, 1400 samples, 30 epochs, linear+interval certified loss, eps 0.01 linf: {seconds:.1} s \
         (final clean loss {:.4}, robust loss {:.4}, training robust error {:.3}, λ {:.3})",
        last.clean_loss, last.robust_loss, last.robust_error, last.multipliers[0]
    );
}

struct Run {
    label: String,
    penalty: Option<f64>,
    floor: Option<f64>,
    clean: f64,
    certified: f64,
    rounds: usize,
    seconds: f64,
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
    let train =
        load_csv(Path::new("tests/data/digits_train.csv"), &fixture, &options).expect("data");
    let held_out =
        load_csv(Path::new("tests/data/digits_test.csv"), &fixture, &options).expect("data");
    let epsilon = EPSILON;
    let mut base = Requirement::uniform(Norm::Linf, epsilon);
    // The plain model: the fixture's 64-32-10 layout (no normalize layer) trained from scratch with
    // clean cross-entropy only, no weight decay.
    let start = Instant::now();
    let scratch = TrainableModel::new(&fixture).model_with(&he_network(64, &[32], 10, 3));
    let (plain, _) = train_cross_entropy_with_validation(
        &scratch,
        &train,
        None,
        &TrainSettings {
            epochs: PLAIN_EPOCHS,
            batch_size: 64,
            optimizer: OptimizerKind::adam(0.002),
            weight_decay: 0.0,
            seed: 3,
            validation_fraction: 0.0,
            patience: None,
        },
    )
    .expect("plain training runs");
    let plain_seconds = start.elapsed().as_secs_f64();
    for probe in [0.04, 0.05, 0.06, 0.07, 0.08] {
        let (clean, certified) =
            certify_figures(&plain, &held_out, &Requirement::uniform(Norm::Linf, probe));
        println!("plain model at eps {probe}: clean {clean:.4}, certified {certified:.4}");
    }
    for probe in [0.04, 0.07] {
        let (clean, certified) = certify_figures(
            &fixture,
            &held_out,
            &Requirement::uniform(Norm::Linf, probe),
        );
        println!("fixture at eps {probe}: clean {clean:.4}, certified {certified:.4}");
    }
    let (plain_clean, plain_certified) = certify_figures(&plain, &held_out, &base);
    println!(
        "plain model ({PLAIN_EPOCHS} epochs, {plain_seconds:.1} s) at eps {epsilon}: clean {plain_clean:.4}, certified {plain_certified:.4}"
    );
    let budget = base.budget(epsilon, fixture.input.dim);
    let epochs = EPOCHS;
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
                7,
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
        };
        let start = Instant::now();
        let result = retrain(
            &plain,
            &train,
            None,
            &held_out,
            &base,
            &settings,
            &mut |_| {},
        )
        .expect("retrain runs");
        let last = result.rounds.last().expect("a round");
        let r = Run {
            label,
            penalty,
            floor: penalty.is_none().then_some(floor),
            clean: last.clean_accuracy,
            certified: last.certified_accuracy,
            rounds: result.rounds.len(),
            seconds: start.elapsed().as_secs_f64(),
        };
        println!(
            "{}: clean {:.4}, certified {:.4}, rounds {}, {:.1} s",
            r.label, r.clean, r.certified, r.rounds, r.seconds
        );
        runs.push(r);
    };
    for floor in [0.6, 0.7, 0.8, 0.9] {
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
    for weight in [0.1, 0.3, 1.0, 3.0, 10.0] {
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
    let points = |keep: &dyn Fn(&Run) -> bool| -> Vec<(f64, f64)> {
        runs.iter()
            .filter(|r| keep(r))
            .map(|r| (r.certified, r.clean))
            .collect()
    };
    let svg = plot_svg(
        &format!("Digits, L-inf eps {epsilon}: clean vs certified accuracy (held-out test rows)"),
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
                points: vec![(plain_certified, plain_clean)],
                markers_only: true,
            },
        ],
    );
    std::fs::write(folder.join("tradeoff.svg"), svg).expect("svg");
    let mut table = String::from("| run | floor | penalty | clean accuracy | certified accuracy | rounds | seconds |\n| --- | --- | --- | --- | --- | --- | --- |\n");
    table.push_str(&format!(
        "| plain model (clean only) |  |  | {plain_clean:.4} | {plain_certified:.4} |  | {plain_seconds:.1} |\n"
    ));
    for r in &runs {
        table.push_str(&format!(
            "| {} | {} | {} | {:.4} | {:.4} | {} | {:.1} |\n",
            r.label,
            r.floor.map(|f| f.to_string()).unwrap_or_default(),
            r.penalty.map(|p| p.to_string()).unwrap_or_default(),
            r.clean,
            r.certified,
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
    }
    if all || which.iter().any(|w| w == "tradeoff") {
        tradeoff();
    }
}

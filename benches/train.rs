//! Training benchmarks (not tests): `cargo bench --bench train [-- speed|tradeoff]`.
//!
//! - speed: certified (linear + interval bound) retraining of the 64-64-32-10 digits fixture on
//!   1,400 digits samples for 30 epochs, wall-clock time;
//! - tradeoff: on the demo data (demo-data/train.csv, acceptance.csv, requirement.toml), primal-dual
//!   retraining for floors {0.6, 0.7, 0.8, 0.9} against fixed penalty weights {0.1, 0.3, 1, 3, 10}:
//!   clean vs certified accuracy on the acceptance data (certify pipeline), plotted as SVG.
//!
//! Results are printed and written to target/bench-train/ (the SVG and a Markdown table) for copying
//! into docs/benchmarks/train.md.

use std::path::Path;
use std::time::Instant;

use ballast::certify::PipelineOptions;
use ballast::data::{load_csv, DataOptions, Dataset};
use ballast::model::Model;
use ballast::threat::requirement::RequirementSpec;
use ballast::threat::{Budget, Norm, Targets};
use ballast::train::constrained::{
    train_constrained_epochs, ConstrainedSettings, ConstrainedState, Constraint, Formulation,
};
use ballast::train::curves::{plot_svg, Series};
use ballast::train::plain::{split_validation, TrainableModel};
use ballast::train::retrain::{retrain, RetrainSettings};
use ballast::train::robust::RobustLoss;
use ballast::train::{OptimizerKind, TrainSettings};

fn constrained_settings(
    epochs: usize,
    seed: u64,
    budget: Budget,
    targets: Targets,
    formulation: Formulation,
    floor: f64,
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
            final_linear_weight: 0.0,
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

fn tradeoff() {
    let model = Model::load(Path::new("models/pump-mlp.json")).expect("demo model");
    let options = DataOptions::default();
    let all = load_csv(Path::new("demo-data/train.csv"), &model, &options).expect("demo train");
    let acceptance =
        load_csv(Path::new("demo-data/acceptance.csv"), &model, &options).expect("demo acceptance");
    let (train, validation) = split_validation(&all, 0.2, 5);
    let validation = validation.expect("validation");
    let spec =
        RequirementSpec::from_file(Path::new("demo-data/requirement.toml")).expect("requirement");
    let base = spec.resolve(&model).expect("requirement resolves");
    let budget = base.budget(base.epsilon(), model.input.dim);
    let epochs = 30;
    let mut runs = Vec::new();
    let mut run = |label: String,
                   formulation: Formulation,
                   floor: f64,
                   rounds: usize,
                   penalty: Option<f64>| {
        let mut requirement = base.clone();
        requirement.floor = Some(floor);
        let settings = RetrainSettings {
            constrained: constrained_settings(
                epochs,
                7,
                budget.clone(),
                base.targets.clone(),
                formulation,
                floor,
            ),
            round_epochs: 15,
            max_rounds: rounds,
            slack_step: 0.03,
            pipeline: PipelineOptions::default(),
        };
        let start = Instant::now();
        let result = retrain(
            &model,
            &train,
            Some(&validation),
            &acceptance,
            &requirement,
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
        "Demo: clean vs certified accuracy (acceptance data)",
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
        ],
    );
    std::fs::write(folder.join("tradeoff.svg"), svg).expect("svg");
    let mut table = String::from("| run | floor | penalty | clean accuracy | certified accuracy | rounds | seconds |\n| --- | --- | --- | --- | --- | --- | --- |\n");
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

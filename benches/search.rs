//! Benchmark of complete verification against the HiGHS MILP baseline.
//!
//! `tests/reference/milp_reference.py --bench` times scipy.optimize.milp (HiGHS) on 30 samples of each
//! digits fixture and writes `tests/reference/out/milp_bench.json` (samples, budget, exact verdicts,
//! solve seconds). This program runs ballast's branch and bound on the same samples and budget, checks
//! that every verdict equals HiGHS's, and prints the wall times on one thread (a rayon pool of one)
//! and on every core. Run with `cargo bench --bench search`; options after `--`:
//!
//! - `--optimality`: also time the optimality mode (every class to its exact minimum);
//! - `--batch N`, `--candidates K`, `--method interval|linear|optimised_linear`, `--iterations N`:
//!   search settings (batch size, look-ahead candidates, bound method, slope ascent steps);
//! - `--only INDEX`: keep only that sample (e.g. to watch one hard sample use every core);
//! - `--stress EPS`: also search the deep model's samples at L-inf `EPS` (no reference: decided count,
//!   nodes and time only), to compare settings where the trees do real work.

use std::path::Path;
use std::time::Instant;

use ballast::bound::Method;
use ballast::data::{load_csv, DataOptions};
use ballast::model::{Model, Network};
use ballast::search::{verify_batch, SearchOutcome, SearchProblem, SearchSettings, Verdict};
use ballast::threat::{Budget, Norm};
use serde_json::Value;

fn option(name: &str) -> Option<String> {
    let args: Vec<String> = std::env::args().collect();
    args.iter()
        .position(|a| a == name)
        .and_then(|i| args.get(i + 1).cloned())
}

fn settings_from_args() -> SearchSettings {
    let mut settings = SearchSettings::default();
    if let Some(n) = option("--batch") {
        settings.batch_size = n.parse().expect("--batch takes a number");
    }
    if let Some(k) = option("--candidates") {
        settings.branching_candidates = k.parse().expect("--candidates takes a number");
    }
    if let Some(n) = option("--iterations") {
        settings.slope_options.iterations = n.parse().expect("--iterations takes a number");
    }
    if let Some(m) = option("--method") {
        settings.bound_method = match m.as_str() {
            "interval" => Method::Interval,
            "linear" => Method::Linear,
            "optimised_linear" => Method::OptimisedLinear,
            other => panic!("unknown method {other}"),
        };
    }
    settings
}

/// Runs the batch on a rayon pool of `threads` threads; returns the outcomes and the wall time.
fn timed(
    network: &Network,
    problems: &[SearchProblem],
    settings: &SearchSettings,
    threads: usize,
) -> (Vec<SearchOutcome>, f64) {
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .build()
        .expect("thread pool");
    let start = Instant::now();
    let outcomes = pool.install(|| verify_batch(network, problems, settings));
    let seconds = start.elapsed().as_secs_f64();
    let outcomes = outcomes
        .into_iter()
        .map(|o| o.expect("search runs"))
        .collect();
    (outcomes, seconds)
}

fn problems_for(
    model: &Model,
    network: &Network,
    indices: &[usize],
    epsilon: f64,
) -> Vec<SearchProblem> {
    let data = load_csv(
        Path::new("tests/data/digits_test.csv"),
        model,
        &DataOptions::default(),
    )
    .expect("data loads");
    let budget = Budget::uniform(Norm::Linf, epsilon, model.input.dim);
    indices
        .iter()
        .map(|&i| {
            let label = data.labels[i];
            SearchProblem {
                index: i,
                region: budget.region(data.sample(i), &model.input.lower, &model.input.upper),
                label,
                targets: (0..network.output_dim()).filter(|j| *j != label).collect(),
            }
        })
        .collect()
}

fn summary(outcomes: &[SearchOutcome], indices: &[usize]) -> String {
    let nodes: usize = outcomes.iter().map(|o| o.nodes).sum();
    let leaves: usize = outcomes
        .iter()
        .flat_map(|o| &o.targets)
        .map(|t| t.leaves)
        .sum();
    let (slowest, seconds) = outcomes
        .iter()
        .zip(indices)
        .map(|(o, i)| (*i, o.seconds))
        .fold((0, 0.0), |a, b| if b.1 > a.1 { b } else { a });
    format!("nodes {nodes}, LP leaves {leaves}, slowest sample {slowest} ({seconds:.3} s)")
}

fn main() {
    let optimality = std::env::args().any(|a| a == "--optimality");
    let settings = settings_from_args();
    let cores = rayon::current_num_threads();
    println!(
        "settings: batch {}, candidates {}, method {}, slope iterations {}; {cores} threads",
        settings.batch_size,
        settings.branching_candidates,
        settings.bound_method.name(),
        settings.slope_options.iterations
    );
    let text = std::fs::read_to_string("tests/reference/out/milp_bench.json")
        .expect("run tests/reference/milp_reference.py --bench first");
    let reference: Value = serde_json::from_str(&text).expect("valid JSON");
    let mut deep: Option<(Model, Vec<usize>)> = None;
    for run in reference["runs"].as_array().expect("runs") {
        let path = run["model"].as_str().expect("model");
        let model = Model::load(Path::new(path)).expect("model loads");
        let network = model.classifier();
        let epsilon = run["epsilon"].as_f64().expect("epsilon");
        let only: Option<usize> =
            option("--only").map(|i| i.parse().expect("--only takes an index"));
        let (indices, robust): (Vec<usize>, Vec<bool>) = run["samples"]
            .as_array()
            .expect("samples")
            .iter()
            .map(|v| v.as_u64().expect("index") as usize)
            .zip(
                run["robust"]
                    .as_array()
                    .expect("robust")
                    .iter()
                    .map(|v| v.as_bool().expect("bool")),
            )
            .filter(|(i, _)| only.is_none_or(|o| o == *i))
            .unzip();
        let problems = problems_for(&model, &network, &indices, epsilon);
        let (outcomes, single) = timed(&network, &problems, &settings, 1);
        let (again, parallel) = timed(&network, &problems, &settings, cores);
        let mut agree = 0;
        let mut unresolved = 0;
        for (i, (o, p)) in outcomes.iter().zip(&again).enumerate() {
            assert_eq!(
                std::mem::discriminant(&o.verdict),
                std::mem::discriminant(&p.verdict),
                "sample {}: the verdict depends on the thread count",
                indices[i]
            );
            match o.verdict {
                Verdict::Proved { .. } if robust[i] => agree += 1,
                Verdict::Counterexample(_) if !robust[i] => agree += 1,
                Verdict::Unresolved { .. } => unresolved += 1,
                _ => {}
            }
        }
        let highs = run["milp_solve_seconds"].as_f64().expect("seconds");
        // HiGHS's time covers all samples of the file: no ratio for a single one.
        let ratio = match only {
            Some(_) => String::new(),
            None => format!(
                "; HiGHS {highs:.2} s (MILP solves only) -> {:.0}x (1 thread), {:.0}x ({cores} threads)",
                highs / single,
                highs / parallel
            ),
        };
        println!(
            "{path} eps {epsilon}: verdicts equal to HiGHS {agree}/{n} (unresolved {unresolved}), {}; \
             ballast {single:.3} s on 1 thread, {parallel:.3} s on {cores}{ratio}",
            summary(&outcomes, &indices),
            n = problems.len()
        );
        if optimality {
            let exact = SearchSettings {
                optimality: true,
                node_limit: 1_000_000,
                ..settings.clone()
            };
            let (outcomes, seconds) = timed(&network, &problems, &exact, cores);
            let finished = outcomes
                .iter()
                .filter(|o| o.targets.iter().all(|t| t.finished))
                .count();
            println!(
                "  optimality mode: {finished}/{} samples exact, {}, {seconds:.3} s on {cores} threads",
                problems.len(),
                summary(&outcomes, &indices)
            );
        }
        if path.contains("deep") {
            deep = Some((model, indices));
        }
    }
    if let (Some(eps), Some((model, indices))) = (option("--stress"), deep) {
        let epsilon: f64 = eps.parse().expect("--stress takes a number");
        let network = model.classifier();
        let problems = problems_for(&model, &network, &indices, epsilon);
        let (outcomes, seconds) = timed(&network, &problems, &settings, cores);
        let count = |f: fn(&Verdict) -> bool| outcomes.iter().filter(|o| f(&o.verdict)).count();
        println!(
            "stress: deep eps {epsilon}: proved {}, counterexamples {}, unresolved {}, {}, {seconds:.3} s \
             on {cores} threads",
            count(|v| matches!(v, Verdict::Proved { .. })),
            count(|v| matches!(v, Verdict::Counterexample(_))),
            count(|v| matches!(v, Verdict::Unresolved { .. })),
            summary(&outcomes, &indices)
        );
    }
}

//! Benchmark of complete verification against the HiGHS MILP baseline.
//!
//! `tests/reference/milp_reference.py --bench` times scipy.optimize.milp (HiGHS) on 30 samples of each
//! digits fixture and writes `tests/reference/out/milp_bench.json` (samples, budget, exact verdicts,
//! solve seconds). This program runs ballast's branch and bound on the same samples and budget, checks
//! that every verdict equals HiGHS's, and prints both wall times. Run with
//! `cargo bench --bench search` (add `-- --optimality` to time the optimality mode as well).

use std::path::Path;
use std::time::Instant;

use ballast::data::{load_csv, DataOptions};
use ballast::model::Model;
use ballast::search::{verify_batch, verify_sample, SearchProblem, SearchSettings, Verdict};
use ballast::threat::{Budget, Norm};
use serde_json::Value;

fn main() {
    let optimality = std::env::args().any(|a| a == "--optimality");
    let text = std::fs::read_to_string("tests/reference/out/milp_bench.json")
        .expect("run tests/reference/milp_reference.py --bench first");
    let reference: Value = serde_json::from_str(&text).expect("valid JSON");
    for run in reference["runs"].as_array().expect("runs") {
        let path = run["model"].as_str().expect("model");
        let model = Model::load(Path::new(path)).expect("model loads");
        let data = load_csv(
            Path::new("tests/data/digits_test.csv"),
            &model,
            &DataOptions::default(),
        )
        .expect("data loads");
        let network = model.classifier();
        let epsilon = run["epsilon"].as_f64().expect("epsilon");
        let budget = Budget::uniform(Norm::Linf, epsilon, model.input.dim);
        let indices: Vec<usize> = run["samples"]
            .as_array()
            .expect("samples")
            .iter()
            .map(|v| v.as_u64().expect("index") as usize)
            .collect();
        let robust: Vec<bool> = run["robust"]
            .as_array()
            .expect("robust")
            .iter()
            .map(|v| v.as_bool().expect("bool"))
            .collect();
        let problems: Vec<SearchProblem> = indices
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
            .collect();
        let settings = SearchSettings::default();
        let start = Instant::now();
        let outcomes = verify_batch(&network, &problems, &settings);
        let parallel = start.elapsed().as_secs_f64();
        let start = Instant::now();
        let mut nodes = 0;
        let mut agree = 0;
        let mut unresolved = 0;
        for (i, p) in problems.iter().enumerate() {
            let outcome = verify_sample(&network, &p.region, p.label, &p.targets, &settings)
                .expect("search runs");
            nodes += outcome.nodes;
            match outcome.verdict {
                Verdict::Proved { .. } if robust[i] => agree += 1,
                Verdict::Counterexample(_) if !robust[i] => agree += 1,
                Verdict::Unresolved { .. } => unresolved += 1,
                _ => {}
            }
        }
        let sequential = start.elapsed().as_secs_f64();
        assert_eq!(outcomes.len(), problems.len());
        let highs = run["milp_solve_seconds"].as_f64().expect("seconds");
        println!(
            "{path} eps {epsilon}: verdicts equal to HiGHS {agree}/{n} (unresolved {unresolved}), \
             nodes {nodes}; ballast {sequential:.3} s on 1 thread, {parallel:.3} s with rayon; \
             HiGHS {highs:.2} s (MILP solves only) -> speed-up {:.0}x (1 thread)",
            highs / sequential,
            n = problems.len()
        );
        if optimality {
            let settings = SearchSettings {
                optimality: true,
                node_limit: 1_000_000,
                ..SearchSettings::default()
            };
            let start = Instant::now();
            let outcomes = verify_batch(&network, &problems, &settings);
            let seconds = start.elapsed().as_secs_f64();
            let finished = outcomes
                .iter()
                .filter(|o| {
                    o.as_ref()
                        .is_ok_and(|o| o.targets.iter().all(|t| t.finished))
                })
                .count();
            if let Some(problem) = outcomes.iter().find(|o| {
                o.as_ref()
                    .map_or(true, |o| !o.targets.iter().all(|t| t.finished))
            }) {
                match problem {
                    Err(e) => println!("  first unfinished: error {e}"),
                    Ok(o) => println!("  first unfinished: {:?}", o.verdict),
                }
            }
            println!(
                "  optimality mode: {finished}/{} samples exact, {seconds:.3} s with rayon",
                problems.len()
            );
        }
    }
}

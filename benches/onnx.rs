//! Benchmarks of ONNX import and export (src/model/onnx/), recorded in docs/benchmarks/onnx.md.
//!
//! Run with `cargo bench --bench onnx`. Plain wall-clock timing, best of several repetitions:
//! (a) importing the committed skl2onnx digits MLP (64-32-10) from bytes in memory;
//! (b) exporting and importing a seeded random 784-1024-1024-10 model (float32 and float64), next to
//!     writing and parsing the same model in the JSON layout.

use std::path::Path;
use std::time::Instant;

use ballast::model::onnx::{
    export_model, import_model, ExportOptions, FloatPrecision, ImportOptions,
};
use ballast::model::{Dense, Model, Network};
use nalgebra::{DMatrix, DVector};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};

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

fn random_model(sizes: &[usize]) -> Model {
    let mut rng = ChaCha8Rng::seed_from_u64(5);
    let layers = sizes
        .windows(2)
        .map(|w| {
            let scale = (2.0 / w[0] as f64).sqrt();
            let mut sample = || {
                let z: f64 = StandardNormal.sample(&mut rng);
                z * scale
            };
            Dense {
                weights: DMatrix::from_fn(w[1], w[0], |_, _| sample()),
                bias: DVector::from_fn(w[1], |_, _| 0.0),
            }
        })
        .collect();
    let template = Model::load(Path::new("tests/data/digits_mlp.model.json")).expect("fixture");
    let mut model = template.with_network(None, &Network::from_dense(layers));
    model.input.dim = sizes[0];
    model.input.names = None;
    model.input.lower = vec![0.0; sizes[0]];
    model.input.upper = vec![1.0; sizes[0]];
    model
}

fn main() {
    let bytes = std::fs::read("tests/data/onnx/sklearn_digits_mlp.onnx").expect("fixture");
    let (seconds, model) = best_of(200, || {
        import_model(&bytes, &ImportOptions::default()).expect("imports")
    });
    println!(
        "(a) import sklearn_digits_mlp.onnx ({} bytes, {} parameters): {:.1} µs",
        bytes.len(),
        model.parameter_count(),
        seconds * 1e6
    );

    let model = random_model(&[784, 1024, 1024, 10]);
    println!(
        "(b) random 784-1024-1024-10 model, {} parameters",
        model.parameter_count()
    );
    for precision in [FloatPrecision::Float32, FloatPrecision::Float64] {
        let options = ExportOptions { precision };
        let (export_seconds, encoded) =
            best_of(5, || export_model(&model, &options).expect("exports"));
        let (import_seconds, _) = best_of(5, || {
            import_model(&encoded, &ImportOptions::default()).expect("imports")
        });
        println!(
            "    {precision:?}: {:.1} MB; export {:.1} ms, import {:.1} ms ({:.0} MB/s)",
            encoded.len() as f64 / 1e6,
            export_seconds * 1e3,
            import_seconds * 1e3,
            encoded.len() as f64 / 1e6 / import_seconds
        );
    }
    let (json_write, text) = best_of(3, || {
        serde_json::to_string(&model.to_json_value()).expect("serialises")
    });
    let (json_read, _) = best_of(3, || Model::from_json_str(&text).expect("parses"));
    println!(
        "    JSON layout for comparison: {:.1} MB; write {:.1} ms, parse {:.1} ms",
        text.len() as f64 / 1e6,
        json_write * 1e3,
        json_read * 1e3
    );
}

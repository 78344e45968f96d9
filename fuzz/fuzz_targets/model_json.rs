//! Fuzz target: the model loader must return `Ok` or a typed error for any text, never panic, and a model
//! it accepts must fold into a network and survive a save/load round trip.
#![no_main]

use libfuzzer_sys::fuzz_target;

fuzz_target!(|bytes: &[u8]| {
    let Ok(text) = std::str::from_utf8(bytes) else {
        return;
    };
    if let Ok(model) = ballast::model::Model::from_json_str(text) {
        // Only fold models the command line would accept (the default parameter limit).
        if model.network_parameter_count() <= ballast::limits::MAX_PARAMETERS {
            let network = model.classifier();
            assert!(network.output_dim() >= 2);
            let input = vec![0.0; model.input.dim];
            let logits = network.forward(&input);
            assert_eq!(logits.len(), network.output_dim());
        }
        let again = ballast::model::Model::from_json_str(&model.to_json_string())
            .expect("a saved model loads again");
        assert_eq!(again.input.dim, model.input.dim);
        assert_eq!(again.layers.len(), model.layers.len());
    }
});

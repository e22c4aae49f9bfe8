//! Adapter-config parsing: arbitrary bytes as adapter_config.json, then the module selection
//! and scaling lookups the merge runs on every base tensor name.
#![no_main]

use libfuzzer_sys::fuzz_target;
use liftgate::model::lora::Config;
use std::path::Path;

/// Module names of the kinds the merge asks about.
const MODULES: [&str; 6] = [
    "model.layers.0.self_attn.q_proj",
    "model.layers.11.mlp.down_proj",
    "model.embed_tokens",
    "lm_head",
    "model.layers.3.self_attn.qkv_proj",
    "model.norm",
];

fuzz_target!(|data: &[u8]| {
    let path = Path::new("adapter_config.json");
    match Config::parse(path, data) {
        Ok(config) => {
            for module in MODULES {
                let _ = config.selects(module, true);
                let _ = config.selects(module, false);
                let rank = config.rank_for(module);
                assert!(rank > 0);
                let _ = config.scaling(rank, config.alpha_for(module));
            }
        }
        Err(e) => {
            assert_eq!(e.exit_code(), 2, "{e}");
            assert!(e.to_string().starts_with("adapter_config.json"), "{e}");
        }
    }
});

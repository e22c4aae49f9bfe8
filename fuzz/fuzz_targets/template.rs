//! Chat-template rendering: arbitrary bytes as the template source, rendered for a fixed
//! conversation the way `answer` renders a prompt (special tokens, messages, no tools), plus a
//! few plain variables of every JSON kind.
#![no_main]

use libfuzzer_sys::fuzz_target;
use liftgate::chat::template::ChatTemplate;
use minijinja::value::{Serde, Value};

fuzz_target!(|data: &[u8]| {
    let Ok(source) = std::str::from_utf8(data) else {
        return;
    };
    let Ok(template) = ChatTemplate::compile(source) else {
        return;
    };
    let ctx = serde_json::json!({
        "bos_token": "<s>",
        "eos_token": "</s>",
        "messages": [
            {"role": "system", "content": "You answer questions about the island ferry timetable."},
            {"role": "user", "content": "When does the first ferry leave on Sunday?"},
            {"role": "assistant", "content": "At 07:40 from the north pier."},
            {"role": "user", "content": "And the last one?"}
        ],
        "tools": null,
        "documents": null,
        "add_generation_prompt": true,
        // Variables the template-engine seed snippets use.
        "meta": {"dock": "North Pier", "gate": 3, "night": null, "tags": ["a", "b"]},
        "word": "  F\u{e4}hre  ",
        "n": 7,
        "f": 2.5,
        "flag": true,
        "sep": "\u{1c} ferry  boat \u{1f}\n"
    });
    let _ = template.render(Value::from(Serde(ctx)));
});

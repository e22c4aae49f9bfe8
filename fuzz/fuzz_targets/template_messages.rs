//! Chat-template rendering the other way round: fixed templates (the seed templates of the
//! `template` target, which mirror the committed reference templates), arbitrary messages.
//! The first byte picks the template, the rest is the conversation: parts separated by NUL,
//! the first a system message, then user and assistant in turn.
#![no_main]

use libfuzzer_sys::fuzz_target;
use liftgate::chat::template::ChatTemplate;
use minijinja::value::{Serde, Value};
use std::sync::OnceLock;

const SOURCES: [&str; 10] = [
    include_str!("../corpus/template/mistral.jinja"),
    include_str!("../corpus/template/qwen3.jinja"),
    include_str!("../corpus/template/gemma2.jinja"),
    include_str!("../corpus/template/model_v5.jinja"),
    include_str!("../corpus/template/header_tag.jinja"),
    include_str!("../corpus/template/tojson.jinja"),
    include_str!("../corpus/template/namespace_break.jinja"),
    include_str!("../corpus/template/items_get.jinja"),
    include_str!("../corpus/template/loop_filters.jinja"),
    include_str!("../corpus/template/generation_tag.jinja"),
];

fn templates() -> &'static Vec<ChatTemplate> {
    static TEMPLATES: OnceLock<Vec<ChatTemplate>> = OnceLock::new();
    TEMPLATES.get_or_init(|| {
        SOURCES
            .iter()
            .map(|s| ChatTemplate::compile(s).expect("seed templates compile"))
            .collect()
    })
}

fuzz_target!(|data: &[u8]| {
    let Some((&pick, rest)) = data.split_first() else {
        return;
    };
    let Ok(text) = std::str::from_utf8(rest) else {
        return;
    };
    let templates = templates();
    let template = &templates[usize::from(pick) % templates.len()];
    let messages: Vec<serde_json::Value> = text
        .split('\0')
        .enumerate()
        .map(|(i, content)| {
            let role = match i {
                0 => "system",
                i if i % 2 == 1 => "user",
                _ => "assistant",
            };
            serde_json::json!({"role": role, "content": content})
        })
        .collect();
    let ctx = serde_json::json!({
        "bos_token": "<s>",
        "eos_token": "</s>",
        "messages": messages,
        "tools": null,
        "documents": null,
        "add_generation_prompt": pick & 0x80 == 0,
    });
    let _ = template.render(Value::from(Serde(ctx)));
});

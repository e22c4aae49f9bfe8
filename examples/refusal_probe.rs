//! What tests/reference/refusal_alternatives.py needs from liftgate to compare the refusal
//! detector with two learned alternatives on the hand-labelled real-output sets:
//!
//! - `flags FILE...`: the default detector's flag (0 or 1) of each row (`question`, `answer`)
//!   of the labelled JSONL files, one a line, in file order;
//! - `embed DIR IN OUT`: the embedding of each text of IN (one JSON string a line) by the
//!   sentence-embedding directory DIR (as `grade --embedder DIR` embeds), written to OUT as
//!   little-endian f32 rows.
//!
//! Usage: cargo run --release --example refusal_probe -- flags FILE...
//!        cargo run --release --example refusal_probe -- embed DIR IN OUT

use liftgate::embed::Embedder;
use liftgate::score::RefusalDetector;
use std::io::Write;
use std::path::Path;
use std::process::ExitCode;

fn flags(files: &[String]) -> Result<(), String> {
    let detector = RefusalDetector::default();
    let mut out = std::io::stdout().lock();
    for file in files {
        let text = std::fs::read_to_string(file).map_err(|e| format!("{file}: {e}"))?;
        for (n, line) in text.lines().enumerate() {
            let row: serde_json::Value =
                serde_json::from_str(line).map_err(|e| format!("{file}:{}: {e}", n + 1))?;
            let field = |k: &str| {
                row[k]
                    .as_str()
                    .map(str::to_owned)
                    .ok_or_else(|| format!("{file}:{}: no string `{k}`", n + 1))
            };
            let flag = detector.is_refusal_to(&field("question")?, &field("answer")?);
            writeln!(out, "{}", u8::from(flag)).map_err(|e| e.to_string())?;
        }
    }
    Ok(())
}

fn embed(dir: &str, input: &str, output: &str) -> Result<(), String> {
    let embedder = Embedder::load(Path::new(dir)).map_err(|e| e.to_string())?;
    let text = std::fs::read_to_string(input).map_err(|e| format!("{input}: {e}"))?;
    let texts = text
        .lines()
        .enumerate()
        .map(|(n, l)| {
            serde_json::from_str::<String>(l).map_err(|e| format!("{input}:{}: {e}", n + 1))
        })
        .collect::<Result<Vec<String>, String>>()?;
    let refs: Vec<&str> = texts.iter().map(String::as_str).collect();
    let total = refs.len();
    let vectors = embedder
        .embed(&refs, |done| eprintln!("embedded {done}/{total}"))
        .map_err(|e| e.to_string())?;
    let mut bytes = Vec::with_capacity(total * embedder.dim * 4);
    for v in vectors {
        for x in v {
            bytes.extend_from_slice(&x.to_le_bytes());
        }
    }
    std::fs::write(output, bytes).map_err(|e| format!("{output}: {e}"))
}

fn main() -> ExitCode {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let done = match args.first().map(String::as_str) {
        Some("flags") => flags(&args[1..]),
        Some("embed") if args.len() == 4 => embed(&args[1], &args[2], &args[3]),
        _ => Err("usage: refusal_probe flags FILE... | refusal_probe embed DIR IN OUT".into()),
    };
    match done {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("refusal_probe: {e}");
            ExitCode::from(2)
        }
    }
}

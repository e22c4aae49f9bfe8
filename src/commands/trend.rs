//! `liftgate trend`: read the history, print the trend on stdout, and with `--out DIR` write
//! trend.md, trend.json and trend.html there (all or none). docs/history.md describes the output.

use super::Outcome;
use crate::cli::TrendArgs;
use crate::error::{Error, Result};
use crate::fsutil;
use crate::history::{self, render, store::Store, trend::BootSettings, TrendOptions};

pub fn run(args: &TrendArgs) -> Result<Outcome> {
    // The same bounds as weigh's bootstrap settings.
    let stats = crate::weigh::Settings::new(args.resamples, args.seed, args.confidence)?;
    if args.last == Some(0) {
        return Err(Error::usage("--last must be at least 1"));
    }
    let between = match args.between.as_deref() {
        None => None,
        Some([a, b]) => Some((a.clone(), b.clone())),
        Some(_) => return Err(Error::usage("--between takes two runs: ids or labels")),
    };
    if let Some(out) = &args.out {
        if out.is_file() {
            return Err(Error::usage(format!(
                "--out {}: is a file; give a directory for trend.md, trend.json and trend.html",
                out.display()
            )));
        }
    }
    let store = Store::open_existing(&args.history)?;
    let trend = history::build_trend(
        &store,
        &TrendOptions {
            set: args.set.clone(),
            last: args.last,
            between,
            pairs: (args.pairs > 0).then_some(args.pairs),
            boot: BootSettings {
                resamples: stats.resamples,
                confidence: stats.confidence,
                seed: stats.seed,
            },
        },
    )?;
    if let Some(out) = &args.out {
        let files = [
            ("trend.json", render::trend_json(&trend)?),
            ("trend.md", render::markdown(&trend).into_bytes()),
            ("trend.html", history::html::render(&trend).into_bytes()),
        ];
        let mut staged = Vec::new();
        for (name, bytes) in &files {
            let path = out.join(name);
            if path.is_dir() {
                return Err(Error::file(
                    &path,
                    "is a directory; cannot write the trend there",
                ));
            }
            staged.push((path.clone(), fsutil::stage(&path, bytes)?));
        }
        for (path, tmp) in staged {
            fsutil::commit_staged(&path, tmp)?;
        }
    }
    print!("{}", render::terminal(&trend));
    if let Some(out) = &args.out {
        println!("trend: {}", out.join("trend.md").display());
    }
    Ok(Outcome::Success)
}

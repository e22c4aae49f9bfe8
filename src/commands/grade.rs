//! `liftgate grade`: load the set, the answers, the policy's refusal phrases and the embedding
//! model (`--embedder`, optional); grade; write the grades file and its run record (both or
//! neither).

use super::Outcome;
use crate::cli::GradeArgs;
use crate::embed::Embedder;
use crate::error::{Error, Result};
use crate::formats::answers;
use crate::formats::questions::QuestionSet;
use crate::formats::run_record;
use crate::fsutil;
use crate::grade;
use crate::policy::Policy;
use crate::score::RefusalDetector;

pub fn run(args: &GradeArgs) -> Result<Outcome> {
    for (flag, input) in [
        ("--answers", &args.answers),
        ("--questions", &args.questions),
    ] {
        if fsutil::same_file(&args.out, input) {
            return Err(Error::usage(format!(
                "--out {} is the {flag} file; choose another path so the input is not overwritten",
                args.out.display()
            )));
        }
    }
    // Only the policy's refusal phrases matter here; loading it whole still rejects a bad file.
    let policy = Policy::load_or_default(args.policy.as_deref())?;
    // Both files are read and parsed at once; the set's errors are reported first.
    let (set, rows) = rayon::join(
        || QuestionSet::load(&args.questions),
        || answers::read_rows(&args.answers),
    );
    let set = set?;
    set.check_references()?;
    let answers = answers::match_ids(&args.answers, &set, rows?)?;
    match (
        run_record::check_set_fingerprint(&args.answers, &set),
        args.allow_set_change,
    ) {
        (Ok(()), _) => {}
        (Err(e), true) => eprintln!("liftgate: warning: {e} (grading anyway: --allow-set-change)"),
        (Err(Error::Input { location, message }), false) => {
            return Err(Error::Input {
                location,
                message: format!(
                    "{message}; if only references or categories changed, `grade --allow-set-change` grades these answers anyway"
                ),
            })
        }
        (Err(e), false) => return Err(e),
    }
    let embedder = args.embedder.as_deref().map(Embedder::load).transpose()?;
    let semantic = embedder
        .as_ref()
        .map(|e| grade::semantic_scores(e, &set, &answers))
        .transpose()?;
    let detector = RefusalDetector::with_extra_phrases(&policy.refusal.extra_phrases);
    let grades = grade::grade_set(&set, &answers, &detector, semantic.as_deref());
    grade::write_grades(&args.out, &grades, &set, &args.answers, embedder.as_ref())?;
    eprintln!("{}", grade::summary_line(&grades, &args.out));
    // The process ends right after this command: the rows are left to the operating system
    // rather than freed one allocation at a time (a few hundred thousand for a large set).
    super::release_at_exit((set, answers, grades));
    Ok(Outcome::Success)
}

//! Recording a report directory written before, from its summary.json and grades files
//! (`liftgate record`).

use super::build::short;
use super::*;

/// What `liftgate record` needs.
#[derive(Debug, Clone)]
pub struct ImportRequest {
    pub report_dir: PathBuf,
    /// The question set the report was made with; by default the path its summary.json
    /// records. Its fingerprint must match the summary's.
    pub questions: Option<PathBuf>,
}

/// Imports one report directory (summary.json, the two grades files) into the history.
/// Returns the run id and any warnings for stderr.
pub fn import_report(opts: &RecordOptions, req: &ImportRequest) -> Result<(i64, Vec<String>)> {
    let dir = &req.report_dir;
    let summary_path = dir.join("summary.json");
    let bytes = std::fs::read(&summary_path).map_err(|e| {
        Error::file(
            &summary_path,
            format!("cannot read the report's summary.json: {e} (expected a report directory written by `liftgate weigh` or `vet`)"),
        )
    })?;
    let summary: Summary = serde_json::from_slice(&bytes).map_err(|e| {
        Error::line(
            &summary_path,
            e.line(),
            format!("not a liftgate summary.json: {e}"),
        )
    })?;
    let mut warnings = Vec::new();
    // The grades files: in the report directory (vet), else where the summary says (weigh).
    let mut grades_paths = Vec::new();
    for (role, name, input) in [
        (
            Role::Baseline,
            "baseline.grades.jsonl",
            &summary.inputs.baseline,
        ),
        (
            Role::Candidate,
            "candidate.grades.jsonl",
            &summary.inputs.candidate,
        ),
    ] {
        let local = dir.join(name);
        let path = if local.is_file() {
            local
        } else {
            PathBuf::from(&input.path)
        };
        let sha = fsutil::sha256_file(&path).map_err(|_| {
            Error::file(
                &path,
                format!(
                    "the {} grades weighed in {} were not found here or in the report directory",
                    role.as_str(),
                    summary_path.display()
                ),
            )
        })?;
        if sha != input.sha256 {
            return Err(Error::file(
                &path,
                format!(
                    "is not the {} grades file the report weighed (its SHA-256 differs from summary.json's inputs.{}.sha256)",
                    role.as_str(),
                    role.as_str()
                ),
            ));
        }
        grades_paths.push((role, path));
    }
    let want_fp = &summary.inputs.questions.sha256;
    let set_path = req
        .questions
        .clone()
        .unwrap_or_else(|| PathBuf::from(&summary.inputs.questions.path));
    let set = match QuestionSet::load(&set_path) {
        Ok(set) if &set.fingerprint == want_fp => Some(set),
        Ok(_) if req.questions.is_some() => {
            return Err(Error::file(
                &set_path,
                format!(
                    "is not the question set this report was made with (its SHA-256 differs from summary.json's inputs.questions.sha256 {})",
                    short(want_fp)
                ),
            ))
        }
        Err(e) if req.questions.is_some() => return Err(e),
        _ => None,
    };
    let finished_at = std::fs::metadata(&summary_path)
        .and_then(|m| m.modified())
        .map(rfc3339)
        .unwrap_or_else(|_| finished_now());
    match set {
        Some(set) => {
            let mut loaded = Vec::new();
            for (role, path) in &grades_paths {
                loaded.push((
                    *role,
                    crate::formats::grades::load_for_set(path, &set)?,
                    path.clone(),
                ));
            }
            let variants: Vec<VariantGrades> = loaded
                .iter()
                .map(|(role, g, p)| VariantGrades {
                    role: *role,
                    grades: g,
                    grades_path: p,
                })
                .collect();
            let id = record(opts, &set, &variants, &summary, dir, finished_at)?;
            Ok((id, warnings))
        }
        None => {
            warnings.push(format!(
                "the question set this report was made with ({}, SHA-256 {}) was not found with that content; the run is recorded without question contents, so its questions cannot count as unchanged in like-for-like comparisons. Pass --questions FILE with the set as it was to record them",
                summary.inputs.questions.path,
                short(want_fp)
            ));
            let mut loaded = Vec::new();
            for (role, path) in &grades_paths {
                loaded.push((*role, read_grades(path)?, path.clone()));
            }
            let base = &loaded[0].1;
            for (_, g, p) in &loaded[1..] {
                if g.len() != base.len() || g.iter().zip(base).any(|(a, b)| a.id != b.id) {
                    return Err(Error::file(
                        p,
                        "its ids differ from the baseline grades' (the two must be row for row)",
                    ));
                }
            }
            let questions: Vec<NewQuestion> = base
                .iter()
                .map(|g| NewQuestion {
                    key: QuestionKey {
                        id: g.id.clone(),
                        content_hash: None,
                        expect: g.expect,
                    },
                    category: g.category.clone(),
                })
                .collect();
            let variants: Vec<VariantGrades> = loaded
                .iter()
                .map(|(role, g, p)| VariantGrades {
                    role: *role,
                    grades: g,
                    grades_path: p,
                })
                .collect();
            let mut run = new_run(
                opts,
                set_name(Path::new(&summary.inputs.questions.path)),
                Path::new(&summary.inputs.questions.path),
                want_fp,
                questions.len(),
                &variants,
                &summary,
                dir,
                finished_at,
            )?;
            run.questions = questions;
            let mut store = Store::open_for_writing(&opts.path)?;
            Ok((store.insert_run(&run)?, warnings))
        }
    }
}

/// A grades file read without its question set (rows checked as `grade` writes them).
fn read_grades(path: &Path) -> Result<Vec<GradeRecord>> {
    fsutil::read_jsonl_lines(path)?
        .into_iter()
        .map(|(line, text)| {
            serde_json::from_str::<GradeRecord>(&text)
                .map_err(|e| Error::line(path, line, format!("not a grade row: {e}")))
        })
        .collect()
}

// ---------------------------------------------------------------------------------------------
// The trend.

//! ROUGE-L: the longest-common-subsequence F-measure of Lin (2004), "ROUGE: A Package for
//! Automatic Evaluation of Summaries", section 3.1, sentence level, with beta = 1.
//!
//! **Tokens** as the `rouge-score` reference package makes them without a stemmer: lower-case
//! the text (full Unicode lower-casing, as Python's `str.lower`), replace every run of
//! characters outside `[a-z0-9]` with a space, split on spaces. So "E-bike's 7:40" gives
//! `["e", "bike", "s", "7", "40"]`, and letters outside ASCII ("é") separate tokens.
//!
//! **Score** of an answer (candidate, `m` tokens) against one reference (`n` tokens), with
//! `lcs` the length of their longest common subsequence of tokens:
//! precision P = lcs / m, recall R = lcs / n, F = 2·P·R / (P + R) (0 when P + R = 0).
//! When either side has no tokens the score is 0 (as `rouge-score` does, including when both
//! are empty).
//!
//! **Several references**: the maximum F over the references.
//!
//! The LCS uses the O(n·m) dynamic programme with one rolling row of min(n, m) + 1 cells.

/// rouge-score tokens of `text` (no stemming).
pub fn tokens(text: &str) -> Vec<String> {
    split_tokens(&lowered(text))
        .into_iter()
        .map(str::to_string)
        .collect()
}

/// `text` lower-cased as Python's `str.lower` does (the first tokenisation step).
pub fn lowered(text: &str) -> String {
    if text.is_ascii() {
        text.to_ascii_lowercase()
    } else {
        text.to_lowercase()
    }
}

/// The tokens of already [`lowered`] text: maximal runs of `[a-z0-9]`.
pub fn split_tokens(lowered: &str) -> Vec<&str> {
    lowered
        .split(|c: char| !(c.is_ascii_lowercase() || c.is_ascii_digit()))
        .filter(|t| !t.is_empty())
        .collect()
}

/// Length of the longest common subsequence of `a` and `b`.
pub fn lcs_len<T: PartialEq>(a: &[T], b: &[T]) -> usize {
    // Keep the row over the shorter sequence.
    let (long, short) = if a.len() >= b.len() { (a, b) } else { (b, a) };
    if short.is_empty() {
        return 0;
    }
    // row[j] = LCS of long[..i] and short[..j] for the current i.
    let mut row = vec![0u32; short.len() + 1];
    for x in long {
        let mut diag = 0u32; // row[j - 1] of the previous i
        for (j, y) in short.iter().enumerate() {
            let up = row[j + 1];
            row[j + 1] = if x == y { diag + 1 } else { up.max(row[j]) };
            diag = up;
        }
    }
    row[short.len()] as usize
}

/// ROUGE-L F-measure of already tokenised texts.
pub fn f_measure_tokens<T: PartialEq>(answer: &[T], reference: &[T]) -> f64 {
    if answer.is_empty() || reference.is_empty() {
        return 0.0;
    }
    let lcs = lcs_len(answer, reference) as f64;
    let precision = lcs / answer.len() as f64;
    let recall = lcs / reference.len() as f64;
    if precision + recall > 0.0 {
        2.0 * precision * recall / (precision + recall)
    } else {
        0.0
    }
}

/// ROUGE-L F-measure of one answer against one reference, in [0, 1].
pub fn rouge_l(answer: &str, reference: &str) -> f64 {
    f_measure_tokens(&tokens(answer), &tokens(reference))
}

/// ROUGE-L maximised over the references; `None` when there are no references.
pub fn max_rouge_l<S: AsRef<str>>(answer: &str, references: &[S]) -> Option<f64> {
    let a = tokens(answer);
    references
        .iter()
        .map(|r| f_measure_tokens(&a, &tokens(r.as_ref())))
        .reduce(f64::max)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn close(a: f64, b: f64) -> bool {
        (a - b).abs() < 1e-12
    }

    #[test]
    fn tokens_follow_rouge_score_tokenize() {
        // rouge-score tokenize.tokenize(text, stemmer=None): lower, [^a-z0-9]+ -> " ", split.
        assert_eq!(tokens("E-bike's 7:40!"), ["e", "bike", "s", "7", "40"]);
        assert_eq!(tokens("Café  ÉTÉ"), ["caf", "t"]);
        assert_eq!(tokens("...!?"), Vec::<String>::new());
        assert_eq!(tokens(""), Vec::<String>::new());
        assert_eq!(tokens("Gate_4"), ["gate", "4"]);
    }

    #[test]
    fn lcs_examples() {
        // Lin (2004) section 3.1 example: S1 "police killed the gunman",
        // S2 "police kill the gunman" (LCS 3), S3 "the gunman kill police" (LCS 2).
        let s1 = ["police", "killed", "the", "gunman"];
        let s2 = ["police", "kill", "the", "gunman"];
        let s3 = ["the", "gunman", "kill", "police"];
        assert_eq!(lcs_len(&s1, &s2), 3);
        assert_eq!(lcs_len(&s1, &s3), 2);
        // Lin (2004): with beta = 1, ROUGE-L(S2 | ref S1) = 3/4, ROUGE-L(S3 | ref S1) = 1/2.
        assert!(close(f_measure_tokens(&s2, &s1), 0.75));
        assert!(close(f_measure_tokens(&s3, &s1), 0.5));
        // Classic textbook pair: LCS("ABCBDAB", "BDCABA") = 4.
        let a: Vec<char> = "ABCBDAB".chars().collect();
        let b: Vec<char> = "BDCABA".chars().collect();
        assert_eq!(lcs_len(&a, &b), 4);
        assert_eq!(lcs_len(&b, &a), 4);
        let empty: [char; 0] = [];
        assert_eq!(lcs_len(&a, &empty), 0);
    }

    #[test]
    fn repeated_tokens() {
        // answer "free free free" (3) vs reference "free ride free" (3): LCS "free free" = 2,
        // P = R = 2/3.
        assert!(close(
            rouge_l("free free free", "free ride free"),
            2.0 / 3.0
        ));
    }

    #[test]
    fn empty_sides_score_zero() {
        // rouge-score _score_lcs: 0 when either token list is empty.
        assert_eq!(rouge_l("", ""), 0.0);
        assert_eq!(rouge_l("yes", ""), 0.0);
        assert_eq!(rouge_l("!!!", "yes"), 0.0);
        assert_eq!(rouge_l("no", "yes"), 0.0);
    }

    #[test]
    fn maximum_over_references() {
        let refs = ["Bikes ride free.", "No."];
        assert_eq!(max_rouge_l("no", &refs), Some(1.0));
        // "bikes are free" vs "bikes ride free": LCS 2, P = R = 2/3.
        assert!(close(
            max_rouge_l("bikes are free", &refs).unwrap(),
            2.0 / 3.0
        ));
        let none: [&str; 0] = [];
        assert_eq!(max_rouge_l("x", &none), None);
    }
}

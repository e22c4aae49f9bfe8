//! Scorers used by `grade`: each a pure function over text, with its definition in its own
//! module's doc comment.
//!
//! - [`squad`]: exact match and token F1 (SQuAD v1.1 evaluation definitions);
//! - [`rouge`]: ROUGE-L F-measure (Lin, 2004) over rouge-score tokens;
//! - [`refusal`]: whether an answer declines to answer (phrase matching);
//! - [`facts`]: fact recall and contradiction against the references' times, prices, dates, ...
//! - [`semantic`]: cosine of sentence embeddings, maximised over the references (SemScore).
//!
//! [`score_references`] combines the first two for one answer and a question's references.

pub mod facts;
pub mod leaks;
pub mod refusal;
pub mod rouge;
pub mod semantic;
pub mod squad;

pub use refusal::RefusalDetector;

use std::hash::Hasher;

/// The reference-based scores of one answer, each maximised over the references separately.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ReferenceScores {
    /// 0 or 1.
    pub exact_match: u8,
    pub token_f1: f64,
    pub rouge_l: f64,
}

/// Scores `answer` against the usable references: those that are not blank (empty or only
/// whitespace). `None` when no reference is usable (typically an `expect: refuse` question).
///
/// Same values as [`squad::max_exact_match`], [`squad::max_token_f1`] and
/// [`rouge::max_rouge_l`]; for speed, each answer is tokenised once and tokens carry a hash so
/// that the LCS and the bag intersection mostly compare integers.
pub fn score_references<S: AsRef<str>>(answer: &str, references: &[S]) -> Option<ReferenceScores> {
    let mut refs = references
        .iter()
        .map(AsRef::as_ref)
        .filter(|r| !r.trim().is_empty())
        .peekable();
    refs.peek()?;
    let squad_buf = squad::normalized_buffer(answer);
    let squad_answer = squad_keyed(&squad_buf);
    let mut squad_sorted = squad_answer.clone();
    squad_sorted.sort_unstable();
    let rouge_buf = rouge::lowered(answer);
    let rouge_answer = rouge_keyed(&rouge_buf);
    let mut best = ReferenceScores {
        exact_match: 0,
        token_f1: 0.0,
        rouge_l: 0.0,
    };
    for r in refs {
        let ref_buf = squad::normalized_buffer(r);
        let mut b = squad_keyed(&ref_buf);
        if squad_answer == b {
            best.exact_match = 1;
        }
        b.sort_unstable();
        let f1 = squad::f1_from_counts(
            sorted_common(&squad_sorted, &b),
            squad_sorted.len(),
            b.len(),
        );
        best.token_f1 = best.token_f1.max(f1);

        let ref_buf = rouge::lowered(r);
        let b = rouge_keyed(&ref_buf);
        best.rouge_l = best.rouge_l.max(rouge::f_measure_tokens(&rouge_answer, &b));
    }
    Some(best)
}

/// The SQuAD tokens of a [`squad::normalized_buffer`], keyed: the pieces between whitespace
/// ([`squad::split_tokens`]), split byte by byte when the buffer is ASCII.
fn squad_keyed(buffer: &str) -> Vec<Keyed<'_>> {
    if buffer.is_ascii() {
        // Python's `str.split()` whitespace within ASCII: \t \n \v \f \r, U+001C..U+001F
        // and the space.
        keyed_runs(buffer, |b| !matches!(b, b'\t'..=b'\r' | b'\x1c'..=b' '))
    } else {
        keyed(&squad::split_tokens(buffer))
    }
}

/// The rouge-score tokens of a [`rouge::lowered`] text, keyed: its maximal runs of `[a-z0-9]`
/// ([`rouge::split_tokens`]). Every byte of a non-ASCII character is outside that class, so
/// splitting byte by byte gives the same runs whatever the text.
fn rouge_keyed(lowered: &str) -> Vec<Keyed<'_>> {
    keyed_runs(lowered, |b| b.is_ascii_lowercase() || b.is_ascii_digit())
}

/// The maximal runs of bytes that are `inside` tokens, each with its hash. `inside` must hold
/// only for ASCII bytes, or for every byte when `text` is ASCII, so that runs end on character
/// boundaries.
fn keyed_runs(text: &str, inside: impl Fn(u8) -> bool) -> Vec<Keyed<'_>> {
    let bytes = text.as_bytes();
    let mut out = Vec::with_capacity(bytes.len() / 4 + 1);
    let mut i = 0;
    while i < bytes.len() {
        if !inside(bytes[i]) {
            i += 1;
            continue;
        }
        let start = i;
        while i < bytes.len() && inside(bytes[i]) {
            i += 1;
        }
        out.push(key(&text[start..i]));
    }
    out
}

/// Size of the multiset intersection of two sorted id lists.
fn sorted_common<T: Ord>(a: &[T], b: &[T]) -> usize {
    let (mut i, mut j, mut common) = (0, 0, 0);
    while i < a.len() && j < b.len() {
        match a[i].cmp(&b[j]) {
            std::cmp::Ordering::Less => i += 1,
            std::cmp::Ordering::Greater => j += 1,
            std::cmp::Ordering::Equal => {
                common += 1;
                i += 1;
                j += 1;
            }
        }
    }
    common
}

/// A token with its hash, so that comparisons mostly compare integers; equal hashes fall back
/// to comparing the text, so a hash collision can never change a score.
#[derive(Debug, Clone, Copy)]
struct Keyed<'a> {
    hash: u64,
    text: &'a str,
}

impl PartialEq for Keyed<'_> {
    fn eq(&self, other: &Self) -> bool {
        self.hash == other.hash && self.text == other.text
    }
}

impl Eq for Keyed<'_> {}

impl PartialOrd for Keyed<'_> {
    fn partial_cmp(&self, other: &Self) -> Option<std::cmp::Ordering> {
        Some(self.cmp(other))
    }
}

impl Ord for Keyed<'_> {
    fn cmp(&self, other: &Self) -> std::cmp::Ordering {
        self.hash
            .cmp(&other.hash)
            .then_with(|| self.text.cmp(other.text))
    }
}

fn keyed<'a>(tokens: &[&'a str]) -> Vec<Keyed<'a>> {
    tokens.iter().map(|t| key(t)).collect()
}

fn key(text: &str) -> Keyed<'_> {
    let mut h = FxHasher::default();
    h.write(text.as_bytes());
    Keyed {
        hash: h.finish(),
        text,
    }
}

/// A small multiplicative hasher (the rustc "Fx" hash) for short token keys. Only speed
/// matters here: collisions cost time, never correctness.
#[derive(Default, Clone, Copy)]
pub(crate) struct FxHasher {
    hash: u64,
}

impl Hasher for FxHasher {
    fn write(&mut self, bytes: &[u8]) {
        const K: u64 = 0x51_7c_c1_b7_27_22_0a_95;
        let mut chunks = bytes.chunks_exact(8);
        for c in &mut chunks {
            let mut w = [0u8; 8];
            w.copy_from_slice(c);
            self.hash = (self.hash.rotate_left(5) ^ u64::from_le_bytes(w)).wrapping_mul(K);
        }
        for &b in chunks.remainder() {
            self.hash = (self.hash.rotate_left(5) ^ u64::from(b)).wrapping_mul(K);
        }
    }

    fn finish(&self) -> u64 {
        self.hash
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn blank_references_are_ignored() {
        assert_eq!(score_references("yes", &["", "  "]), None);
        let none: [&str; 0] = [];
        assert_eq!(score_references("yes", &none), None);
        let s = score_references("", &["", "Yes."]).unwrap();
        // Only "Yes." is used: an empty answer does not match it.
        assert_eq!(s.exact_match, 0);
        assert_eq!(s.token_f1, 0.0);
        assert_eq!(s.rouge_l, 0.0);
    }

    #[test]
    fn combined_scores_equal_the_metrics_taken_one_by_one() {
        // Random texts over an alphabet of the cases the tokenisers treat apart: letters of
        // both cases, digits, articles, punctuation, `_`, every ASCII whitespace byte Python
        // splits on (\t..\r, U+001C..U+001F, space), other control bytes, and non-ASCII
        // letters and spaces.
        use rand::Rng;
        let mut rng = crate::stats::rng::chunk_rng(11, 0, 0);
        let mut below = |n: usize| (rng.next_u64() % n as u64) as usize;
        let pieces = [
            "a", "an", "the", "The", "A", "ferry", "Ferry", "7", "40", "e", "bike", "x", "-", "'",
            ".", ",", "_", " ", "  ", "\t", "\n", "\u{b}", "\u{c}", "\r", "\u{1c}", "\u{1f}",
            "\u{1}", "\u{7f}", "é", "É", "\u{a0}", "\u{2003}", "ß", "İ",
        ];
        let mut text = || -> String {
            let n = below(12);
            (0..n).map(|_| pieces[below(pieces.len())]).collect()
        };
        for _ in 0..20_000 {
            let answer = text();
            let refs = [text(), text(), "a ferry".to_string()];
            let refs: Vec<&String> = refs.iter().filter(|r| !r.trim().is_empty()).collect();
            let s = score_references(&answer, &refs).unwrap();
            assert_eq!(
                Some(s.exact_match),
                squad::max_exact_match(&answer, &refs),
                "{answer:?} {refs:?}"
            );
            assert_eq!(Some(s.token_f1), squad::max_token_f1(&answer, &refs));
            assert_eq!(Some(s.rouge_l), rouge::max_rouge_l(&answer, &refs));
        }
    }

    #[test]
    fn each_metric_is_maximised_separately() {
        // Reference 1 gives the best exact match, reference 2 the best ROUGE-L.
        let refs = ["Yes", "Bikes ride free"];
        let s = score_references("yes", &refs).unwrap();
        assert_eq!(s.exact_match, 1);
        assert_eq!(s.token_f1, 1.0);
        assert_eq!(s.rouge_l, 1.0);
        let s = score_references("bikes ride free, yes", &refs).unwrap();
        assert_eq!(s.exact_match, 0);
        // vs "bikes ride free": 3 common of 4 and 3: P 3/4 R 1 -> 6/7.
        assert!((s.token_f1 - 6.0 / 7.0).abs() < 1e-12);
        assert!((s.rouge_l - 6.0 / 7.0).abs() < 1e-12);
    }
}

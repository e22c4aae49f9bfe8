//! Leakage between a held-out question set and the training pairs of a fine-tune: exact and
//! normalised duplicates, and near duplicates by word n-gram containment found with MinHash-LSH.
//! docs/scoring.md, "Leakage", is the user-facing definition.
//!
//! Why: a held-out question that is a light rewording of a training question inflates the lift;
//! the model has seen its answer. Exact copies are easy to find; rewordings need a similarity.
//!
//! Definitions:
//! - *normalised text*: lower-cased, every run of characters that are not letters or digits
//!   replaced by one space, trimmed; its words are split on spaces;
//! - *shingles*: the set of word n-grams of the normalised text ([`NGRAM`] words); a text shorter
//!   than n words has its whole word sequence as its one shingle;
//! - *containment* of held-out question A in training item B (Broder 1997, "On the resemblance
//!   and containment of documents"): `|S(A) ∩ S(B)| / |S(A)|`, the share of A's shingles found
//!   in B; 1.0 when A is wholly inside B;
//! - *resemblance* (Jaccard): `|S(A) ∩ S(B)| / |S(A) ∪ S(B)|`.
//!
//! Finding candidates among up to millions of training items: MinHash signatures
//! ([`PERMUTATIONS`] hash functions `h_i(x) = (a_i·x + b_i) mod (2^61 − 1)` over 64-bit shingle
//! hashes, the universal hashing of Carter and Wegman as MinHash implementations commonly use)
//! cut into [`BANDS`] bands of [`ROWS`] rows; two texts become candidates when any band
//! matches. With 64 bands of 2 rows a pair of resemblance J is a candidate with probability
//! `1 − (1 − J²)^64`: 0.9996 at J = 0.35, 0.47 at J = 0.1. Every candidate's containment is
//! then computed exactly from the shingle sets, so the reported values carry no estimation
//! error; what MinHash can cost is a missed pair: a short question contained in a much longer
//! training item (low resemblance, high containment).
//!
//! With a sentence-embedding model (`leaks --embedder`), [`nearest_by_cosine`] also finds each
//! held-out question's nearest training question by the cosine of their embeddings
//! (`score::semantic::cosine`): a rewording that shares few word triples (other word order,
//! synonyms) can still lie close in the embedding space. Exhaustive, exact search: one dot
//! product per pair, so its cost grows with questions × training rows (the embedding of the
//! training rows costs far more than the search).

use super::FxHasher;
use std::collections::{HashMap, HashSet};
use std::hash::Hasher;

/// Words per shingle.
pub const NGRAM: usize = 3;
/// MinHash hash functions.
pub const PERMUTATIONS: usize = BANDS * ROWS;
/// LSH bands and rows per band.
pub const BANDS: usize = 64;
pub const ROWS: usize = 2;
/// Containment at or above which a held-out question is flagged as a near duplicate, unless
/// the caller chooses another (`liftgate leaks --threshold`). Common practice, not a published
/// constant: half of the question's word triples found in one training item.
pub const DEFAULT_THRESHOLD: f64 = 0.5;

/// Cosine at or above which `leaks --embedder` flags a held-out question's nearest training
/// question, unless `--cosine-threshold` says otherwise. A rule of thumb for all-MiniLM-style
/// models (paraphrases of one short question typically score above 0.85, related but different
/// questions below), not a published constant; the right value depends on the model.
pub const DEFAULT_COSINE_THRESHOLD: f64 = 0.9;

const MERSENNE: u64 = (1 << 61) - 1;

/// The normalised text: lower case, letters and digits, single spaces.
pub fn normalise(text: &str) -> String {
    let mut out = String::with_capacity(text.len());
    for word in text
        .split(|c: char| !c.is_alphanumeric())
        .filter(|w| !w.is_empty())
    {
        if !out.is_empty() {
            out.push(' ');
        }
        out.extend(word.chars().flat_map(char::to_lowercase));
    }
    out
}

/// The set of word n-grams of a normalised text, each as its 64-bit hash.
pub fn shingles(normalised: &str) -> HashSet<u64> {
    let words: Vec<&str> = normalised.split(' ').filter(|w| !w.is_empty()).collect();
    let mut out = HashSet::new();
    if words.is_empty() {
        return out;
    }
    let hash = |ws: &[&str]| {
        let mut h = FxHasher::default();
        for w in ws {
            h.write(w.as_bytes());
            h.write_u8(0xff);
        }
        // Spread the multiplicative hash's low bits before the modular permutations.
        splitmix(h.finish())
    };
    if words.len() < NGRAM {
        out.insert(hash(&words));
    } else {
        for w in words.windows(NGRAM) {
            out.insert(hash(w));
        }
    }
    out
}

fn splitmix(mut x: u64) -> u64 {
    x = x.wrapping_add(0x9e37_79b9_7f4a_7c15);
    x = (x ^ (x >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
    x = (x ^ (x >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
    x ^ (x >> 31)
}

/// `|a ∩ b| / |a|`; 0 when `a` is empty.
pub fn containment(a: &HashSet<u64>, b: &HashSet<u64>) -> f64 {
    if a.is_empty() {
        return 0.0;
    }
    a.iter().filter(|x| b.contains(x)).count() as f64 / a.len() as f64
}

/// `|a ∩ b| / |a ∪ b|`; 0 when both are empty.
pub fn resemblance(a: &HashSet<u64>, b: &HashSet<u64>) -> f64 {
    let common = a.iter().filter(|x| b.contains(x)).count();
    let union = a.len() + b.len() - common;
    if union == 0 {
        0.0
    } else {
        common as f64 / union as f64
    }
}

/// The hash functions `(a_i, b_i)`, fixed (seeded) so that signatures are reproducible.
fn permutations() -> Vec<(u64, u64)> {
    let mut state = 0x5eed_u64;
    (0..PERMUTATIONS)
        .map(|_| {
            state = splitmix(state);
            let a = 1 + state % (MERSENNE - 1);
            state = splitmix(state);
            (a, state % MERSENNE)
        })
        .collect()
}

fn signature(set: &HashSet<u64>, perms: &[(u64, u64)]) -> Vec<u64> {
    let mut sig = vec![u64::MAX; perms.len()];
    for &x in set {
        let x = x % MERSENNE;
        for (s, &(a, b)) in sig.iter_mut().zip(perms) {
            let h = ((a as u128 * x as u128 + b as u128) % MERSENNE as u128) as u64;
            if h < *s {
                *s = h;
            }
        }
    }
    sig
}

fn band_keys(sig: &[u64]) -> impl Iterator<Item = (usize, u64)> + '_ {
    sig.chunks(ROWS).enumerate().map(|(band, rows)| {
        let mut h = FxHasher::default();
        for r in rows {
            h.write_u64(*r);
        }
        (band, h.finish())
    })
}

/// How a held-out question matches the training set.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub enum LeakKind {
    /// The same text (leading and trailing whitespace aside).
    Exact,
    /// The same normalised text.
    Normalised,
    /// Containment at or above the threshold.
    Near,
    /// Embedding cosine of the nearest training question at or above the cosine threshold,
    /// and not flagged by the kinds above.
    Semantic,
}

impl LeakKind {
    pub fn as_str(self) -> &'static str {
        match self {
            LeakKind::Exact => "exact",
            LeakKind::Normalised => "normalised",
            LeakKind::Near => "near",
            LeakKind::Semantic => "semantic",
        }
    }
}

/// For each held-out question embedding, the training embedding with the largest cosine and
/// that cosine (the earliest on ties); `None` when there is no training embedding.
pub fn nearest_by_cosine(questions: &[Vec<f32>], train: &[Vec<f32>]) -> Vec<Option<(usize, f64)>> {
    use rayon::prelude::*;
    questions
        .par_iter()
        .map(|q| {
            let mut best: Option<(usize, f64)> = None;
            for (j, t) in train.iter().enumerate() {
                let c = super::semantic::cosine(q, t);
                if best.is_none_or(|(_, b)| c > b) {
                    best = Some((j, c));
                }
            }
            best
        })
        .collect()
}

/// One flagged held-out question and its closest training item.
#[derive(Debug, Clone, PartialEq)]
pub struct Leak {
    /// Index of the held-out question.
    pub question: usize,
    /// Index of the training item.
    pub train: usize,
    pub kind: LeakKind,
    /// Containment of the question in the training item (1.0 for exact and normalised copies).
    pub containment: f64,
}

/// Every held-out question that is an exact, normalised or near (containment ≥ `threshold`)
/// duplicate of a training item, with the closest one (highest containment, then the earliest).
pub fn find_leaks<A: AsRef<str>, B: AsRef<str>>(
    questions: &[A],
    train: &[B],
    threshold: f64,
) -> Vec<Leak> {
    let perms = permutations();
    let mut exact: HashMap<&str, usize> = HashMap::new();
    let mut normal: HashMap<String, usize> = HashMap::new();
    let mut buckets: HashMap<(usize, u64), Vec<u32>> = HashMap::new();
    let mut train_sets = Vec::with_capacity(train.len());
    for (j, t) in train.iter().enumerate() {
        let t = t.as_ref();
        exact.entry(t.trim()).or_insert(j);
        let n = normalise(t);
        let set = shingles(&n);
        normal.entry(n).or_insert(j);
        for key in band_keys(&signature(&set, &perms)) {
            buckets.entry(key).or_default().push(j as u32);
        }
        train_sets.push(set);
    }
    let mut out = Vec::new();
    for (i, q) in questions.iter().enumerate() {
        let q = q.as_ref();
        if let Some(&j) = exact.get(q.trim()) {
            out.push(Leak {
                question: i,
                train: j,
                kind: LeakKind::Exact,
                containment: 1.0,
            });
            continue;
        }
        let n = normalise(q);
        if let Some(&j) = normal.get(&n) {
            out.push(Leak {
                question: i,
                train: j,
                kind: LeakKind::Normalised,
                containment: 1.0,
            });
            continue;
        }
        let set = shingles(&n);
        if set.is_empty() {
            continue;
        }
        let mut candidates: Vec<u32> = band_keys(&signature(&set, &perms))
            .filter_map(|k| buckets.get(&k))
            .flatten()
            .copied()
            .collect();
        candidates.sort_unstable();
        candidates.dedup();
        let best = candidates
            .iter()
            .map(|&j| (containment(&set, &train_sets[j as usize]), j))
            .fold(None, |best: Option<(f64, u32)>, (c, j)| match best {
                Some((bc, _)) if bc >= c => best,
                _ => Some((c, j)),
            });
        if let Some((c, j)) = best {
            if c >= threshold {
                out.push(Leak {
                    question: i,
                    train: j as usize,
                    kind: LeakKind::Near,
                    containment: c,
                });
            }
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    fn set(text: &str) -> HashSet<u64> {
        shingles(&normalise(text))
    }

    #[test]
    fn normalising_keeps_letters_and_digits_only() {
        assert_eq!(
            normalise("  When's the 07:20 boat?! "),
            "when s the 07 20 boat"
        );
        assert_eq!(normalise("ÉTÉ  Fähre"), "été fähre");
        assert_eq!(normalise("?!"), "");
    }

    #[test]
    fn containment_and_resemblance_by_hand() {
        // "a b c d" has triples {abc, bcd}; "a b c x" has {abc, bcx}: one common.
        let a = set("a b c d");
        let b = set("a b c x");
        assert_eq!(containment(&a, &b), 0.5);
        assert!((resemblance(&a, &b) - 1.0 / 3.0).abs() < 1e-12);
        // Wholly inside a longer text.
        let long = set("well then a b c d and more");
        assert_eq!(containment(&a, &long), 1.0);
        // Short texts are one shingle.
        assert_eq!(set("hi there").len(), 1);
        assert_eq!(containment(&set(""), &a), 0.0);
        assert_eq!(resemblance(&set(""), &set("")), 0.0);
    }

    #[test]
    fn finds_exact_normalised_and_near_copies() {
        let train = [
            "How much is an adult single to Vessa?",
            "Can I take my bike on the Little Korrin boat?",
            "When does the first winter boat leave Wendle Quay for Vessa in the morning?",
            "Is there a lift on MV Saltmarrow?",
        ];
        let held_out = [
            "Is there a lift on MV Saltmarrow?",
            "can i take my BIKE on the little korrin boat",
            "When does the first winter boat leave Wendle Quay for Vessa, please?",
            "What does a dog cost on the ferry?",
        ];
        let leaks = find_leaks(&held_out, &train, DEFAULT_THRESHOLD);
        let got: Vec<(usize, usize, LeakKind)> = leaks
            .iter()
            .map(|l| (l.question, l.train, l.kind))
            .collect();
        assert_eq!(
            got,
            vec![
                (0, 3, LeakKind::Exact),
                (1, 1, LeakKind::Normalised),
                (2, 2, LeakKind::Near)
            ]
        );
        // Question 2 has 10 triples; 9 are in the training item (all but "vessa please").
        assert!(
            (leaks[2].containment - 0.9).abs() < 1e-12,
            "{}",
            leaks[2].containment
        );
    }
}

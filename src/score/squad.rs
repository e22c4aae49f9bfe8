//! Exact match and token F1 with the definitions of the SQuAD v1.1 official evaluation script
//! (`evaluate-v1.1.py`, Rajpurkar et al., 2016).
//!
//! **Normalisation** (`normalize_answer` in the script), applied to answer and reference alike,
//! in this order:
//! 1. lower-case (full Unicode lower-casing, as Python's `str.lower`);
//! 2. drop every ASCII punctuation character (Python's `string.punctuation`:
//!    ``!"#$%&'()*+,-./:;<=>?@[\]^_`{|}~``), joining what was on either side ("e-bike" → "ebike");
//! 3. replace the articles "a", "an", "the" with a space when they stand as whole words
//!    (the regular expression `\b(a|an|the)\b`, where a word is a run of Unicode letters, digits
//!    and `_`);
//! 4. collapse whitespace: split on runs of whitespace (Python's `str.split()`) and join with
//!    single spaces.
//!
//! **Exact match** is 1 when the normalised answer equals the normalised reference, else 0.
//! Two texts that both normalise to nothing match (1).
//!
//! **Token F1** treats the normalised texts as bags of tokens. `common` is the size of the
//! multiset intersection (`Counter(answer) & Counter(reference)`: a token counts as many times as
//! it appears in *both*). When `common` is 0 the F1 is 0, which includes the case where either
//! side, or both, has no tokens (v1.1 behaviour: an empty answer against an empty reference
//! scores F1 0 but exact match 1). Otherwise precision = common / |answer tokens|, recall =
//! common / |reference tokens| and F1 = 2·P·R / (P + R).
//!
//! **Several references**: each metric is the maximum over the references, taken separately
//! (`metric_max_over_ground_truths`).

use std::cmp::Ordering;

/// Python's `string.punctuation`: the 32 ASCII punctuation characters.
fn is_ascii_punctuation(c: char) -> bool {
    c.is_ascii_punctuation()
}

/// A character of a regular-expression word (`\w` of Python's `re` on `str`): letters, digits
/// and `_`. Rust's `is_alphanumeric` is the Unicode Alphabetic or Numeric property, which is the
/// same set as Python's `str.isalnum` apart from a few combining marks and symbols carrying the
/// Other_Alphabetic property; it only matters for a character glued to an article.
fn is_word_char(c: char) -> bool {
    c.is_alphanumeric() || c == '_'
}

/// Whitespace as Python's `str.split()` sees it: Unicode White_Space plus the four ASCII
/// information separators U+001C..U+001F that Python also treats as whitespace.
fn is_py_space(c: char) -> bool {
    c.is_whitespace() || ('\u{1c}'..='\u{1f}').contains(&c)
}

fn is_article(word: &str) -> bool {
    matches!(word, "a" | "an" | "the")
}

/// The normalised text of `text` with articles replaced by spaces, not yet split: its
/// whitespace-separated pieces ([`split_tokens`]) are the normalised tokens.
pub fn normalized_buffer(text: &str) -> String {
    if !text.is_ascii() {
        return normalized_buffer_unicode(text);
    }
    // ASCII: one pass that lower-cases, drops punctuation and replaces whole-word articles
    // (a word run is a run of ASCII letters and digits once punctuation, `_` included, is gone).
    let bytes = text.as_bytes();
    let mut out: Vec<u8> = Vec::with_capacity(text.len());
    let mut run_start: Option<usize> = None;
    let end_run = |out: &mut Vec<u8>, run_start: &mut Option<usize>| {
        if let Some(start) = run_start.take() {
            if matches!(&out[start..], b"a" | b"an" | b"the") {
                out.truncate(start);
                out.push(b' ');
            }
        }
    };
    for &b in bytes {
        if b.is_ascii_punctuation() {
            continue;
        }
        if b.is_ascii_alphanumeric() {
            if run_start.is_none() {
                run_start = Some(out.len());
            }
            out.push(b.to_ascii_lowercase());
        } else {
            end_run(&mut out, &mut run_start);
            out.push(b);
        }
    }
    end_run(&mut out, &mut run_start);
    // Only ASCII bytes were pushed.
    String::from_utf8(out).expect("ASCII is UTF-8")
}

fn normalized_buffer_unicode(text: &str) -> String {
    let lowered = text.to_lowercase();
    let no_punct: String = lowered
        .chars()
        .filter(|c| !is_ascii_punctuation(*c))
        .collect();
    remove_articles(&no_punct)
}

/// Replaces every whole-word article with a space. Removing `\b(a|an|the)\b` and then splitting
/// on whitespace is the same as splitting the text into maximal word runs and non-word runs and
/// dropping word runs that are articles.
fn remove_articles(text: &str) -> String {
    let mut out = String::with_capacity(text.len());
    let mut rest = text;
    while let Some(c) = rest.chars().next() {
        let word = is_word_char(c);
        let end = rest
            .char_indices()
            .find(|(_, ch)| is_word_char(*ch) != word)
            .map_or(rest.len(), |(i, _)| i);
        let (run, tail) = rest.split_at(end);
        if word && is_article(run) {
            out.push(' ');
        } else {
            out.push_str(run);
        }
        rest = tail;
    }
    out
}

/// Splits a [`normalized_buffer`] into its tokens (Python's `str.split()`).
pub fn split_tokens(buffer: &str) -> Vec<&str> {
    buffer
        .split(is_py_space)
        .filter(|t| !t.is_empty())
        .collect()
}

/// The normalised tokens of `text` (steps 1-4 above; the normalised text is these tokens joined
/// with single spaces).
pub fn normalize_tokens(text: &str) -> Vec<String> {
    split_tokens(&normalized_buffer(text))
        .into_iter()
        .map(str::to_string)
        .collect()
}

/// The normalised text (`normalize_answer` of the SQuAD v1.1 script).
pub fn normalize(text: &str) -> String {
    normalize_tokens(text).join(" ")
}

/// Exact match of two already normalised token lists.
pub fn exact_match_tokens<S: AsRef<str>>(answer: &[S], reference: &[S]) -> bool {
    answer.len() == reference.len()
        && answer
            .iter()
            .zip(reference)
            .all(|(a, r)| a.as_ref() == r.as_ref())
}

/// Size of the multiset intersection of two token bags (`sum((Counter(a) & Counter(b)).values())`).
pub fn common_token_count<S: AsRef<str>>(answer: &[S], reference: &[S]) -> usize {
    let mut a: Vec<&str> = answer.iter().map(AsRef::as_ref).collect();
    let mut r: Vec<&str> = reference.iter().map(AsRef::as_ref).collect();
    a.sort_unstable();
    r.sort_unstable();
    let (mut i, mut j, mut common) = (0, 0, 0);
    while i < a.len() && j < r.len() {
        match a[i].cmp(r[j]) {
            Ordering::Less => i += 1,
            Ordering::Greater => j += 1,
            Ordering::Equal => {
                common += 1;
                i += 1;
                j += 1;
            }
        }
    }
    common
}

/// Token F1 from the shared-token count and the two lengths (0 when nothing is shared).
pub fn f1_from_counts(common: usize, answer_len: usize, reference_len: usize) -> f64 {
    if common == 0 {
        return 0.0;
    }
    let precision = common as f64 / answer_len as f64;
    let recall = common as f64 / reference_len as f64;
    2.0 * precision * recall / (precision + recall)
}

/// Token F1 of two already normalised token lists (0 when they share no token).
pub fn f1_tokens<S: AsRef<str>>(answer: &[S], reference: &[S]) -> f64 {
    f1_from_counts(
        common_token_count(answer, reference),
        answer.len(),
        reference.len(),
    )
}

/// Exact match of one answer against one reference: 1 or 0.
pub fn exact_match(answer: &str, reference: &str) -> u8 {
    u8::from(exact_match_tokens(
        &normalize_tokens(answer),
        &normalize_tokens(reference),
    ))
}

/// Token F1 of one answer against one reference, in [0, 1].
pub fn token_f1(answer: &str, reference: &str) -> f64 {
    f1_tokens(&normalize_tokens(answer), &normalize_tokens(reference))
}

/// Exact match maximised over the references; `None` when there are no references.
pub fn max_exact_match<S: AsRef<str>>(answer: &str, references: &[S]) -> Option<u8> {
    let a = normalize_tokens(answer);
    references
        .iter()
        .map(|r| u8::from(exact_match_tokens(&a, &normalize_tokens(r.as_ref()))))
        .max()
}

/// Token F1 maximised over the references; `None` when there are no references.
pub fn max_token_f1<S: AsRef<str>>(answer: &str, references: &[S]) -> Option<f64> {
    let a = normalize_tokens(answer);
    references
        .iter()
        .map(|r| f1_tokens(&a, &normalize_tokens(r.as_ref())))
        .reduce(f64::max)
}

#[cfg(test)]
mod tests {
    //! Hand-worked examples following the SQuAD v1.1 official evaluation script
    //! (evaluate-v1.1.py) definitions: `normalize_answer`, `f1_score`, `exact_match_score` and
    //! `metric_max_over_ground_truths`.
    use super::*;

    fn close(a: f64, b: f64) -> bool {
        (a - b).abs() < 1e-12
    }

    #[test]
    fn normalisation_lowercases_drops_punctuation_articles_and_extra_spaces() {
        // SQuAD v1.1 evaluate-v1.1.py normalize_answer: lower, remove_punc, remove_articles,
        // white_space_fix.
        assert_eq!(normalize("The  7:40 Crossing!"), "740 crossing");
        assert_eq!(normalize("An e-bike, a dog & THE cat."), "ebike dog cat");
        // Articles only as whole words: "theatre", "another", "ant" stay.
        assert_eq!(normalize("the theatre, another ant"), "theatre another ant");
        // Punctuation is removed before articles, so "a." and "(the)" are articles.
        assert_eq!(normalize("a. (the) an"), "");
        // An apostrophe joins the word: "isn't" -> "isnt".
        assert_eq!(normalize("It isn't"), "it isnt");
        // Tabs and newlines collapse.
        assert_eq!(normalize("\tGate\n\n 4 "), "gate 4");
        // Non-ASCII punctuation is not in string.punctuation and stays.
        assert_eq!(normalize("«Yes» — free"), "«yes» — free");
    }

    #[test]
    fn normalisation_of_unicode_text() {
        // Python str.lower is full Unicode lower-casing.
        assert_eq!(normalize("ÉTÉ Café"), "été café");
        // "the" followed by a letter outside ASCII is not a whole word (\b is Unicode-aware).
        assert_eq!(normalize("theé the"), "theé");
        // No-break space is whitespace for str.split().
        assert_eq!(normalize("gate\u{a0}4"), "gate 4");
    }

    #[test]
    fn exact_match_examples() {
        // SQuAD v1.1 exact_match_score: normalised strings equal.
        assert_eq!(exact_match("The Saltwren.", "saltwren"), 1);
        assert_eq!(exact_match("SALTWREN", "the saltwren!"), 1);
        assert_eq!(exact_match("Saltwren ferry", "Saltwren"), 0);
        assert_eq!(exact_match("", ""), 1);
        assert_eq!(exact_match("!!!", "the"), 1); // both normalise to ""
        assert_eq!(exact_match("", "Saltwren"), 0);
    }

    #[test]
    fn f1_examples() {
        // SQuAD v1.1 f1_score, worked by hand.
        // answer "bikes ride free" (3), reference "yes bikes ride free on every crossing" (7):
        // common 3, P = 1, R = 3/7, F1 = 2*(3/7)/(10/7) = 0.6.
        assert!(close(
            token_f1(
                "Bikes ride free.",
                "Yes, bikes ride free on every crossing."
            ),
            0.6
        ));
        // Identical after normalisation.
        assert!(close(token_f1("The 7:40 crossing", "7:40 crossing"), 1.0));
        // No common token.
        assert_eq!(token_f1("no", "yes"), 0.0);
        // Repeated tokens: Counter intersection counts min multiplicity.
        // answer "free free free" vs reference "free ride": common 1, P = 1/3, R = 1/2,
        // F1 = 2*(1/6)/(5/6) = 0.4.
        assert!(close(token_f1("free free free", "free ride"), 0.4));
        // answer "gate 4 gate" vs "gate gate 5": common 2, P = 2/3, R = 2/3, F1 = 2/3.
        assert!(close(token_f1("gate 4 gate", "gate gate 5"), 2.0 / 3.0));
        // Casing and articles do not matter: "A dog" vs "the DOG" -> ["dog"] both.
        assert!(close(token_f1("A dog", "the DOG"), 1.0));
    }

    #[test]
    fn empty_strings_follow_v1_1() {
        // v1.1: num_same == 0 returns 0, even when both sides are empty.
        assert_eq!(token_f1("", ""), 0.0);
        assert_eq!(token_f1("", "yes"), 0.0);
        assert_eq!(token_f1("yes", ""), 0.0);
        assert_eq!(token_f1("...", "?!"), 0.0);
        assert_eq!(exact_match("...", "?!"), 1);
    }

    #[test]
    fn several_references_take_the_maximum_of_each_metric() {
        // metric_max_over_ground_truths, applied to each metric separately.
        let refs = ["Bikes ride free.", "Yes, bikes are free on every crossing."];
        assert_eq!(max_exact_match("bikes ride free", &refs), Some(1));
        assert_eq!(max_token_f1("bikes ride free", &refs), Some(1.0));
        // answer "bikes are free": ref1 common 2 (bikes, free), P 2/3, R 2/3 -> 2/3;
        // ref2 "yes bikes are free on every crossing" common 3, P 1, R 3/7 -> 0.6. Max 2/3.
        let f1 = max_token_f1("Bikes are free", &refs).unwrap();
        assert!(close(f1, 2.0 / 3.0), "{f1}");
        assert_eq!(max_exact_match("Bikes are free", &refs), Some(0));
        let none: [&str; 0] = [];
        assert_eq!(max_exact_match("x", &none), None);
        assert_eq!(max_token_f1("x", &none), None);
    }

    #[test]
    fn ascii_fast_path_equals_the_general_path() {
        for text in [
            "The  7:40 Crossing!",
            "a\u{1}the\u{7f}an x_the the_ a-n",
            "THE.THE,the;A",
            "",
            "   ",
            "snake_case and\tthe\nend",
        ] {
            assert_eq!(
                normalized_buffer(text),
                normalized_buffer_unicode(text),
                "{text:?}"
            );
        }
    }

    #[test]
    fn common_count_is_multiset_intersection() {
        let a = ["x", "y", "x", "z"];
        let b = ["x", "x", "x", "y"];
        assert_eq!(common_token_count(&a, &b), 3);
        let empty: [&str; 0] = [];
        assert_eq!(common_token_count(&a, &empty), 0);
    }
}

//! Unit tests of `refusal`.
use super::*;

fn words(text: &str) -> Vec<String> {
    tokenize(text)
        .into_iter()
        .map(|(t, _)| match t {
            Tok::Word(w) => w.into_owned(),
            Tok::End => ".".to_string(),
        })
        .collect()
}

#[test]
fn normalisation_expands_contractions_and_apostrophes() {
    assert_eq!(
        words("I’m sorry, I CAN'T."),
        ["i", "am", "sorry", "i", "can", "not", "."]
    );
    assert_eq!(
        words("I cannot; I can not"),
        ["i", "can", "not", "i", "can", "not", "."]
    );
    assert_eq!(
        words("We don't, it's"),
        ["we", "do", "not", "it", "is", "."]
    );
    assert_eq!(words("I really can’t"), ["i", "can", "not", "."]);
    // A decimal point is not a sentence end; the ferry's possessive loses its apostrophe.
    assert_eq!(
        words("the ferry's 7.40 run"),
        ["the", "ferrys", "7", "40", "run", "."]
    );
    assert_eq!(words(""), Vec::<String>::new());
    assert_eq!(words("...!?"), Vec::<String>::new());
}

#[test]
fn plain_refusals() {
    let d = RefusalDetector::default();
    for a in [
        "I'm sorry, but I can't help with that.",
        "I cannot help with that request.",
        "Sorry, I can’t assist with that.",
        "Sorry, I can't.",
        "I don't have information about the weather on Saturday.",
        "I can only help with questions about the ferry cooperative.",
        "Hello! Thanks for your question. Unfortunately, I am unable to answer that.",
    ] {
        assert!(d.is_refusal(a), "{a}");
    }
}

#[test]
fn sorry_alone_and_rules_are_not_refusals() {
    let d = RefusalDetector::default();
    for a in [
        "",
        "Sorry for the wait: the 7:40 crossing runs daily.",
        "You cannot bring a gas canister into the lounge.",
        "We cannot refund saver fares.",
        "The 7:40 runs daily, but I can't promise a seat.",
        "Bikes ride free. I'm sorry the website was unclear.",
    ] {
        assert!(!d.is_refusal(a), "{a}");
    }
}

#[test]
fn hedged_answers_are_not_refusals_but_redirects_are() {
    let d = RefusalDetector::default();
    assert!(!d.is_refusal("I can't say for sure, but the morning sailings usually fill first."));
    assert!(d.is_refusal("I can't help with that, but please contact the harbour office."));
    assert!(d.is_refusal("I can't predict the weather, but you can check the forecast."));
    // Too short to be an answer.
    assert!(d.is_refusal("I can't say, but maybe."));
}

#[test]
fn phrases_beyond_the_opening() {
    let d = RefusalDetector::default();
    let long_intro = "Thank you for getting in touch with the ferry cooperative about your \
        plans for the long weekend on the islands; we always like hearing from travellers who \
        are planning a trip across the sound in the spring. ";
    assert!(long_intro.chars().count() > OPENING_CHARS);
    // An opening phrase after the opening does not count ...
    assert!(!d.is_refusal(&format!("{long_intro}I can't say whether it will rain.")));
    // ... an anywhere phrase does.
    assert!(d.is_refusal(&format!(
        "{long_intro}I can only help with ferry questions."
    )));
}

#[test]
fn extra_phrases_extend_the_list() {
    let extra = vec![
        "Please call the harbour office".to_string(),
        "not * my department".to_string(),
        "  ".to_string(),
    ];
    let d = RefusalDetector::with_extra_phrases(&extra);
    let plain = RefusalDetector::default();
    let a = "Please CALL the harbour office.";
    assert!(d.is_refusal(a));
    assert!(!plain.is_refusal(a));
    assert!(d.is_refusal("That is not really my department."));
    assert!(!d.is_refusal("Bikes ride free."));
}

#[test]
fn gaps_stay_inside_one_sentence() {
    let d = RefusalDetector::with_extra_phrases(&["alpha * omega".to_string()]);
    assert!(d.is_refusal("alpha one two omega"));
    assert!(!d.is_refusal("alpha one. two omega"));
    assert!(!d.is_refusal("alpha 1 2 3 4 5 6 7 omega"));
}

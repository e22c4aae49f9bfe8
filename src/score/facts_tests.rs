//! The extractor against hand-written cases, each with the facts a careful reader finds in it
//! (the references are from eval-sets/ferry-faq.jsonl; the answers are invented), and the
//! scores of hand-worked answer/reference pairs.

use super::*;

/// (text, expected facts as "kind value"). The value is the canonical form: 24-hour clock,
/// currency code and two decimals, "day Month", lower-case weekday, durations in min/h/d on one
/// scale and months (mo) on another, measures in kg/g, m/mm, l/ml.
const CASES: &[(&str, &[&str])] = &[
    // Clock times, every way the same time is written.
    ("The first winter departure from Wendle Quay to Vessa is at 07:20.", &["clock 07:20"]),
    ("It leaves at 7:20 am.", &["clock 07:20"]),
    ("It leaves at 7.20 a.m.", &["clock 07:20"]),
    ("Departure 7:20AM", &["clock 07:20"]),
    ("The last boat is at 8:40 pm.", &["clock 20:40"]),
    ("The last boat is at 8.40 p.m.", &["clock 20:40"]),
    ("Boats leave at 7 pm and 12 am.", &["clock 19:00", "clock 00:00"]),
    ("It sails at nine o'clock.", &["clock 09:00"]),
    ("The office shuts at noon and reopens at 2pm.", &["clock 12:00", "clock 14:00"]),
    (
        "In summer, boats leave Wendle Quay for Little Korrin at 07:40, 11:00 and 16:20.",
        &["clock 07:40", "clock 11:00", "clock 16:20"],
    ),
    ("Sailings run until midnight.", &["clock 00:00"]),
    // Prices and currencies.
    ("An adult single between Wendle Quay and Vessa costs 9.50 euros.", &["price EUR 9.50"]),
    ("It is €9.50 for an adult single.", &["price EUR 9.50"]),
    ("It is 9,50 € for an adult single.", &["price EUR 9.50"]),
    ("An adult single is EUR 9.5.", &["price EUR 9.50"]),
    ("A return costs 11 euros.", &["price EUR 11.00"]),
    ("Tickets bought on board cost 1.00 euro more than the listed fare.", &["price EUR 1.00"]),
    ("A season pass is £1,200 or $1,450.50.", &["price GBP 1200.00", "price USD 1450.50"]),
    ("Children under 5 travel free.", &["age 5", "price free"]),
    ("That is 0.00 euros.", &["price free"]),
    ("Feel free to ask the crew; the island is car-free.", &[]),
    // Dates and weekdays.
    ("The summer timetable runs from 1 May to 30 September.", &["date 1 May", "date 30 September"]),
    ("It starts on May 1st, 2025 and ends on the 30th of Sept.", &["date 1 May", "date 30 September"]),
    (
        "In summer the hopper runs on Tuesdays, Thursdays and Saturdays, 09:00 from Vessa Pier.",
        &["weekday tuesday", "weekday thursday", "weekday saturday", "clock 09:00"],
    ),
    ("Open Monday to Friday.", &["weekday monday", "weekday friday"]),
    // Durations on one scale.
    ("The crossing between Wendle Quay and Vessa takes 40 minutes.", &["duration 40 min"]),
    ("The crossing takes forty minutes.", &["duration 40 min"]),
    ("It takes an hour.", &["duration 1 h"]),
    ("It takes 60 mins, or half an hour by the fast boat.", &["duration 1 h", "duration 30 min"]),
    ("It takes 1.5 hours.", &["duration 90 min"]),
    ("Book at least 48 hours ahead.", &["duration 2 d"]),
    ("Book at least 2 days ahead.", &["duration 2 d"]),
    ("Refunds up to 24 hours before departure.", &["duration 1 d"]),
    ("The card is valid for 12 months.", &["duration 12 mo"]),
    ("The card is valid for 1 year.", &["duration 12 mo"]),
    ("The resident card is valid for 3 years.", &["duration 36 mo"]),
    ("Refunds are paid within 10 working days.", &["duration 10 working d"]),
    // Percentages.
    ("Students get 20% off.", &["percent 20"]),
    ("Students get 20 percent off, or 12.5 per cent in winter.", &["percent 20", "percent 12.5"]),
    // Ages.
    ("A child aged 5 to 15 costs 4.75 euros.", &["age 5", "age 15", "price EUR 4.75"]),
    ("Seniors aged 67 or over pay less.", &["age 67"]),
    ("My son is 12 years old.", &["age 12"]),
    ("A 5-year-old travels free.", &["age 5", "price free"]),
    ("Ages 5-15 pay half.", &["age 5", "age 15"]),
    // Measures.
    ("Each bag may weigh at most 25 kg.", &["measure 25 kg"]),
    ("Cartridges under 500 g are allowed.", &["measure 500 g"]),
    ("Cars up to 5 metres, vans up to 7 m.", &["measure 5 m", "measure 7 m"]),
    ("A 2.5 m kayak.", &["measure 2500 mm"]),
    // Phone numbers.
    ("Call 0800 555 0142, every day from 07:00 to 19:00.", &["phone 08005550142", "clock 07:00", "clock 19:00"]),
    ("Call +44 20-7946-0958.", &["phone 442079460958"]),
    // Counts, and numbers that are not facts.
    (
        "Each boat takes at most 12 bicycles per sailing, and MV Little Skerl takes 4.",
        &["count 12", "count 4"],
    ),
    (
        "There are 2 wheelchair spaces on MV Saltmarrow, 1 on MV Periwink and none on MV Little Skerl.",
        &["count 2", "count 1"],
    ),
    ("A family return for two adults and three children.", &["count 2", "count 3"]),
    ("The 10-trip card gives ten single journeys.", &["count 10"]),
    ("Only one boat runs; one of the crew will help.", &[]),
    ("Since 2019 the route has been run by the cooperative.", &[]),
    ("Email help@tidewren.example; replies come within 2 working days.", &["duration 2 working d"]),
    // Nothing to check, and edge cases.
    ("", &[]),
    ("Speak to any crew member.", &[]),
    ("ÉTÉ: départ à 07:20 !", &["clock 07:20"]),
    ("Version 1.2.3 of the timetable.", &[]),
];

#[test]
fn extractor_finds_the_hand_written_facts() {
    let mut failures = Vec::new();
    for (text, want) in CASES {
        let got: BTreeSet<String> = extract(text).iter().map(Fact::to_string).collect();
        let want: BTreeSet<String> = want.iter().map(|s| s.to_string()).collect();
        if got != want {
            failures.push(format!("{text:?}\n  expected {want:?}\n  got      {got:?}"));
        }
    }
    assert!(failures.is_empty(), "{}", failures.join("\n"));
}

#[test]
fn a_wrong_time_is_a_contradiction_that_overlap_scores_miss() {
    let refs = [
        "The first winter departure from Wendle Quay to Vessa is at 07:20.",
        "07:20",
    ];
    let q = "In December, when is the earliest boat leaving Wendle Quay for Vessa?";
    let wrong = "The first winter departure from Wendle Quay to Vessa is at 08:15.";
    let s = score_facts(wrong, &refs, q).unwrap();
    assert_eq!(s.recall, 0.0);
    assert!(s.contradiction);
    // The overlap scores call it nearly right.
    let overlap = crate::score::score_references(wrong, &refs).unwrap();
    assert!(
        overlap.token_f1 > 0.8 && overlap.rouge_l > 0.8,
        "{overlap:?}"
    );

    let right = "It's at 7.20 am.";
    let s = score_facts(right, &refs, q).unwrap();
    assert_eq!(s.recall, 1.0);
    assert!(!s.contradiction);
}

#[test]
fn recall_is_the_best_share_over_the_references() {
    let refs = [
        "In summer the hopper runs on Tuesdays, Thursdays and Saturdays, 09:00 from Vessa Pier and 14:30 from Ostry Landing.",
        "Tuesdays, Thursdays and Saturdays",
    ];
    // Two of five facts of the first reference, two of three of the second: 2/3.
    let s = score_facts("It goes on Tuesdays and Saturdays.", &refs, "").unwrap();
    assert!((s.recall - 2.0 / 3.0).abs() < 1e-12);
    assert!(!s.contradiction);
    // A weekday no reference gives is a contradiction.
    let s = score_facts("Tuesdays, Thursdays and Sundays.", &refs, "").unwrap();
    assert!((s.recall - 2.0 / 3.0).abs() < 1e-12);
    assert!(s.contradiction);
}

#[test]
fn contradictions_need_a_kind_the_references_state() {
    let refs = ["The crossing between Wendle Quay and Vessa takes 40 minutes."];
    // A clock time where the reference gives only a duration: not a contradiction.
    let s = score_facts("It takes 40 minutes; the next one is at 10:15.", &refs, "").unwrap();
    assert_eq!(s.recall, 1.0);
    assert!(!s.contradiction);
    // Another duration is.
    let s = score_facts("About an hour.", &refs, "").unwrap();
    assert_eq!(s.recall, 0.0);
    assert!(s.contradiction);
    // Facts the question states may be repeated.
    let q = "Is the 08:15 the first one?";
    let r = ["The first departure is at 07:20."];
    let s = score_facts("No, the 08:15 is not; the first is at 07:20.", &r, q).unwrap();
    assert_eq!(s.recall, 1.0);
    assert!(!s.contradiction);
}

#[test]
fn free_against_a_price_and_prices_in_other_notation() {
    let refs = ["Children under 5 travel free."];
    let s = score_facts("Children under 5 pay 2.00 euros.", &refs, "").unwrap();
    assert_eq!(s.recall, 0.5);
    assert!(s.contradiction);
    let refs = ["An adult single between Wendle Quay and Vessa costs 9.50 euros."];
    let s = score_facts("€9.50.", &refs, "").unwrap();
    assert_eq!(s.recall, 1.0);
    assert!(!s.contradiction);
    let s = score_facts("EUR 9.05", &refs, "").unwrap();
    assert!(s.contradiction);
}

#[test]
fn no_facts_in_the_references_means_no_score() {
    assert_eq!(
        score_facts("Yes.", &["Speak to any crew member."], ""),
        None
    );
    assert_eq!(score_facts("Yes.", &["", " "], ""), None);
    let none: [&str; 0] = [];
    assert_eq!(score_facts("At 07:20.", &none, ""), None);
    // An empty answer states nothing: recall 0, no contradiction.
    let s = score_facts("", &["At 07:20."], "").unwrap();
    assert_eq!(s.recall, 0.0);
    assert!(!s.contradiction);
}

#[test]
fn repeated_facts_count_once() {
    let s = score_facts("07:20, 07:20 and 7.20 am", &["07:20 and 10:15"], "").unwrap();
    assert_eq!(s.recall, 0.5);
    assert!(!s.contradiction);
}

#[test]
fn every_reference_of_the_demo_set_is_read_without_surprises() {
    // Each reference of the demo set that states a number yields at least one fact;
    // this catches a reference format the extractor silently skips.
    let text = std::fs::read_to_string(concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/eval-sets/ferry-faq.jsonl"
    ))
    .unwrap();
    let mut skipped = Vec::new();
    // Digits only in a name ("10-trip card") are no fact, by design.
    let names = regex::Regex::new(r"\d+-[a-z]").unwrap();
    for line in text.lines() {
        let row: serde_json::Value = serde_json::from_str(line).unwrap();
        for r in row["references"].as_array().unwrap() {
            let r = r.as_str().unwrap();
            let has_digit = names.replace_all(r, "").chars().any(|c| c.is_ascii_digit());
            if has_digit && extract(r).is_empty() {
                skipped.push(r.to_string());
            }
        }
    }
    assert!(
        skipped.is_empty(),
        "references with digits but no fact: {skipped:#?}"
    );
}

#[test]
fn words_outside_the_list_start_no_fact() {
    // `fact_at` passes over a word not in `may_start_fact`; every rule tried on such a word
    // must find nothing either, in any of these contexts (each one a context some rule reads
    // after a word: a number, a unit, an hour, a hyphen, a day of the month, a currency).
    let mut words: BTreeSet<String> = BTreeSet::new();
    let tables = [
        &WEEKDAYS[..],
        &MONTHS[..],
        &UNITS[..],
        &TENS[..],
        &CHILD_WORDS[..],
    ];
    for w in tables.into_iter().flatten() {
        words.insert(w.to_string());
        words.insert(format!("{w}s"));
        for n in 1..w.len() {
            words.insert(w[..n].to_string());
        }
    }
    let demo = std::fs::read_to_string(concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/eval-sets/ferry-faq.jsonl"
    ))
    .unwrap();
    let texts = CASES.iter().map(|(t, _)| t.to_string()).chain([demo]);
    for text in texts {
        let lowered = normalise(&text);
        for t in tokenize(&lowered) {
            if let Tok::Word(w) = t.tok {
                words.insert(w.to_string());
            }
        }
    }
    let contexts = [
        "",
        " 5",
        " 5 pm",
        " 1st",
        " 12 of may",
        " under 5",
        " an hour",
        "-five",
        " 9.50",
        " euros",
        " hour",
        " 10%",
    ];
    let mut checked = 0;
    for w in words.iter().filter(|w| !may_start_fact(w)) {
        for c in contexts {
            let text = format!("{w}{c}");
            let toks = tokenize(&text);
            assert!(
                fact_at_any(&toks, 0).is_none(),
                "{text:?} starts a fact but {w:?} is not in may_start_fact"
            );
            checked += 1;
        }
    }
    assert!(checked > 1000, "only {checked} cases");
}

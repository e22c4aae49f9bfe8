//! User text made inert for the HTML page and its SVG charts: one escaping function both use.

/// Makes text inert in HTML text and in quoted attribute values (both `"` and `'`):
///
/// - `& < > " '` become character references, so no tag, entity or attribute can open;
/// - line breaks (`\r\n`, `\r`, U+0085, U+2028, U+2029) become `\n` (shown as breaks where the
///   page asks for it with `white-space: pre-wrap`), a tab stays a tab;
/// - other control characters and the Unicode bidirectional and zero-width format characters
///   become U+FFFD, so they can neither reorder nor hide text.
pub fn escape(text: &str) -> String {
    let mut out = String::with_capacity(text.len() + 16);
    let mut iter = text.chars().peekable();
    while let Some(c) = iter.next() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            '\r' => {
                if iter.peek() != Some(&'\n') {
                    out.push('\n');
                }
            }
            '\n' | '\t' => out.push(c),
            '\u{85}' | '\u{2028}' | '\u{2029}' => out.push('\n'),
            c if c.is_control() || is_format_char(c) => out.push('\u{FFFD}'),
            c => out.push(c),
        }
    }
    out
}

/// Zero-width and bidirectional formatting characters (Unicode category Cf, the ones that can
/// hide or reorder text: embeddings, overrides, isolates, marks, joiners, the BOM, interlinear
/// annotation).
fn is_format_char(c: char) -> bool {
    matches!(c as u32,
        0x00AD | 0x061C | 0x180E | 0x200B..=0x200F | 0x202A..=0x202E | 0x2060..=0x2064
        | 0x2066..=0x206F | 0xFEFF | 0xFFF9..=0xFFFB)
}

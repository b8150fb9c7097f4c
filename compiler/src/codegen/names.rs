//! Rust identifiers from arbitrary layer names.
//!
//! Layer names come from a user-supplied graph file and may contain anything
//! (quotes, `*/`, newlines, keywords, non-ASCII). They only ever reach the
//! generated module in two forms:
//!
//! * identifiers built by [`Namer`]: `[A-Z0-9_]` only, behind a fixed kind
//!   prefix, deduplicated, so they can neither be keywords nor collide with
//!   the module's fixed items;
//! * string literals and `#[doc = ...]` attributes built by `quote`, which
//!   escape their contents, after [`for_doc`] removed control characters.

use std::collections::HashSet;

/// Longest sanitized stem kept from a layer name.
const MAX_STEM: usize = 40;

/// The `[A-Z0-9_]` stem of a name: other characters become `_`, runs of `_`
/// collapse, the result is upper case, at most [`MAX_STEM`] characters, and
/// never empty (`X`).
pub fn stem(name: &str) -> String {
    let mut s = String::new();
    for ch in name.chars() {
        let c = if ch.is_ascii_alphanumeric() {
            ch.to_ascii_uppercase()
        } else {
            '_'
        };
        if c == '_' && (s.is_empty() || s.ends_with('_')) {
            continue;
        }
        s.push(c);
        if s.len() >= MAX_STEM {
            break;
        }
    }
    while s.ends_with('_') {
        s.pop();
    }
    if s.is_empty() {
        s.push('X');
    }
    s
}

/// Hands out one unique stem per layer, in order: a repeated stem gets
/// `_2`, `_3`, ... appended.
#[derive(Debug, Default)]
pub struct Namer {
    used: HashSet<String>,
}

impl Namer {
    /// A unique stem for `name`.
    pub fn unique(&mut self, name: &str) -> String {
        let base = stem(name);
        let mut s = base.clone();
        let mut k = 2;
        while !self.used.insert(s.clone()) {
            s = format!("{base}_{k}");
            k += 1;
        }
        s
    }
}

/// A name made safe and readable for documentation: control characters
/// (newlines included) are escaped as `\n`, `\u{..}`, and so is every
/// other character that does not print ([`is_hidden`]: bidi overrides,
/// zero-width and other format characters, separators other than the
/// space, private-use and unassigned code points), which rustc refuses in
/// comments or which would make the text read differently from what it
/// holds. The Markdown table separator `|` and backtick are replaced. The
/// result still goes through a `quote` string literal.
pub fn for_doc(name: &str) -> String {
    let mut s = String::new();
    for ch in name.chars() {
        match ch {
            '|' => s.push('¦'),
            '`' => s.push('\''),
            c if c.is_control() => s.extend(c.escape_default()),
            c if is_hidden(c) => s.extend(c.escape_unicode()),
            c => s.push(c),
        }
    }
    s
}

/// Whether `c` does not print as itself: Unicode general categories Cc,
/// Cf, Cs, Co, Cn, Zl, Zp, and Zs other than the ASCII space. These are the
/// categories `char::escape_debug` (and so a `quote` string literal)
/// escapes as well, so docs and literals agree.
pub fn is_hidden(c: char) -> bool {
    use unicode_properties::{GeneralCategory as G, UnicodeGeneralCategory};
    c != ' '
        && matches!(
            c.general_category(),
            G::Control
                | G::Format
                | G::Surrogate
                | G::PrivateUse
                | G::Unassigned
                | G::LineSeparator
                | G::ParagraphSeparator
                | G::SpaceSeparator
        )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn stems_are_plain_identifiers() {
        for n in [
            "\"; panic!()",
            "r#fn",
            "*/",
            "a\nb",
            "größe",
            "",
            "__",
            "fn",
            "Self",
            "0abc",
        ] {
            let s = stem(n);
            assert!(!s.is_empty());
            assert!(
                s.chars()
                    .all(|c| c.is_ascii_uppercase() || c.is_ascii_digit() || c == '_'),
                "{s}"
            );
        }
        assert_eq!(stem("conv1.weight"), "CONV1_WEIGHT");
        assert_eq!(stem("r#fn"), "R_FN");
        assert_eq!(stem("*/"), "X");
    }

    #[test]
    fn namer_deduplicates() {
        let mut n = Namer::default();
        assert_eq!(n.unique("a.b"), "A_B");
        assert_eq!(n.unique("a-b"), "A_B_2");
        assert_eq!(n.unique("a b"), "A_B_3");
        assert_eq!(n.unique("A_B_2"), "A_B_2_2");
    }

    /// Issue 14, defect 6. The code points are those rustc's
    /// `text_direction_codepoint_in_comment` lint names (U+202A..U+202E,
    /// U+2066..U+2069), plus zero-width and separator characters (Unicode
    /// general categories Cf, Zl, Zp, Zs; Unicode Standard, chapter 4).
    #[test]
    fn doc_names_escape_bidi_and_invisible_characters() {
        for c in ('\u{202a}'..='\u{202e}')
            .chain('\u{2066}'..='\u{2069}')
            .chain([
                '\u{200b}', '\u{200e}', '\u{200f}', '\u{feff}', '\u{2028}', '\u{a0}', '\u{e000}',
            ])
        {
            let d = for_doc(&format!("a{c}b"));
            assert!(!d.contains(c), "U+{:04X} left in {d:?}", c as u32);
            assert_eq!(d, format!("a\\u{{{:x}}}b", c as u32));
            // A string literal escapes the same characters.
            assert!(
                format!("{:?}", c.to_string()).contains("\\u{"),
                "U+{:04X}",
                c as u32
            );
        }
        assert_eq!(for_doc("größe λ→ünï"), "größe λ→ünï");
    }

    #[test]
    fn doc_names_have_no_line_breaks() {
        let d = for_doc("x\n*/\r|`y");
        assert!(!d.contains('\n') && !d.contains('\r') && !d.contains('|') && !d.contains('`'));
        assert!(d.contains("*/"));
    }
}

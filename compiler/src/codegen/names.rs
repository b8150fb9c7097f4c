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
/// (newlines included) are escaped as `\n`, `\u{..}`, and the Markdown
/// table separator `|` and backtick are replaced. The result still goes
/// through a `quote` string literal.
pub fn for_doc(name: &str) -> String {
    let mut s = String::new();
    for ch in name.chars() {
        match ch {
            '|' => s.push('¦'),
            '`' => s.push('\''),
            c if c.is_control() => s.extend(c.escape_default()),
            c => s.push(c),
        }
    }
    s
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

    #[test]
    fn doc_names_have_no_line_breaks() {
        let d = for_doc("x\n*/\r|`y");
        assert!(!d.contains('\n') && !d.contains('\r') && !d.contains('|') && !d.contains('`'));
        assert!(d.contains("*/"));
    }
}

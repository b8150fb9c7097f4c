//! `ingot_rt::Error` reads as a sentence and is a `core::error::Error`, so
//! callers can box it or print it with `{}`.

use ingot_rt::Error;

#[test]
fn every_error_says_what_is_wrong() {
    let all = [
        Error::MapOutOfBounds,
        Error::ShapeMismatch,
        Error::BufferTooSmall,
        Error::BadParams,
        Error::Overlap,
    ];
    let texts: Vec<String> = all.iter().map(|e| e.to_string()).collect();
    for (e, t) in all.iter().zip(&texts) {
        assert_eq!(t, e.message());
        assert!(!t.is_empty() && !t.ends_with('.'), "{t}");
    }
    // Each text is distinct, so a message names one cause.
    for (i, a) in texts.iter().enumerate() {
        assert!(texts[i + 1..].iter().all(|b| b != a), "{a}");
    }
    let boxed: Box<dyn std::error::Error> = Box::new(Error::Overlap);
    assert_eq!(boxed.to_string(), "the output shares bytes with an input");
}

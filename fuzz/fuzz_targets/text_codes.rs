//! Cleaning under every normalisation (with and without dropped words), Soundex and NYSIIS on
//! any text: never a panic; Soundex is empty or a capital letter and three digits; NYSIIS is
//! capital ASCII letters; cleaning is idempotent for the name and code forms.
#![no_main]

use dovetail::config::Normalize;
use dovetail::text::{clean, fold, nysiis, soundex};
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    let Ok(s) = std::str::from_utf8(data) else {
        return;
    };
    let (value, drop) = s.split_once('\u{1}').unwrap_or((s, ""));
    let drop: Vec<String> = drop.split('\u{1}').map(str::to_string).collect();
    for how in [
        Normalize::None,
        Normalize::Digits,
        Normalize::Code,
        Normalize::Text,
        Normalize::Name,
    ] {
        let once = clean(value, how, &[]);
        let _ = clean(value, how, &drop);
        if matches!(how, Normalize::Digits) {
            assert!(
                once.bytes().all(|b| b.is_ascii_digit()),
                "{value:?} -> {once:?}"
            );
        }
        if matches!(how, Normalize::Text | Normalize::Name) {
            assert!(
                !once.starts_with(' ') && !once.ends_with(' '),
                "{value:?} -> {once:?}"
            );
            assert!(!once.contains("  "), "{value:?} -> {once:?}");
        }
    }
    let _ = fold(value);
    let sx = soundex(value);
    if !sx.is_empty() {
        let b = sx.as_bytes();
        assert_eq!(b.len(), 4, "{value:?} -> {sx:?}");
        assert!(b[0].is_ascii_uppercase(), "{value:?} -> {sx:?}");
        assert!(b[1..].iter().all(u8::is_ascii_digit), "{value:?} -> {sx:?}");
    }
    let ny = nysiis(value);
    assert!(
        ny.bytes().all(|b| b.is_ascii_uppercase()),
        "{value:?} -> {ny:?}"
    );
    assert_eq!(ny.is_empty(), sx.is_empty(), "{value:?}: {sx:?} / {ny:?}");
});

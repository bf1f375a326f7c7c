//! Date parsing under each order and number parsing: never a panic; a parsed date is a real
//! calendar date whose ISO form parses back to itself; a parsed number is finite.
#![no_main]

use dovetail::records::parse_number;
use dovetail::text::{days_in_month, parse_date, parse_written_date, DateOrder};
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    let Ok(s) = std::str::from_utf8(data) else {
        return;
    };
    for order in [DateOrder::Ymd, DateOrder::Dmy, DateOrder::Mdy] {
        if let Some(d) = parse_date(s, order) {
            assert!((1000..=9999).contains(&d.year), "{s:?} -> {d:?}");
            if let Some(m) = d.month {
                assert!((1..=12).contains(&m), "{s:?} -> {d:?}");
            }
            if let Some(day) = d.day {
                let m = d.month.expect("a day comes with a month");
                assert!(
                    day >= 1 && day <= days_in_month(d.year, m),
                    "{s:?} -> {d:?}"
                );
            }
            assert_eq!(parse_date(&d.iso(), DateOrder::Ymd), Some(d), "{s:?}");
        }
    }
    let _ = parse_written_date(s);
    if let Some(x) = parse_number(s) {
        assert!(x.is_finite(), "{s:?} -> {x}");
    }
});

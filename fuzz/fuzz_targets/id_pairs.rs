//! The known-pairs reader (`read_id_pairs`, used by `score` and known links): never a panic;
//! every pair has a line after the header, lines rise; an error prints as one line naming
//! the file.
#![no_main]

use dovetail::io::read_id_pairs_from;
use libfuzzer_sys::fuzz_target;
use std::path::Path;

fuzz_target!(|data: &[u8]| {
    match read_id_pairs_from(data, Path::new("k.csv")) {
        Ok(pairs) => {
            assert!(
                pairs.iter().all(|p| p.2 >= 2),
                "rows start after the header"
            );
            assert!(pairs.windows(2).all(|w| w[0].2 < w[1].2), "lines rise");
            assert!(pairs.iter().all(|p| p.0.trim() == p.0 && p.1.trim() == p.1));
        }
        Err(e) => {
            let shown = e.to_string();
            assert!(!shown.contains('\n'), "one line: {shown:?}");
            assert!(shown.starts_with("k.csv: "), "names the file: {shown:?}");
        }
    }
});

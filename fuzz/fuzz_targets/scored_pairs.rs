//! The scored-pairs reader of `dovetail match`: never a panic; pairs read have ids in range,
//! finite weights and no repeated pair; an error prints as one line naming the file.
#![no_main]

use dovetail::io::read_scored_pairs_from;
use libfuzzer_sys::fuzz_target;
use std::collections::HashSet;
use std::path::Path;

fuzz_target!(|data: &[u8]| {
    match read_scored_pairs_from(data, Path::new("p.csv")) {
        Ok(p) => {
            assert_eq!(p.left.len(), p.right.len());
            assert_eq!(p.left.len(), p.weight.len());
            assert!(p.left.iter().all(|&i| (i as usize) < p.left_ids.len()));
            assert!(p.right.iter().all(|&j| (j as usize) < p.right_ids.len()));
            assert!(p.weight.iter().all(|w| w.is_finite()));
            assert!(p
                .left_ids
                .iter()
                .chain(&p.right_ids)
                .all(|id| !id.is_empty()));
            let pairs: HashSet<(u32, u32)> = p
                .left
                .iter()
                .copied()
                .zip(p.right.iter().copied())
                .collect();
            assert_eq!(pairs.len(), p.left.len(), "a repeated pair was accepted");
        }
        Err(e) => {
            let shown = e.to_string();
            assert!(!shown.contains('\n'), "one line: {shown:?}");
            assert!(shown.starts_with("p.csv: "), "names the file: {shown:?}");
        }
    }
});

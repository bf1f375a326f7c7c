//! The config parser on any text: never a panic (nor a stack overflow); an error prints as
//! one line.
#![no_main]

use dovetail::config::Config;
use libfuzzer_sys::fuzz_target;
use std::path::Path;

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    match Config::from_text(text, Path::new("/base")) {
        Ok(cfg) => {
            // A config that loads has its passes well formed or a clear error for them.
            if let Err(e) = cfg.passes() {
                assert!(!e.to_string().contains('\n'));
            }
        }
        Err(e) => {
            let shown = e.to_string();
            assert!(!shown.contains('\n'), "one line: {shown:?}");
        }
    }
});

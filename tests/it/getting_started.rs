//! What a new user meets first: the bundled demo, the README's commands, the commented
//! example config, the CI script.

use super::common::*;

#[test]
fn the_demo_warns_about_nothing_of_its_own_design() {
    // The README's first command runs this config; a warning to drop one of its own
    // fields would undermine the user's trust in everything after it.
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("out");
    let o = run_link(&root().join("config-examples/sample.toml"), &out, &[]);
    assert!(o.status.success(), "{}", stderr(&o));
    assert!(!stderr(&o).contains("warning"), "{}", stderr(&o));
    let summary: serde_json::Value =
        serde_json::from_slice(&std::fs::read(out.join("summary.json")).unwrap()).unwrap();
    assert_eq!(summary["warnings"].as_array().map(Vec::len), Some(0));
}

#[test]
fn ci_script_works_with_any_target_dir() {
    // CARGO_TARGET_DIR may move the build anywhere: the CI script must not write into a
    // fixed `target/` path.
    let text = std::fs::read_to_string(root().join(".ci/run")).unwrap();
    for line in text.lines().filter(|l| !l.trim_start().starts_with('#')) {
        assert!(!line.contains("target/"), "{line}");
    }
    assert!(text.contains("cargo test --release"));
}

//! Integration tests: they run the built `dovetail` binary on small fixtures, each in a fresh
//! temporary folder, and check files, exit codes and error lines. One test binary; the
//! modules live in tests/it/.

#[path = "it/common.rs"]
mod common;

#[path = "it/bad_input.rs"]
mod bad_input;
#[path = "it/codings.rs"]
mod codings;
#[path = "it/crash_safety.rs"]
mod crash_safety;
#[path = "it/distributed.rs"]
mod distributed;
#[path = "it/getting_started.rs"]
mod getting_started;
#[path = "it/honesty.rs"]
mod honesty;
#[path = "it/hostile.rs"]
mod hostile;
#[path = "it/link_sample.rs"]
mod link_sample;
#[path = "it/match_cmd.rs"]
mod match_cmd;
#[path = "it/memory_budget.rs"]
mod memory_budget;
#[path = "it/outputs_folder.rs"]
mod outputs_folder;
#[path = "it/parquet.rs"]
mod parquet;
#[path = "it/reliability_synth.rs"]
mod reliability_synth;
#[path = "it/report_html.rs"]
mod report_html;
#[path = "it/review_page.rs"]
mod review_page;
#[path = "it/robustness.rs"]
mod robustness;
#[path = "it/scenarios.rs"]
mod scenarios;
#[path = "it/score_cmd.rs"]
mod score_cmd;
#[path = "it/tune_synth.rs"]
mod tune_synth;

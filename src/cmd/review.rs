//! `dovetail review`: the clerical-review page for a finished run, served on this machine.

use dovetail::review::server::{Options, Server};
use dovetail::Result;
use std::path::PathBuf;
use std::process::ExitCode;

/// Serves a page for deciding a finished run's uncertain pairs one at a time, keyboard
/// first: S same person, D different people, C can't tell, Backspace undo, O other
/// candidates, arrows to move. Every decision is appended at once to FOLDER/decisions.csv;
/// set `decisions` under [link] to that file and run `link` again to apply them. The server
/// listens on 127.0.0.1 only and answers only requests carrying the token it prints. The
/// page shows record values: keep it on this machine and follow your data-protection rules.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// The output folder of a finished `dovetail link` run.
    pub folder: PathBuf,
    /// Review the run's audit sample (audit.csv, drawn with `audit_sample` under [link])
    /// instead of review.csv; the scores are hidden so they do not steer the answers.
    #[arg(long)]
    pub audit: bool,
    /// The name written beside each decision (default: $USER).
    #[arg(long)]
    pub reviewer: Option<String>,
    /// The port on 127.0.0.1 (default: any free one).
    #[arg(long, default_value_t = 0)]
    pub port: u16,
}

pub fn run(args: Args) -> Result<ExitCode> {
    let reviewer = args
        .reviewer
        .or_else(|| std::env::var("USER").ok())
        .filter(|r| !r.trim().is_empty())
        .unwrap_or_else(|| "clerk".to_string());
    let opts = Options {
        dir: args.folder,
        audit: args.audit,
        reviewer,
        port: args.port,
    };
    let server = Server::bind(&opts, Box::new(std::io::stderr()))?;
    let (n, done) = server.progress();
    println!(
        "{} pairs to {}, {done} decided already. Open this address in a browser on this machine:\n{}\nEvery decision is saved as it is made; stop with Ctrl-C.",
        n,
        if opts.audit { "audit" } else { "review" },
        server.url()
    );
    server.serve()?;
    Ok(ExitCode::SUCCESS)
}

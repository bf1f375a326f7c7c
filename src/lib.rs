//! dovetail: one-to-one probabilistic record linkage of two tables of people, with a
//! feasibility check before any link is trusted and a confidence for every link.
//!
//! The stages, in data-flow order (see DEVELOPERS.md):
//! [`io`] reads tables → [`records`] cleans and interns values → [`block`] builds candidate
//! pairs → [`compare`] gives agreement patterns → [`fit`] fits m, u and p ([`model`]: EM and
//! the model check; [`posterior`]: the one-to-one posterior) → [`matching`] finds the optimum one-to-one linkage → [`reliability`] assesses feasibility and
//! scores confidence → [`report`] writes outputs; [`score`] checks a finished run against known pairs. [`pipeline`] runs them in order; the binary
//! only parses arguments and prints.

pub mod block;
pub mod budget;
pub mod codings;
pub mod compare;
pub mod config;
pub mod duplicates;
pub mod error;
pub mod fit;
pub mod folder;
pub mod io;
pub mod matching;
pub mod model;
pub mod numbers;
pub mod pipeline;
pub mod posterior;
pub mod records;
pub mod reliability;
pub mod report;
pub mod review;
pub mod rng;
pub mod score;
pub mod synth;
pub mod tabular;
pub mod text;
pub mod texts;
pub mod tune;

pub use error::{Error, ErrorKind, Result};

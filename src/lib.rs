//! ballast: certify small linear and ReLU classifiers against a stated robustness requirement, retrain
//! them until it holds, and write the sheet that goes out with a release.
//!
//! The library holds everything; the binary only parses arguments and maps outcomes to exit codes.
#![warn(missing_docs)]
#![forbid(unsafe_code)]

pub mod atomic;
pub mod attack;
pub mod bound;
pub mod certify;
pub mod cli;
pub mod data;
pub mod demo;
pub mod digest;
pub mod engine;
pub mod limits;
pub mod model;
pub mod search;
pub mod sheet;
pub mod threat;
pub mod train;

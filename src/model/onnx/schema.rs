//! The ONNX protobuf schema as Rust types, generated once by `prost-build` from the vendored
//! `proto/onnx.proto` (the ONNX project's open-standard schema, Apache-2.0; see `proto/README.md` for the
//! exact regeneration steps). Decoding with these types never trusts a length written in the file: prost
//! checks every length prefix against the bytes that are present.
//!
//! Nothing here is edited by hand.
#![allow(missing_docs, clippy::all, clippy::pedantic, dead_code)]

include!("proto/onnx.rs");

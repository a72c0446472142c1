//! Model formats: the versioned JSON model file.

pub mod json;

pub use json::{from_json, to_json};

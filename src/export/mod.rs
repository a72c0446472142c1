//! Model formats: the versioned JSON model file, ONNX, Graphviz DOT and an indented plain-text rendering.

pub mod dot;
pub mod json;
pub mod onnx;
pub mod text;

pub use dot::to_dot;
pub use json::{from_json, to_json};
pub use onnx::to_onnx;
pub use text::to_text;

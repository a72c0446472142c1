//! Model formats: the versioned JSON model file, ONNX, Graphviz DOT, an indented plain-text rendering, and an SVG diagram.

pub mod dot;
pub mod json;
pub mod onnx;
pub mod svg;
pub mod text;

pub use dot::to_dot;
pub use json::{from_json, to_json};
pub use onnx::to_onnx;
pub use svg::to_svg;
pub use text::to_text;

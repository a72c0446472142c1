//! See the target root (main.rs).

#[allow(unused_imports)]
use super::*;

//! Tables: columnar frames, CSV ingest, targets and tasks.

pub mod csv;
pub mod frame;

pub use frame::{Column, ColumnKind, Dataset, Feature, Frame, Target, Task, MISSING_CODE};

//! The `schedules` test target: fire instants across daylight-saving transitions (pure, by
//! hand-derived tables), and schedules through the scheduler, the store and the service.

mod dst;
mod service;

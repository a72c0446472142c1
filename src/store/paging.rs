//! Listing orders and page tokens, the same for every backend: runs and schedules newest
//! first by id (ids are time-ordered), datasets newest first by `created_at`, then id; a
//! page token is the position of the last item on the page.

use crate::job::DatasetMeta;

/// Sort position of a dataset in listings: newest first, then by id.
pub fn dataset_position(m: &DatasetMeta) -> String {
    let newest_first = (i64::MAX as i128 - m.created_at as i128) as u64;
    format!("{newest_first:020}:{}", m.id)
}

/// Cuts `items` (in listing order, possibly one more than fits) to a page; the token is the
/// position of the last item on the page when more remain.
pub fn page<I, T>(items: Vec<I>, limit: usize, position: impl Fn(&I) -> String, value: impl Fn(I) -> T) -> (Vec<T>, Option<String>) {
    let limit = limit.max(1);
    let more = items.len() > limit;
    let mut kept: Vec<I> = items;
    kept.truncate(limit);
    let token = if more { kept.last().map(&position) } else { None };
    (kept.into_iter().map(value).collect(), token)
}

/// The fire sequence number a fires page token names (tokens are the last sequence returned).
pub fn fire_token(token: &str) -> Option<u64> {
    token.parse().ok()
}

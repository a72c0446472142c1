//! Listing order and page tokens, the same for every backend, so a caller's token means the
//! same thing whichever store served the page before.
//!
//! - Runs and schedules: newest first by id (ids are time-ordered); a token is the last id
//!   returned, and the next page starts below it.
//! - Datasets: newest first by `created_at`, then by id; a token is the [`dataset_position`]
//!   of the last dataset returned, and any string is a valid token.
//! - A schedule's fires: newest first by sequence number; a token is the last sequence
//!   returned, in decimal ([`fire_token`] reads it back).

use crate::job::DatasetMeta;

/// Sort position of a dataset in listings: newest first, then by id.
pub fn dataset_position(m: &DatasetMeta) -> String {
    let newest_first = (i64::MAX as i128 - m.created_at as i128) as u64;
    format!("{newest_first:020}:{}", m.id)
}

/// Cuts `items` (in listing order, possibly one more than fits) to a page; the token is the
/// position of the last item on the page when more remain. `limit` counts as at least 1.
pub fn page<I, T>(items: Vec<I>, limit: usize, position: impl Fn(&I) -> String, value: impl Fn(I) -> T) -> (Vec<T>, Option<String>) {
    let limit = limit.max(1);
    let more = items.len() > limit;
    let mut kept: Vec<I> = items;
    kept.truncate(limit);
    let token = if more { kept.last().map(&position) } else { None };
    (kept.into_iter().map(value).collect(), token)
}

/// The sequence number a fires page token stands for; `None` when the text is not a token
/// a fires listing gives out.
pub fn fire_token(token: &str) -> Option<u64> {
    token.parse::<u64>().ok()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_page_keeps_the_limit_and_names_its_last_item_only_when_more_remain() {
        let (kept, token) = page(vec![5, 4, 3], 2, |x| x.to_string(), |x| x * 10);
        assert_eq!((kept, token), (vec![50, 40], Some("4".to_string())));
        let (kept, token) = page(vec![5, 4], 2, |x| x.to_string(), |x| x);
        assert_eq!((kept, token), (vec![5, 4], None));
        // A limit of 0 is read as 1.
        assert_eq!(page(vec![1, 2], 0, |x| x.to_string(), |x| x).0, vec![1]);
    }

    #[test]
    fn newer_datasets_sort_first_and_fire_tokens_read_back() {
        let meta = |id: &str, at: i64| DatasetMeta { id: id.into(), content: String::new(), name: "n".into(), version: 1, rows: 0, columns: vec![], target: None, task: None, created_at: at, bytes: 0, categorical: vec![] };
        assert!(dataset_position(&meta("ds_b", 2)) < dataset_position(&meta("ds_a", 1)));
        assert!(dataset_position(&meta("ds_a", 1)) < dataset_position(&meta("ds_b", 1)));
        assert_eq!(fire_token("17"), Some(17));
        assert_eq!(fire_token("x"), None);
    }
}

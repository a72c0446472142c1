//! Key layouts of the sled trees. Ids are strings of any length, so every scan that starts
//! from an id prefix keeps only keys of exactly `id.len() + suffix` bytes: a longer id that
//! happens to start with the same bytes is never mistaken for this one.

/// `dataset id ++ be u32 chunk index`.
pub fn chunk(id: &str, index: u32) -> Vec<u8> {
    join(id.as_bytes(), &index.to_be_bytes())
}

/// `name ++ 0x00 ++ be u32 version`.
pub fn name_version(name: &str, version: u32) -> Vec<u8> {
    let mut k = name_prefix(name);
    k.extend_from_slice(&version.to_be_bytes());
    k
}

/// `name ++ 0x00`: the prefix of every version of a name.
pub fn name_prefix(name: &str) -> Vec<u8> {
    join(name.as_bytes(), &[0])
}

/// The version of a `name_version` key of `name`, or `None` when the key belongs to another name.
pub fn version_of(name: &str, key: &[u8]) -> Option<u32> {
    let prefix = name.len() + 1;
    if key.len() != prefix + 4 || !key.starts_with(&name_prefix(name)) {
        return None;
    }
    Some(u32::from_be_bytes(key[prefix..].try_into().unwrap()))
}

/// The `idempotency` key of a run's idempotency key: the key itself for a run without an
/// owner (no tokens, or a schedule's fire), `0x01 ++ owner ++ 0x00 ++ key` for a token's
/// run, so two tokens using the same key never meet.
pub fn idempotency(owner: Option<&str>, key: &str) -> Vec<u8> {
    match owner {
        None => key.as_bytes().to_vec(),
        Some(o) => {
            let mut k = vec![1u8];
            k.extend_from_slice(o.as_bytes());
            k.push(0);
            k.extend_from_slice(key.as_bytes());
            k
        }
    }
}

/// `run id ++ be u64 sequence`.
pub fn event(run_id: &str, sequence: u64) -> Vec<u8> {
    join(run_id.as_bytes(), &sequence.to_be_bytes())
}

/// `schedule id ++ be u64 fire sequence`.
pub fn fire(schedule_id: &str, sequence: u64) -> Vec<u8> {
    join(schedule_id.as_bytes(), &sequence.to_be_bytes())
}

/// `run id ++ be u32 unit index`.
pub fn unit(run_id: &str, unit: u32) -> Vec<u8> {
    join(run_id.as_bytes(), &unit.to_be_bytes())
}

/// Whether `key` is `id` followed by exactly `suffix` bytes.
pub fn belongs(id: &str, suffix: usize, key: &[u8]) -> bool {
    key.len() == id.len() + suffix && key.starts_with(id.as_bytes())
}

fn join(a: &[u8], b: &[u8]) -> Vec<u8> {
    let mut k = Vec::with_capacity(a.len() + b.len());
    k.extend_from_slice(a);
    k.extend_from_slice(b);
    k
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn versions_sort_numerically_and_stay_with_their_name() {
        assert!(name_version("a", 2) < name_version("a", 10));
        assert!(name_version("a", u32::MAX) < name_version("a\u{1}", 0));
        assert_eq!(version_of("a", &name_version("a", 258)), Some(258));
        // "a\0b" is a different name whose keys start with "a\0".
        assert_eq!(version_of("a", &name_version("a\0b", 1)), None);
        assert!(!belongs("run_1", 8, &event("run_12", 3)));
        assert!(belongs("run_1", 8, &event("run_1", 3)));
    }
}

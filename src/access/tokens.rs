//! The tokens file: one token a line, `NAME ROLE SHA256-HEX`, `#` starts a comment. Only
//! the SHA-256 digest of a token is stored; `pollard token new` makes a token and its line.
//!
//! ```text
//! # name     role    sha256 of the token
//! nightly    writer  0f5c…(64 hex digits)
//! ```

use std::fmt;

use sha2::{Digest, Sha256};
use subtle::ConstantTimeEq;

use super::{Caller, Role};

/// Longest token name.
pub const MAX_NAME: usize = 64;
/// What every token made by [`new_token`] starts with (so a leaked one is easy to grep for).
pub const TOKEN_PREFIX: &str = "pollard_";

/// One entry of the tokens file.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct TokenEntry {
    pub name: String,
    pub role: Role,
    pub digest: [u8; 32],
}

/// A checked tokens file.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct TokenTable {
    entries: Vec<TokenEntry>,
}

/// Why a tokens file was refused: the line (from 1) and what is wrong with it.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct TokensError {
    pub line: usize,
    pub message: String,
}

impl fmt::Display for TokensError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        if self.line == 0 {
            write!(f, "{}", self.message)
        } else {
            write!(f, "line {}: {}", self.line, self.message)
        }
    }
}

pub fn digest(token: &str) -> [u8; 32] {
    Sha256::digest(token.as_bytes()).into()
}

pub fn hex(bytes: &[u8]) -> String {
    bytes.iter().map(|b| format!("{b:02x}")).collect()
}

fn parse_hex(s: &str) -> Option<[u8; 32]> {
    if s.len() != 64 || !s.bytes().all(|b| b.is_ascii_hexdigit()) {
        return None;
    }
    let mut out = [0u8; 32];
    for (i, o) in out.iter_mut().enumerate() {
        *o = u8::from_str_radix(&s[2 * i..2 * i + 2], 16).ok()?;
    }
    Some(out)
}

/// A token name: 1 to 64 of `A-Z a-z 0-9 . _ -`.
pub fn check_name(name: &str) -> Result<(), String> {
    if name.is_empty() || name.len() > MAX_NAME || !name.bytes().all(|b| b.is_ascii_alphanumeric() || matches!(b, b'.' | b'_' | b'-')) {
        return Err(format!("'{}' is not a token name (1 to {MAX_NAME} of letters, digits, '.', '_', '-')", name.chars().take(80).collect::<String>()));
    }
    Ok(())
}

/// The tokens file line of a token.
pub fn file_line(name: &str, role: Role, token: &str) -> String {
    format!("{name} {role} {}", hex(&digest(token)))
}

/// A fresh random token: the prefix and 32 random bytes in hex.
pub fn new_token() -> Result<String, String> {
    let mut bytes = [0u8; 32];
    getrandom::fill(&mut bytes).map_err(|e| format!("no random bytes from the system: {e}"))?;
    Ok(format!("{TOKEN_PREFIX}{}", hex(&bytes)))
}

impl TokenTable {
    pub fn parse(text: &str) -> Result<TokenTable, TokensError> {
        let mut entries: Vec<TokenEntry> = Vec::new();
        for (i, raw) in text.lines().enumerate() {
            let line = raw.split('#').next().unwrap_or("").trim();
            if line.is_empty() {
                continue;
            }
            let err = |message: String| TokensError { line: i + 1, message };
            let fields: Vec<&str> = line.split_whitespace().collect();
            let [name, role, hash] = fields[..] else {
                return Err(err(format!("expected NAME ROLE SHA256-HEX, found {} fields", fields.len())));
            };
            check_name(name).map_err(err)?;
            let role = Role::parse(role).ok_or_else(|| err(format!("'{role}' is not a role (reader, writer or admin)")))?;
            let digest = parse_hex(hash).ok_or_else(|| err("the digest is not 64 hex digits (the SHA-256 of the token; `pollard token new` prints a line)".into()))?;
            if entries.iter().any(|e| e.name == name) {
                return Err(err(format!("the name '{name}' is given twice")));
            }
            if entries.iter().any(|e| e.digest == digest) {
                return Err(err("this digest is given twice".into()));
            }
            entries.push(TokenEntry { name: name.to_string(), role, digest });
        }
        Ok(TokenTable { entries })
    }

    pub fn len(&self) -> usize {
        self.entries.len()
    }

    pub fn is_empty(&self) -> bool {
        self.entries.is_empty()
    }

    /// The caller a presented token stands for. The token's digest is compared with every
    /// entry in constant time, and every entry is visited, so the time taken says nothing
    /// about which entry (or how much of one) matched.
    pub fn caller(&self, token: &str) -> Option<Caller> {
        let d = digest(token);
        let mut found = None;
        for e in &self.entries {
            if bool::from(e.digest.ct_eq(&d)) {
                found = Some(e);
            }
        }
        found.map(|e| Caller { name: Some(e.name.clone()), role: e.role })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn lines_round_trip_and_errors_name_the_line() {
        let a = new_token().unwrap();
        let b = new_token().unwrap();
        assert_ne!(a, b);
        assert!(a.starts_with(TOKEN_PREFIX) && a.len() == TOKEN_PREFIX.len() + 64);
        let text = format!("# tokens\n{}\n\n{}  # the nightly job\n", file_line("ops", Role::Admin, &a), file_line("nightly", Role::Writer, &b));
        let t = TokenTable::parse(&text).unwrap();
        assert_eq!(t.len(), 2);
        assert_eq!(t.caller(&a), Some(Caller { name: Some("ops".into()), role: Role::Admin }));
        assert_eq!(t.caller(&b).unwrap().role, Role::Writer);
        assert_eq!(t.caller("pollard_nope"), None);
        assert_eq!(t.caller(""), None);
        let bad = |text: &str| TokenTable::parse(text).unwrap_err().to_string();
        assert!(bad("x reader\n").starts_with("line 1: expected"));
        assert!(bad(&format!("\nx boss {}\n", hex(&digest("t")))).starts_with("line 2: 'boss' is not a role"));
        assert!(bad("x reader 12ab\n").contains("64 hex"));
        assert!(bad(&format!("x reader {}\nx admin {}\n", hex(&digest("t")), hex(&digest("u")))).contains("twice"));
        assert!(bad(&format!("x reader {}\ny admin {}\n", hex(&digest("t")), hex(&digest("t")))).contains("digest is given twice"));
        assert!(bad(&format!("a/b reader {}\n", hex(&digest("t")))).contains("not a token name"));
    }
}

//! The layering rules, checked on the source files (tests only):
//!
//! - the pure core (`data/`, `tree/`, `sweep/`, `export/`, `job.rs`, `schedule.rs`, `drift.rs`,
//!   `reefer.rs`) names no tokio, tonic, sled or tracing crate and no shell module (prost is
//!   allowed: the ONNX export builds prost messages);
//! - the service side of the shell (`service/`, `scheduler.rs`, `worker.rs`) names no
//!   protobuf or tonic type: only `rpc/`, `cli/` and `server.rs` (and `access/`, the
//!   transport-level auth layer) see them.
//!
//! The files are read by a small import reader, not by text search: comments, strings and
//! character literals are skipped, `use` trees are expanded (groups, nesting, `self`,
//! aliases), paths in expressions, types and attributes are read too, `extern crate` counts,
//! and `self::` / `super::` are resolved against the file's module and its inline `mod`s.

use std::path::{Path, PathBuf};

#[derive(Clone, Debug, PartialEq)]
enum Tok {
    Ident(String),
    /// `::`
    Sep,
    Punct(char),
}

/// The tokens of Rust source with their line numbers; comments, string, byte-string, raw
/// string and character literals are dropped, lifetimes are kept apart from characters.
fn tokens(src: &str) -> Vec<(usize, Tok)> {
    let c: Vec<char> = src.chars().collect();
    let (mut i, mut line, mut out) = (0usize, 1usize, Vec::new());
    let at = |k: usize| c.get(k).copied().unwrap_or('\0');
    // Skips to just past the closing `"` (escapes honoured), counting lines.
    let skip_string = |mut k: usize, line: &mut usize| {
        while k < c.len() && c[k] != '"' {
            if c[k] == '\\' {
                k += 1;
            }
            if at(k) == '\n' {
                *line += 1;
            }
            k += 1;
        }
        k + 1
    };
    while i < c.len() {
        let ch = c[i];
        if ch == '\n' {
            line += 1;
            i += 1;
        } else if ch.is_whitespace() {
            i += 1;
        } else if ch == '/' && at(i + 1) == '/' {
            while i < c.len() && c[i] != '\n' {
                i += 1;
            }
        } else if ch == '/' && at(i + 1) == '*' {
            let mut depth = 0;
            while i < c.len() {
                if c[i] == '/' && at(i + 1) == '*' {
                    depth += 1;
                    i += 2;
                } else if c[i] == '*' && at(i + 1) == '/' {
                    depth -= 1;
                    i += 2;
                    if depth == 0 {
                        break;
                    }
                } else {
                    if c[i] == '\n' {
                        line += 1;
                    }
                    i += 1;
                }
            }
        } else if ch == '"' {
            i = skip_string(i + 1, &mut line);
        } else if (ch == 'r' || (ch == 'b' && at(i + 1) == 'r')) && {
            let k = if ch == 'b' { i + 2 } else { i + 1 };
            let mut h = k;
            while at(h) == '#' {
                h += 1;
            }
            at(h) == '"' && (h > k || at(k) == '"')
        } {
            // Raw string: r"..", r#".."#, br#".."#.
            let mut k = if ch == 'b' { i + 2 } else { i + 1 };
            let mut hashes = 0;
            while at(k) == '#' {
                hashes += 1;
                k += 1;
            }
            k += 1;
            loop {
                if k >= c.len() {
                    break;
                }
                if c[k] == '"' && (1..=hashes).all(|h| at(k + h) == '#') {
                    k += 1 + hashes;
                    break;
                }
                if c[k] == '\n' {
                    line += 1;
                }
                k += 1;
            }
            i = k;
        } else if ch == 'b' && at(i + 1) == '"' {
            i = skip_string(i + 2, &mut line);
        } else if ch == '\'' || (ch == 'b' && at(i + 1) == '\'') {
            let q = if ch == 'b' { i + 1 } else { i };
            if at(q + 1) == '\\' {
                // An escaped character: to the closing quote.
                let mut k = q + 3;
                while k < c.len() && c[k] != '\'' {
                    k += 1;
                }
                i = k + 1;
            } else if at(q + 2) == '\'' {
                i = q + 3;
            } else {
                // A lifetime or label: the quote alone; the name follows as an identifier.
                i = q + 1;
            }
        } else if ch.is_alphabetic() || ch == '_' {
            let mut k = i;
            while k < c.len() && (c[k].is_alphanumeric() || c[k] == '_') {
                k += 1;
            }
            let mut word: String = c[i..k].iter().collect();
            if word == "r" && at(k) == '#' {
                // Raw identifier r#name.
                let mut e = k + 1;
                while e < c.len() && (c[e].is_alphanumeric() || c[e] == '_') {
                    e += 1;
                }
                word = c[k + 1..e].iter().collect();
                k = e;
            }
            out.push((line, Tok::Ident(word)));
            i = k;
        } else if ch.is_ascii_digit() {
            while i < c.len() && (c[i].is_alphanumeric() || c[i] == '_' || c[i] == '.') && !(c[i] == '.' && at(i + 1) == '.') {
                i += 1;
            }
        } else if ch == ':' && at(i + 1) == ':' {
            out.push((line, Tok::Sep));
            i += 2;
        } else {
            out.push((line, Tok::Punct(ch)));
            i += 1;
        }
    }
    out
}

/// A path the file names, resolved as far as the file tells: `crate`-relative when it starts
/// with `crate`, `self` or `super`, else as written (an extern crate or a local name).
#[derive(Clone, Debug, PartialEq)]
pub(crate) struct Named {
    pub line: usize,
    /// `true` when the path is inside this crate; `segments` then start below the root.
    pub in_crate: bool,
    pub segments: Vec<String>,
}

impl Named {
    fn show(&self) -> String {
        let p = self.segments.join("::");
        if self.in_crate {
            format!("crate::{p}")
        } else {
            p
        }
    }
}

fn resolve(module: &[String], line: usize, path: &[String]) -> Option<Named> {
    let first = path.first()?;
    match first.as_str() {
        "crate" => Some(Named { line, in_crate: true, segments: path[1..].to_vec() }),
        "self" | "super" => {
            let mut at = module.to_vec();
            let mut rest = path;
            while let Some(s) = rest.first() {
                match s.as_str() {
                    "self" => {}
                    "super" => {
                        at.pop()?;
                    }
                    _ => break,
                }
                rest = &rest[1..];
            }
            at.extend(rest.iter().cloned());
            Some(Named { line, in_crate: true, segments: at })
        }
        _ => Some(Named { line, in_crate: false, segments: path.to_vec() }),
    }
}

/// Expands one use tree starting at `i` under `prefix`; returns the index after it.
fn use_tree(t: &[(usize, Tok)], mut i: usize, prefix: Vec<String>, out: &mut Vec<(usize, Vec<String>)>) -> usize {
    let mut path = prefix;
    while let Some((line, tok)) = t.get(i) {
        match tok {
            Tok::Ident(s) => {
                path.push(s.clone());
                i += 1;
                if t.get(i).map(|x| &x.1) == Some(&Tok::Sep) {
                    i += 1;
                    continue;
                }
                if matches!(t.get(i).map(|x| &x.1), Some(Tok::Ident(a)) if a == "as") {
                    i += 2;
                }
                out.push((*line, path));
                return i;
            }
            Tok::Punct('*') => {
                path.push("*".into());
                out.push((*line, path));
                return i + 1;
            }
            Tok::Punct('{') => {
                i += 1;
                while let Some((_, tok)) = t.get(i) {
                    match tok {
                        Tok::Punct('}') => return i + 1,
                        Tok::Punct(',') => i += 1,
                        _ => {
                            let next = use_tree(t, i, path.clone(), out);
                            if next == i {
                                return i + 1;
                            }
                            i = next;
                        }
                    }
                }
                return i;
            }
            _ => return i,
        }
    }
    i
}

/// Every path the source names: the expanded `use` trees, `extern crate`s, and every
/// `a::b::..` path elsewhere (expressions, types, attributes, macro calls). `module` is the
/// file's module path below the crate root.
pub(crate) fn named_paths(src: &str, module: &[String]) -> Vec<Named> {
    let t = tokens(src);
    let mut out = Vec::new();
    // Inline modules: the brace depth inside each; `here` is the current module path.
    let mut mods: Vec<usize> = Vec::new();
    let mut here = module.to_vec();
    let mut depth = 0usize;
    let mut i = 0;
    let ident = |k: usize| match t.get(k) {
        Some((_, Tok::Ident(s))) => Some(s.as_str()),
        _ => None,
    };
    while i < t.len() {
        let (line, tok) = &t[i];
        match tok {
            Tok::Punct('{') => depth += 1,
            Tok::Punct('}') => {
                if mods.last() == Some(&depth) {
                    mods.pop();
                    here.pop();
                }
                depth = depth.saturating_sub(1);
            }
            Tok::Ident(w) if w == "mod" && t.get(i + 2).map(|x| &x.1) == Some(&Tok::Punct('{')) => {
                if let Some(name) = ident(i + 1) {
                    here.push(name.to_string());
                    depth += 1;
                    mods.push(depth);
                    i += 3;
                    continue;
                }
            }
            Tok::Ident(w) if w == "extern" && ident(i + 1) == Some("crate") => {
                if let Some(name) = ident(i + 2) {
                    out.push(Named { line: *line, in_crate: false, segments: vec![name.to_string()] });
                }
                i += 3;
                continue;
            }
            Tok::Ident(w) if w == "use" => {
                let mut k = i + 1;
                let absolute = t.get(k).map(|x| &x.1) == Some(&Tok::Sep);
                if absolute {
                    k += 1;
                }
                let mut trees = Vec::new();
                i = use_tree(&t, k, Vec::new(), &mut trees);
                for (l, p) in trees {
                    let named = if absolute { Some(Named { line: l, in_crate: false, segments: p }) } else { resolve(&here, l, &p) };
                    out.extend(named);
                }
                continue;
            }
            Tok::Ident(_) | Tok::Sep => {
                // A path: [::] ident (:: ident)*, with at least one `::`.
                let start_line = *line;
                // `::name` after `>` continues a path (`Vec::<T>::new`); elsewhere it is absolute.
                let absolute = *tok == Tok::Sep && (i == 0 || t[i - 1].1 != Tok::Punct('>'));
                if *tok == Tok::Sep && !absolute {
                    i += 1;
                    continue;
                }
                let mut k = if absolute { i + 1 } else { i };
                let mut path = Vec::new();
                while let Some(name) = ident(k) {
                    path.push(name.to_string());
                    k += 1;
                    if t.get(k).map(|x| &x.1) == Some(&Tok::Sep) && ident(k + 1).is_some() {
                        k += 1;
                    } else {
                        break;
                    }
                }
                if path.len() > 1 || (absolute && !path.is_empty()) {
                    let named = if absolute { Some(Named { line: start_line, in_crate: false, segments: path }) } else { resolve(&here, start_line, &path) };
                    out.extend(named);
                }
                i = k.max(i + 1);
                continue;
            }
            _ => {}
        }
        i += 1;
    }
    out
}

/// A rule: extern crates (a name, or the name with an `_` suffix such as `tokio_stream`) and
/// modules of this crate that the files may not name. `bare` names are also refused as the
/// first segment of a relative path (`pb::Run` after some import of `pb`).
struct Rule {
    crates: &'static [&'static str],
    modules: &'static [&'static str],
    bare: &'static [&'static str],
}

impl Rule {
    fn refuses(&self, n: &Named) -> bool {
        let Some(first) = n.segments.first() else { return false };
        if n.in_crate {
            return self.modules.contains(&first.as_str());
        }
        let krate = self.crates.iter().any(|c| first == c || first.strip_prefix(c).is_some_and(|r| r.starts_with('_')));
        krate || (n.segments.len() > 1 && self.bare.contains(&first.as_str()))
    }

    /// `file:line: path` for each refused path in the source of `file`.
    fn check(&self, root: &Path, file: &Path, src: &str) -> Vec<String> {
        named_paths(src, &module_of(root, file))
            .into_iter()
            .filter(|n| self.refuses(n))
            .map(|n| format!("{}:{}: {}", file.strip_prefix(root.parent().unwrap_or(root)).unwrap_or(file).display(), n.line, n.show()))
            .collect()
    }
}

/// The core names none of these. `clock` and `pb` are shell modules too (lib.rs code map).
const CORE: Rule = Rule {
    crates: &["tokio", "tonic", "sled", "tracing"],
    modules: &["rpc", "cli", "server", "worker", "scheduler", "store", "service", "access", "config", "clock", "pb", "web", "metrics"],
    bare: &[],
};

/// The service side of the shell names no protobuf or transport type.
const SERVICE: Rule = Rule { crates: &["tonic", "prost"], modules: &["rpc", "pb", "web"], bare: &["pb"] };

/// The module path of a file below `src/`: `export/onnx.rs` -> `export::onnx`.
fn module_of(root: &Path, file: &Path) -> Vec<String> {
    let rel = file.strip_prefix(root).unwrap_or(file);
    let mut parts: Vec<String> = rel.iter().map(|p| p.to_string_lossy().into_owned()).collect();
    if let Some(last) = parts.pop() {
        let stem = last.trim_end_matches(".rs");
        if stem != "mod" && stem != "lib" && stem != "main" {
            parts.push(stem.to_string());
        }
    }
    parts
}

/// Every `.rs` file under `path` (or `path` itself), sorted.
fn rust_files(path: &Path, out: &mut Vec<PathBuf>) {
    if path.is_dir() {
        let mut entries: Vec<PathBuf> = std::fs::read_dir(path).unwrap().map(|e| e.unwrap().path()).collect();
        entries.sort();
        for e in entries {
            rust_files(&e, out);
        }
    } else if path.extension().is_some_and(|e| e == "rs") {
        out.push(path.to_path_buf());
    }
}

fn src_root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("src")
}

/// Files read, paths they name, and the paths the rule refuses.
fn violations(rule: &Rule, parts: &[&str]) -> (usize, usize, Vec<String>) {
    let root = src_root();
    let mut files = Vec::new();
    for p in parts {
        rust_files(&root.join(p), &mut files);
    }
    let (mut named, mut bad) = (0, Vec::new());
    for f in &files {
        let src = std::fs::read_to_string(f).unwrap();
        named += named_paths(&src, &module_of(&root, f)).len();
        bad.extend(rule.check(&root, f, &src));
    }
    (files.len(), named, bad)
}

#[test]
fn core_modules_stay_pure() {
    let (n, named, bad) = violations(&CORE, &["data", "tree", "sweep", "export", "job.rs", "schedule.rs", "drift.rs", "reefer.rs"]);
    assert!(n > 20, "scanned only {n} files");
    // Not vacuous: the core's files name many paths (their own imports among them).
    assert!(named > 5 * n, "read only {named} paths in {n} files");
    assert!(bad.is_empty(), "core files name the shell or a runtime crate:\n{}", bad.join("\n"));
}

#[test]
fn service_side_names_no_protobuf() {
    let (n, _, bad) = violations(&SERVICE, &["service", "scheduler.rs", "worker.rs"]);
    assert!(n >= 2, "scanned only {n} files");
    assert!(bad.is_empty(), "service-side files name protobuf or transport types:\n{}", bad.join("\n"));
}

#[cfg(test)]
mod reader {
    use super::*;

    fn module(path: &str) -> Vec<String> {
        path.split("::").filter(|s| !s.is_empty()).map(String::from).collect()
    }

    /// What the core rule refuses in `src`, read as module `at`.
    fn core_finds(at: &str, src: &str) -> Vec<String> {
        named_paths(src, &module(at)).into_iter().filter(|n| CORE.refuses(n)).map(|n| format!("{}:{}", n.line, n.show())).collect()
    }

    #[test]
    fn grouped_and_nested_use_trees() {
        let src = "use crate::{data::Frame, store::{self, Store}};\nuse crate::{tree::{grow, prune}, rpc};";
        assert_eq!(core_finds("sweep", src), ["1:crate::store::self", "1:crate::store::Store", "2:crate::rpc"]);
        let multi = "use crate::{\n    data::Frame,\n    config::{Config as C},\n};";
        assert_eq!(core_finds("sweep", multi), ["3:crate::config::Config"]);
        assert_eq!(core_finds("sweep", "pub(crate) use tonic::{Status, Code};"), ["1:tonic::Status", "1:tonic::Code"]);
        assert_eq!(core_finds("sweep", "use ::tokio::sync::{mpsc};"), ["1:tokio::sync::mpsc"]);
        assert_eq!(core_finds("sweep", "use tracing;"), ["1:tracing"]);
    }

    #[test]
    fn paths_in_expressions_types_and_attributes() {
        let src = "fn f() {\n    let s = crate::store::Store::open(p);\n    tokio::spawn(async {});\n    let v: Vec<::sled::IVec> = Vec::new();\n    tracing::info!(\"x\");\n}\n#[tokio::test]\nasync fn t() {}";
        assert_eq!(core_finds("job", src), ["2:crate::store::Store::open", "3:tokio::spawn", "4:sled::IVec", "5:tracing::info", "7:tokio::test"]);
        // Crates named after a forbidden one count too.
        assert_eq!(core_finds("job", "let r = tokio_stream::once(1);"), ["1:tokio_stream::once"]);
    }

    #[test]
    fn nested_modules_resolve_super_and_self() {
        let src = "mod a {\n    mod b {\n        use super::super::super::super::store::Store;\n        use super::super::tests::x;\n    }\n    use self::worker::y;\n}\nuse super::scheduler;";
        // From `sweep::folds`: `a::b` goes up four to the root (crate::store); `a` has a child
        // named worker (crate::sweep::folds::a::worker, not the shell's); the file's own
        // `super` is `sweep`, whose `scheduler` child is not the shell's either.
        assert_eq!(core_finds("sweep::folds", src), ["3:crate::store::Store"]);
        assert_eq!(core_finds("", "mod tests { use super::worker::run; }"), ["1:crate::worker::run"]);
        // Braces of blocks inside a module do not end it.
        assert_eq!(core_finds("job", "mod m { fn f() { if x { } } use super::super::clock::Clock; }"), ["1:crate::clock::Clock"]);
    }

    #[test]
    fn extern_crate_counts() {
        assert_eq!(core_finds("data", "extern crate sled;\nextern crate tracing as log;\nextern crate serde;"), ["1:sled", "2:tracing"]);
    }

    #[test]
    fn comments_strings_and_allowed_crates_are_not_imports() {
        let src = r####"
// tokio::spawn in a line comment
/* crate::store::Store in a /* nested */ block comment */
//! [`crate::rpc`] in a doc link
let a = "crate::store::Store::open";
let b = r#"tokio::spawn "quoted" "#;
let c = b"sled::Db";
fn f<'a>(x: &'a str) -> char { '"' }
let d = '\'';
use prost::Message;
use crate::data::{Frame, csv};
let e = Foo::store::x;
use crate::onnx_pb::ModelProto;
use tokio;
"####;
        // Only the last line: the lexer is not thrown off by the quotes above it.
        assert_eq!(core_finds("export::onnx", src), ["14:tokio"]);
    }

    #[test]
    fn service_rule_refuses_protobuf_and_transport() {
        let src = "use crate::{pb, store::Store};\nfn f() -> Result<(), tonic::Status> { let r = pb::Run::default(); crate::rpc::error::x(); }\nuse prost::Message;";
        let found: Vec<String> = named_paths(src, &module("service::runs")).into_iter().filter(|n| SERVICE.refuses(n)).map(|n| format!("{}:{}", n.line, n.show())).collect();
        assert_eq!(found, ["1:crate::pb", "2:tonic::Status", "2:pb::Run::default", "2:crate::rpc::error::x", "3:prost::Message"]);
    }

    #[test]
    fn file_module_paths() {
        let root = Path::new("/x/src");
        assert_eq!(module_of(root, &root.join("export/onnx.rs")), ["export", "onnx"]);
        assert_eq!(module_of(root, &root.join("export/mod.rs")), ["export"]);
        assert_eq!(module_of(root, &root.join("job.rs")), ["job"]);
        assert!(module_of(root, &root.join("lib.rs")).is_empty());
    }
}

//! The tokens file reloaded without a restart, the startup guard, and owner-only modes of
//! the store's files.

use std::io::Write;
use std::process::Stdio;

use serde_json::Value;

use super::process::{command, finish, KillOnDrop, Serve, ServeOptions, TempDir};
use super::{eventually, mode, put, with_tokens};

/// `pollard token new --json`: the token and its line.
fn new_token(name: &str, role: &str) -> (String, String) {
    let v: Value = super::process::pollard(&["token", "new", "--name", name, "--role", role, "--json"]).json();
    (v["token"].as_str().unwrap().to_string(), v["line"].as_str().unwrap().to_string())
}

#[test]
fn the_tokens_file_reloads_without_a_restart() {
    let dir = TempDir::new("access-reload");
    let (reader, reader_line) = new_token("first", "reader");
    let (writer, writer_line) = new_token("second", "writer");
    // `token hash` prints the same line for a token given on standard input.
    let mut hash = command(&["token", "hash", "--name", "second", "--role", "writer"]).stdin(Stdio::piped()).stdout(Stdio::piped()).spawn().unwrap();
    hash.stdin.take().unwrap().write_all(format!("{writer}\n").as_bytes()).unwrap();
    let out = hash.wait_with_output().unwrap();
    assert_eq!(String::from_utf8(out.stdout).unwrap().trim(), format!("tokens file line: {writer_line}"));
    assert!(!reader_line.contains(&reader), "the file line holds a digest, not the token");

    let mut server = Serve::start_with(with_tokens(&dir, &format!("{reader_line}\n"), ""));
    let tokens = dir.join("tokens");
    let url = server.url.clone();
    let as_ = |token: &str, args: &[&str]| {
        let mut all = vec!["--token", token];
        all.extend_from_slice(args);
        super::process::client(&url, &all)
    };
    as_(&reader, &["datasets", "--json"]).json();
    let e = as_(&writer, &["datasets"]).fails();
    assert!(e.contains("Unauthenticated"), "{e}");
    // The token from the environment works as --token does.
    let mut c = command(&["--server", &server.url, "runs", "--json"]);
    c.env("POLLARD_TOKEN", &reader);
    assert_eq!(finish(c, "runs (POLLARD_TOKEN)").code, Some(0));

    // Swap the file: the first token is withdrawn, the second admitted, no restart.
    put(&tokens, &format!("# rotated\n{writer_line}\n"));
    eventually("the new tokens file is in force", || as_(&writer, &["datasets", "--json"]).code == Some(0));
    let e = as_(&reader, &["datasets"]).fails();
    assert!(e.contains("Unauthenticated"), "{e}");

    // A broken file keeps the tokens that were loaded, and says why in the log.
    put(&tokens, "second writer not-a-digest\n");
    eventually("the broken file is reported", || server.log().contains("keeping what was loaded before"));
    assert!(server.log().contains("line 1"), "the log names the line:\n{}", server.log());
    // The CLI sends the token end to end: the run records its owner.
    as_(&writer, &["put", super::process::data("iris.csv").to_str().unwrap(), "--name", "iris", "--target", "target", "--json"]).json();
    let run = as_(&writer, &["sweep", "--dataset", "iris", "--max-depth", "1,2", "--json"]).json();
    assert_eq!(run["owner"], "second", "{run}");
    // SIGHUP rereads at once; the server stays up.
    let before = server.log().matches("keeping what was loaded before").count();
    server.signal(libc::SIGHUP);
    eventually("SIGHUP rereads the file", || server.log().matches("keeping what was loaded before").count() > before);
    assert!(server.alive());
    as_(&writer, &["datasets", "--json"]).json();
}

#[test]
fn no_tokens_on_a_public_address_needs_an_explicit_yes() {
    let dir = TempDir::new("access-guard");
    let store = dir.join("store");
    let out = finish(command(&["serve", "--listen", "0.0.0.0:0", "--data", store.to_str().unwrap()]), "serve on 0.0.0.0");
    let e = out.fails();
    assert!(e.contains("refusing") && e.contains("0.0.0.0") && e.contains("allow_tokenless") && e.contains("tokens_file"), "{e}");
    assert!(!store.exists(), "a refused start touches no store");

    // With the explicit flag, or the config key, it serves, and warns.
    let config = dir.join("open.toml");
    std::fs::write(&config, "allow_tokenless = true\n").unwrap();
    for (i, extra) in [vec!["--allow-tokenless"], vec!["--config", config.to_str().unwrap()]].into_iter().enumerate() {
        let log = dir.join(&format!("serve{i}.log"));
        let store = dir.join(&format!("store{i}"));
        let mut args = vec!["serve", "--listen", "0.0.0.0:0", "--data", store.to_str().unwrap()];
        args.extend(extra);
        let child = command(&args).stdout(Stdio::null()).stderr(std::fs::File::create(&log).unwrap()).spawn().unwrap();
        let mut child = KillOnDrop(child);
        eventually("the open server starts", || std::fs::read_to_string(&log).unwrap_or_default().contains("pollard serving") || child.0.try_wait().unwrap().is_some());
        let text = std::fs::read_to_string(&log).unwrap();
        assert!(text.contains("pollard serving") && text.contains("WARN") && text.contains("every caller is an admin"), "{args:?}:\n{text}");
    }
}

#[test]
fn the_store_is_owner_only() {
    use std::os::unix::fs::PermissionsExt;
    let dir = TempDir::new("access-modes");
    let store = dir.join("store");
    // A store directory left open by hand, with a file readable by all.
    std::fs::create_dir(&store).unwrap();
    std::fs::set_permissions(&store, std::fs::Permissions::from_mode(0o755)).unwrap();
    std::fs::write(store.join("notes.txt"), "x").unwrap();
    std::fs::set_permissions(store.join("notes.txt"), std::fs::Permissions::from_mode(0o644)).unwrap();
    let server = Serve::start_with(ServeOptions { store: Some(store.clone()), ..ServeOptions::default() });
    let info = server.run(&["put", super::process::data("wine.csv").to_str().unwrap(), "--name", "wine", "--target", "target", "--json"]).json();
    let id = info["id"].as_str().unwrap().to_string();
    let mut seen = 0;
    let mut stack = vec![store.clone()];
    while let Some(d) = stack.pop() {
        assert_eq!(mode(&d), 0o700, "{}", d.display());
        for e in std::fs::read_dir(&d).unwrap() {
            let p = e.unwrap().path();
            if p.is_dir() {
                stack.push(p);
            } else {
                assert_eq!(mode(&p), 0o600, "{}", p.display());
                seen += 1;
            }
        }
    }
    assert!(seen >= 3, "the store holds files ({seen})");
    assert!(!id.is_empty());
}

/// A dataset's bytes live in a file of their own, removed on delete: no file under the data
/// dir (the database's log included) holds them afterwards.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn deleting_a_dataset_removes_its_bytes() {
    use pollard::pb;
    let mut server = Serve::start();
    let ch = super::channel(&server.url).await;
    let marker = format!("zq{}", pollard::access::tokens::new_token().unwrap());
    let mut csv = String::from("x,label,target\n");
    for i in 0..200 {
        csv.push_str(&format!("{i},{marker}{},{}\n", i % 3, i % 2));
    }
    let info = super::upload(super::authed(&ch, None), "secret", csv.into_bytes()).await.unwrap();
    // The scan finds the bytes while the dataset is stored (in its file, and nowhere else).
    let held = files_holding(&server.store, marker.as_bytes());
    assert_eq!(held, [server.store.join("datasets").join(format!("{}.csv", info.id))], "the stored dataset's bytes");
    let mut d = pb::datasets_client::DatasetsClient::new(ch.clone());
    d.delete_dataset(pb::DeleteDatasetRequest { id: info.id.clone() }).await.unwrap();
    super::expect("the deleted dataset", d.get_dataset(pb::GetDatasetRequest { id: info.id.clone() }).await, tonic::Code::NotFound, &[]);
    assert_eq!(files_holding(&server.store, marker.as_bytes()), Vec::<std::path::PathBuf>::new(), "right after the delete");
    drop(d);
    drop(ch);
    server.signal(libc::SIGTERM);
    assert!(server.wait_exit(super::process::PATIENCE).is_some());
    assert_eq!(files_holding(&server.store, marker.as_bytes()), Vec::<std::path::PathBuf>::new(), "after shutdown");
}

/// Every file under `dir` whose bytes contain `needle`.
fn files_holding(dir: &std::path::Path, needle: &[u8]) -> Vec<std::path::PathBuf> {
    let mut out = Vec::new();
    let mut stack = vec![dir.to_path_buf()];
    while let Some(dir) = stack.pop() {
        for e in std::fs::read_dir(&dir).unwrap() {
            let p = e.unwrap().path();
            if p.is_dir() {
                stack.push(p);
            } else if std::fs::read(&p).is_ok_and(|bytes| bytes.windows(needle.len()).any(|w| w == needle)) {
                out.push(p);
            }
        }
    }
    out
}

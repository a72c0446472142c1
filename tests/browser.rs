//! The web view in a real browser: Debian's chromium, driven through chromedriver (WebDriver)
//! by fantoccini, against a real `pollard serve`. Needs `chromium` and `chromium-driver`
//! (`.ci/run` installs them); `cargo test` leaves this target out, run it with
//! `cargo test --release --test browser`.
//!
//! One test, in the order a person would go: a finished sweep's run found from the runs
//! page and opened by its link (score table, a plot, the tree), its model downloaded and
//! parsed, a live run watched advancing without a reload, the datasets and schedules pages;
//! every page's markup parsed with html5ever, which must record no parse error; and the
//! same pages with JavaScript off. Screenshots of each page are written to
//! `target/tmp/browser/` (CARGO_TARGET_TMPDIR) as test output.

#[path = "support/process.rs"]
mod process;

use std::net::TcpStream;
use std::path::PathBuf;
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use fantoccini::{Client, ClientBuilder, Locator};
use process::*;
use serde_json::{json, Value};

/// How long a page or a run gets to reach a state (a deadline, not a wait).
const PATIENCE_WEB: Duration = Duration::from_secs(90);

fn screens() -> PathBuf {
    let dir = PathBuf::from(env!("CARGO_TARGET_TMPDIR")).join("browser");
    std::fs::create_dir_all(&dir).unwrap();
    dir
}

/// chromedriver on a free port, killed on drop.
fn chromedriver() -> (KillOnDrop, String) {
    let port = free_port();
    let child = Command::new("chromedriver")
        .arg(format!("--port={port}"))
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .expect("chromedriver is not installed: apt-get install -y chromium chromium-driver (.ci/run does)");
    let child = KillOnDrop(child);
    let deadline = Instant::now() + PATIENCE_WEB;
    while TcpStream::connect(("127.0.0.1", port)).is_err() {
        assert!(Instant::now() < deadline, "chromedriver did not listen on {port}");
        std::thread::sleep(Duration::from_millis(50));
    }
    (child, format!("http://127.0.0.1:{port}"))
}

/// A headless chromium session with a fresh profile; `javascript: false` turns scripts off.
async fn browser(driver: &str, profile: &std::path::Path, javascript: bool) -> Client {
    let mut options = json!({
        "binary": "/usr/bin/chromium",
        "args": [
            "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
            "--disable-background-networking", "--disable-component-update", "--disable-sync",
            "--window-size=1280,1600", format!("--user-data-dir={}", profile.display()),
        ],
    });
    if !javascript {
        options["prefs"] = json!({"profile.managed_default_content_settings.javascript": 2});
    }
    let mut caps = serde_json::Map::new();
    caps.insert("goog:chromeOptions".into(), options);
    let connector = hyper_util::client::legacy::connect::HttpConnector::new();
    ClientBuilder::new(connector).capabilities(caps).connect(driver).await.expect("a chromium session through chromedriver")
}

async fn shot(c: &Client, name: &str) {
    let png = c.screenshot().await.unwrap();
    assert!(png.starts_with(b"\x89PNG"), "a screenshot is a PNG");
    std::fs::write(screens().join(format!("{name}.png")), png).unwrap();
}

/// Waits until `cond` holds for the page, polling it, within [`PATIENCE_WEB`].
async fn until<F, Fut>(what: &str, mut cond: F)
where
    F: FnMut() -> Fut,
    Fut: std::future::Future<Output = bool>,
{
    let deadline = Instant::now() + PATIENCE_WEB;
    while !cond().await {
        assert!(Instant::now() < deadline, "{what}: not within {PATIENCE_WEB:?}");
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
}

/// The raw bytes the server sends for `url`, fetched by the page (same origin, same cookie).
async fn fetch_text(c: &Client, url: &str) -> String {
    let v = c.execute_async("var done = arguments[arguments.length - 1]; fetch(arguments[0]).then(r => r.text()).then(done, e => done('FAILED ' + e));", vec![json!(url)]).await.unwrap();
    v.as_str().unwrap_or_else(|| panic!("{url}: {v}")).to_string()
}

/// The HTML5 parse errors of a document (empty for valid markup).
fn parse_errors(html: &str) -> Vec<String> {
    use html5ever::tendril::TendrilSink;
    let dom = html5ever::parse_document(markup5ever_rcdom::RcDom::default(), Default::default()).from_utf8().read_from(&mut html.as_bytes()).unwrap();
    let errors = dom.errors.borrow().iter().map(|e| e.to_string()).collect();
    errors
}

async fn text_of(c: &Client, css: &str) -> String {
    c.find(Locator::Css(css)).await.unwrap_or_else(|e| panic!("no {css} on the page: {e}")).text().await.unwrap()
}

/// The text of `css` as the page is now, "" while it is missing or the page changes under it
/// (for polling).
async fn text_now(c: &Client, css: &str) -> String {
    match c.find(Locator::Css(css)).await {
        Ok(e) => e.text().await.unwrap_or_default(),
        Err(_) => String::new(),
    }
}

fn s<'a>(v: &'a Value, key: &str) -> &'a str {
    v[key].as_str().unwrap_or_else(|| panic!("'{key}' is not a string in {v}"))
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_web_view_in_a_browser() {
    // Units are held a while before they are stored, so a run lasts long enough to watch.
    let server = Serve::start_with(ServeOptions { env: vec![("POLLARD_CPU_THREADS".into(), "1".into()), ("POLLARD_TEST_UNIT_DELAY_MS".into(), "300".into())], ..ServeOptions::default() });
    let web = server.web_url().expect("the server logs its web address");
    server.run(&["put", data("iris.csv").to_str().unwrap(), "--name", "iris", "--target", "target"]).ok();
    let started = server.run(&["sweep", "--dataset", "iris", "--max-depth", "1,2,3,none", "--min-leaf-rows", "1,5", "--k", "3", "--json"]).json();
    let first = s(&started, "id").to_string();
    let done = server.run(&["follow", &first, "--json"]).json_lines();
    assert_eq!(done.last().map(|e| s(e, "kind")), Some("finished"));

    let (_driver, driver_url) = chromedriver();
    let profile = TempDir::new("chromium");
    let c = browser(&driver_url, &profile.join("on"), true).await;

    // The runs page links to the run; the link opens it.
    c.goto(&format!("{web}/runs")).await.unwrap();
    shot(&c, "runs").await;
    c.find(Locator::Css(&format!("a[href='/runs/{first}']"))).await.unwrap().click().await.unwrap();
    until("the run page after the click", || async { c.current_url().await.map(|u| u.path() == format!("/runs/{first}")).unwrap_or(false) }).await;
    let picked = text_of(&c, "table tbody tr.picked").await;
    assert!(picked.contains("◆ picked"), "{picked}");
    let header = text_of(&c, "table thead").await;
    for column in ["depth", "leaf", "train", "valid", "gap"] {
        assert!(header.contains(column), "{header}");
    }
    // The Pareto front (accuracy, higher is better): fewest leaves first, and each row scores
    // strictly better than the smaller ones before it.
    let mut names = Vec::new();
    for h in c.find_all(Locator::Css("#front thead th")).await.unwrap() {
        names.push(h.text().await.unwrap());
    }
    let column = |name: &str| names.iter().position(|n| n == name).unwrap_or_else(|| panic!("a {name} column in {names:?}"));
    let (leaves_at, valid_at) = (column("leaves"), column("valid"));
    let mut front = Vec::new();
    for row in c.find_all(Locator::Css("#front tbody tr")).await.unwrap() {
        let cells = row.find_all(Locator::Css("td")).await.unwrap();
        let number = |text: String| text.parse::<f64>().unwrap_or_else(|_| panic!("not a number: {text}"));
        front.push((number(cells[leaves_at].text().await.unwrap()), number(cells[valid_at].text().await.unwrap())));
    }
    assert!(!front.is_empty() && front.windows(2).all(|w| w[0].0 <= w[1].0 && w[0].1 < w[1].1), "front (leaves, valid) {front:?}");
    assert!(c.find_all(Locator::Css("figure svg circle")).await.unwrap().len() >= 2, "a plot with its points");
    assert!(!c.find_all(Locator::Css(".tree svg polygon")).await.unwrap().is_empty(), "the tree with its conditions");
    shot(&c, "run").await;

    // The model as JSON parses into a tree; ONNX and the fold assignment come as files.
    let model = fetch_text(&c, &format!("/runs/{first}/model/model.json")).await;
    let tree = pollard::export::from_json(&model).unwrap_or_else(|e| panic!("the downloaded model does not parse: {e}"));
    assert!(!tree.nodes.is_empty());
    let folds = fetch_text(&c, &format!("/runs/{first}/folds.csv")).await;
    assert_eq!(folds.lines().next(), Some("row,repeat,fold"));
    assert_eq!(folds.lines().count(), 151, "iris has 150 rows, one line each");

    // A live run: the page advances without a reload, then shows the scores when it ends.
    let live = server.run(&["sweep", "--dataset", "iris", "--max-depth", "1,2,3", "--k", "10", "--repeats", "3", "--json"]).json();
    let live_id = s(&live, "id").to_string();
    c.goto(&format!("{web}/runs/{live_id}")).await.unwrap();
    let before = text_of(&c, "#progress .count").await;
    c.execute("window.stillThisPage = true;", vec![]).await.unwrap();
    until("the live run's progress to advance", || async {
        let now = c.find(Locator::Css("#progress .count")).await;
        let same_page = c.execute("return window.stillThisPage === true;", vec![]).await.map(|v| v == json!(true)).unwrap_or(false);
        match now {
            Ok(e) => same_page && e.text().await.map(|t| t != before).unwrap_or(false),
            Err(_) => false,
        }
    })
    .await;
    shot(&c, "run-live").await;
    until("the live run's page to show its scores once it ends", || async { c.find(Locator::Css("table tbody tr.picked")).await.is_ok() }).await;

    // A two-class run under monotone limits and decision costs: the page says both.
    server.run(&["put", data("breast_cancer.csv").to_str().unwrap(), "--name", "cancer", "--target", "target"]).ok();
    let limited = server.run(&["sweep", "--dataset", "cancer", "--max-depth", "1,2,3", "--k", "3", "--monotone", "mean_radius:+1,mean_texture:+1", "--false-alarm-cost", "1", "--miss-cost", "5", "--json"]).json();
    let limited_id = s(&limited, "id").to_string();
    let done = server.run(&["follow", &limited_id, "--json"]).json_lines();
    assert_eq!(done.last().map(|e| s(e, "kind")), Some("finished"));
    c.goto(&format!("{web}/runs/{limited_id}")).await.unwrap();
    let facts = text_of(&c, "dl.facts").await;
    assert!(facts.contains("monotone limits") && facts.contains("mean_radius increasing, mean_texture increasing"), "{facts}");
    let main_text = text_of(&c, "main").await;
    assert!(main_text.contains("Decides") && main_text.contains("a miss 5") && main_text.contains("Bayes threshold 0.1667"), "{main_text}");
    shot(&c, "run-limits-costs").await;

    for (page, name, holds) in [("/datasets", "datasets", "iris"), ("/schedules", "schedules", "No schedule yet.")] {
        c.goto(&format!("{web}{page}")).await.unwrap();
        assert!(text_of(&c, "h1").await.to_lowercase().contains(name));
        assert!(text_of(&c, "main").await.contains(holds), "{page} shows {holds}");
        shot(&c, name).await;
    }

    // Every page's markup: no HTML5 parse error (the checker does see a broken page).
    assert!(!parse_errors("<!DOCTYPE html><html><head><title>x</title></head><body><p>a</div></body></html>").is_empty());
    let pages = ["/runs".to_string(), format!("/runs/{first}"), format!("/runs/{live_id}"), format!("/runs/{limited_id}"), "/datasets".into(), "/schedules".into(), "/sign-in".into(), "/no-such-page".into(), "/runs?state=finished&dataset=iris".into()];
    for page in &pages {
        let html = fetch_text(&c, page).await;
        assert!(html.starts_with("<!DOCTYPE html>"), "{page}: {}", &html[..html.len().min(200)]);
        let errors = parse_errors(&html);
        assert!(errors.is_empty(), "{page}: HTML parse errors: {errors:?}");
    }
    c.close().await.unwrap();

    // JavaScript off: the same pages read the same, links work.
    let c = browser(&driver_url, &profile.join("off"), false).await;
    c.goto(&format!("{web}/runs")).await.unwrap();
    c.find(Locator::Css(&format!("a[href='/runs/{first}']"))).await.unwrap().click().await.unwrap();
    until("the run page after the click, scripts off", || async { c.find(Locator::Css("table tbody tr.picked")).await.is_ok() }).await;
    assert!(!c.find_all(Locator::Css("figure svg")).await.unwrap().is_empty());
    c.goto(&format!("{web}/runs?state=finished")).await.unwrap();
    assert!(c.find_all(Locator::Css("tbody tr")).await.unwrap().len() >= 2, "both finished runs listed");
    for page in ["/datasets", "/schedules"] {
        c.goto(&format!("{web}{page}")).await.unwrap();
        assert!(c.find(Locator::Css("main h1")).await.is_ok(), "{page}");
    }
    shot(&c, "runs-no-javascript").await;
    c.close().await.unwrap();
    eprintln!("screenshots in {}", screens().display());
}

/// With tokens on: the sign-in page, a cookie pages cannot read, the role table (a reader
/// reads but may not cancel; the run's writer cancels it), and signing out.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn signing_in_with_tokens_and_the_role_table() {
    use pollard::access::tokens::{file_line, new_token};
    use pollard::access::Role;
    let (reader, writer) = (new_token().unwrap(), new_token().unwrap());
    let dir = TempDir::new("web-tokens");
    let path = dir.join("tokens");
    std::fs::write(&path, format!("{}\n{}\n", file_line("ro", Role::Reader, &reader), file_line("writer-a", Role::Writer, &writer))).unwrap();
    let options = ServeOptions {
        config: Some(format!("tokens_file = {:?}\ncpu_threads = 1\n", path.to_str().unwrap())),
        env: vec![("POLLARD_TEST_UNIT_DELAY_MS".into(), "1000".into())],
        ..ServeOptions::default()
    };
    let server = Serve::start_with(options);
    let web = server.web_url().unwrap();
    let as_writer = |args: &[&str]| {
        let mut all = vec!["--token", writer.as_str()];
        all.extend_from_slice(args);
        server.run(&all)
    };
    as_writer(&["put", data("iris.csv").to_str().unwrap(), "--name", "iris", "--target", "target"]).ok();
    let run = as_writer(&["sweep", "--dataset", "iris", "--max-depth", "1,2,3", "--k", "10", "--repeats", "5", "--json"]).json();
    let id = s(&run, "id").to_string();

    let (_driver, driver_url) = chromedriver();
    let profile = TempDir::new("chromium-tokens");
    let c = browser(&driver_url, &profile.join("p"), true).await;
    let path_is = |want: String| {
        let c = &c;
        async move { c.current_url().await.map(|u| u.path() == want).unwrap_or(false) }
    };
    let sign_in = |token: String| {
        let c = &c;
        let web = web.clone();
        async move {
            c.goto(&format!("{web}/sign-in")).await.unwrap();
            c.find(Locator::Css("#token")).await.unwrap().send_keys(&token).await.unwrap();
            c.find(Locator::Css("main button[type=submit]")).await.unwrap().click().await.unwrap();
        }
    };

    // No cookie: every page sends the browser to sign in.
    c.goto(&format!("{web}/runs/{id}")).await.unwrap();
    until("the sign-in page", || path_is("/sign-in".into())).await;
    shot(&c, "sign-in").await;
    sign_in("pollard_not_a_known_token".into()).await;
    until("the refusal of an unknown token", || async { text_now(&c, "main").await.contains("not one this server knows") }).await;

    // A reader reads, sees no cancel button, and a cancel it posts anyway is refused.
    sign_in(reader.clone()).await;
    until("the runs page after signing in", || path_is("/runs".into())).await;
    assert!(text_of(&c, "header").await.contains("signed in as ro (reader)"));
    assert_eq!(c.execute("return document.cookie.indexOf('pollard_token');", vec![]).await.unwrap(), json!(-1), "the cookie is HttpOnly");
    c.goto(&format!("{web}/runs/{id}")).await.unwrap();
    assert!(c.find_all(Locator::Css("form[action$='/cancel']")).await.unwrap().is_empty(), "a reader gets no cancel button");
    let status = c.execute_async("var done = arguments[arguments.length - 1]; fetch(arguments[0], {method: 'POST'}).then(r => done(r.status), e => done('FAILED ' + e));", vec![json!(format!("/runs/{id}/cancel"))]).await.unwrap();
    assert_eq!(status, json!(403));

    // Signing out forgets the token.
    c.find(Locator::Css("header button[type=submit]")).await.unwrap().click().await.unwrap();
    until("the sign-in page after signing out", || path_is("/sign-in".into())).await;
    c.goto(&format!("{web}/runs")).await.unwrap();
    until("the sign-in page again", || path_is("/sign-in".into())).await;

    // The writer who started the run cancels it from its page.
    sign_in(writer.clone()).await;
    until("the runs page after signing in as the writer", || path_is("/runs".into())).await;
    c.goto(&format!("{web}/runs/{id}")).await.unwrap();
    // The click only starts the form's POST: wait for the page it redirects to before
    // reloading, or a reload could abort the POST before it is sent.
    c.execute("window.pollardOldPage = true;", vec![]).await.unwrap();
    c.find(Locator::Css("form[action$='/cancel'] button")).await.unwrap().click().await.unwrap();
    until("the page the cancel redirects to", || async {
        c.execute("return window.pollardOldPage === undefined;", vec![]).await.map(|v| v == json!(true)).unwrap_or(false)
    })
    .await;
    until("the run to read cancelled", || async {
        let _ = c.refresh().await;
        text_now(&c, "dl.facts").await.contains("cancelled")
    })
    .await;
    c.close().await.unwrap();
    let shown = as_writer(&["show", &id, "--json"]).json();
    assert_eq!(s(&shown, "state"), "cancelled");
}

/// `/metrics` (this target needs Debian packages anyway: it also holds the `promtool` check,
/// from the `prometheus` package, which `.ci/run` installs): the counters move by what a
/// sweep did, and promtool accepts the text.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn metrics_count_a_sweep_and_promtool_accepts_them() {
    let server = Serve::start();
    let web = server.web_url().unwrap();
    let get = |path: &str| -> String {
        use std::io::{Read, Write};
        let addr = web.trim_start_matches("http://");
        let mut stream = TcpStream::connect(addr).unwrap();
        write!(stream, "GET {path} HTTP/1.0\r\nHost: {addr}\r\n\r\n").unwrap();
        let mut reply = String::new();
        stream.read_to_string(&mut reply).unwrap();
        let (head, body) = reply.split_once("\r\n\r\n").expect("an HTTP reply");
        assert!(head.starts_with("HTTP/1.0 200") || head.starts_with("HTTP/1.1 200"), "{head}");
        assert!(head.to_lowercase().contains("content-type: text/plain; version=0.0.4"), "{head}");
        body.to_string()
    };
    let value = |text: &str, series: &str| -> f64 {
        text.lines().find_map(|l| l.strip_prefix(series).and_then(|rest| rest.strip_prefix(' '))).unwrap_or_else(|| panic!("no {series} in:\n{text}")).trim().parse().unwrap()
    };
    let before = get("/metrics");
    server.run(&["put", data("iris.csv").to_str().unwrap(), "--name", "iris", "--target", "target"]).ok();
    let started = server.run(&["sweep", "--dataset", "iris", "--max-depth", "1,2,3", "--k", "4", "--json"]).json();
    let events = server.run(&["follow", s(&started, "id"), "--json"]).json_lines();
    assert_eq!(events.last().map(|e| s(e, "kind")), Some("finished"));
    let after = get("/metrics");
    // 4 folds of one shaping key: 4 units; one finished run; the follow saw every event.
    assert_eq!(value(&after, "pollard_units_computed_total") - value(&before, "pollard_units_computed_total"), 4.0);
    assert_eq!(value(&after, "pollard_runs_ended_total{state=\"finished\"}") - value(&before, "pollard_runs_ended_total{state=\"finished\"}"), 1.0);
    assert_eq!(value(&after, "pollard_run_seconds_count{state=\"finished\"}"), 1.0);
    assert!(value(&after, "pollard_events_streamed_total") >= events.len() as f64);
    assert_eq!(value(&after, "pollard_runs{state=\"queued\"}"), 0.0);
    assert!(value(&after, "pollard_store_bytes") > value(&before, "pollard_store_bytes"), "the upload is on disk");
    // Every unit's compute time is observed.
    assert_eq!(value(&after, "pollard_unit_seconds_count") - value(&before, "pollard_unit_seconds_count"), 4.0);
    // gRPC calls by method and status: the one StartRun answered OK, the one FollowRun
    // stream ended OK (its status is in the trailers), and a GetRun of an unknown id is
    // counted as NOT_FOUND in a trailers-only reply.
    let calls = |text: &str, method: &str, status: &str| -> f64 {
        let service = if method == "Upload" { "Datasets" } else { "Runs" };
        let series = format!("pollard_grpc_calls_total{{method=\"{method}\",service=\"pollard.v1.{service}\",status=\"{status}\"}}");
        text.lines().find_map(|l| l.strip_prefix(series.as_str()).and_then(|rest| rest.strip_prefix(' '))).map_or(0.0, |v| v.trim().parse().unwrap())
    };
    assert_eq!(calls(&after, "StartRun", "OK") - calls(&before, "StartRun", "OK"), 1.0, "{after}");
    assert_eq!(calls(&after, "FollowRun", "OK") - calls(&before, "FollowRun", "OK"), 1.0, "{after}");
    let missing = server.run(&["show", "run_00000000000000000000000000000000", "--json"]);
    assert_ne!(missing.code, Some(0), "{}", missing.describe());
    let later = get("/metrics");
    assert!(calls(&later, "GetRun", "NOT_FOUND") >= 1.0, "{later}");
    assert_eq!(calls(&later, "GetRun", "OK"), calls(&after, "GetRun", "OK"), "{later}");
    assert!(value(&later, "pollard_grpc_call_seconds_count{method=\"StartRun\",service=\"pollard.v1.Runs\"}") >= 1.0);

    let file = TempDir::new("metrics");
    let path = file.join("metrics.txt");
    std::fs::write(&path, &later).unwrap();
    let out = Command::new("promtool").args(["check", "metrics"]).stdin(std::fs::File::open(&path).unwrap()).output().expect("promtool (Debian's prometheus package; .ci/run installs it)");
    assert!(out.status.success(), "promtool check metrics:\n{}{}", String::from_utf8_lossy(&out.stdout), String::from_utf8_lossy(&out.stderr));
}

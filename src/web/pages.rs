//! The pages, as maud templates (HTML checked at compile time). Our own look: plain black on
//! white, one column, tables with their headers, visible focus for the keyboard, nothing
//! fetched from elsewhere and nothing needing JavaScript but the live progress of a running
//! run. Meaning never rides on colour alone: the picked setting is marked in words and
//! shape (◆), states are words, and the plots tell series apart by marker and line style.

use std::collections::HashMap;
use std::fmt::Write as _;

use axum::http::StatusCode;
use maud::{html, Markup, PreEscaped, DOCTYPE};

use crate::access::{Caller, Role};
use crate::job::{DatasetMeta, Fire, Run, RunOutcome, RunState};
use crate::service::schedules::ScheduleView;
use crate::sweep::{FoldPlan, FoldScheme, Metric, SettingScore};

const STYLE: &str = r#"
body { font: 15px/1.45 system-ui, sans-serif; color: #1b1b1b; background: #fff; max-width: 76rem; margin: 0 auto; padding: 0 1rem 2rem; }
header { display: flex; flex-wrap: wrap; gap: 1.2rem; align-items: baseline; border-bottom: 2px solid #1b1b1b; padding: .6rem 0; margin-bottom: 1rem; }
header .name { font-weight: 700; letter-spacing: .08em; }
a { color: #1f3d7a; }
a:focus, button:focus, input:focus, select:focus, summary:focus { outline: 3px solid #1b1b1b; outline-offset: 2px; }
.skip { position: absolute; left: -999px; }
.skip:focus { left: 1rem; top: .5rem; background: #fff; padding: .3rem; }
h1 { font-size: 1.4rem; margin: .4rem 0; } h2 { font-size: 1.15rem; margin-top: 1.8rem; border-bottom: 1px solid #999; }
table { border-collapse: collapse; margin: .5rem 0; }
th, td { padding: .2rem .55rem; border-bottom: 1px solid #ccc; text-align: right; vertical-align: top; }
th { border-bottom: 2px solid #666; }
.l { text-align: left; }
code, .mono { font-family: "DejaVu Sans Mono", monospace; font-size: .92em; }
tr.picked td { font-weight: 700; }
dl.facts { display: grid; grid-template-columns: max-content 1fr; gap: .15rem 1.2rem; }
dl.facts dt { font-weight: 600; }
dl.facts dd { margin: 0; }
form.filters { display: flex; flex-wrap: wrap; gap: .8rem; align-items: end; margin: .5rem 0 1rem; }
form.filters label { display: flex; flex-direction: column; font-size: .9rem; }
input, select, button { font: inherit; padding: .2rem .4rem; }
.note { color: #444; font-size: .92rem; }
figure { margin: 1rem 0; } figure svg { max-width: 100%; height: auto; }
.tree { overflow-x: auto; border: 1px solid #ccc; padding: .5rem; }
.failure { border-left: 4px solid #1b1b1b; padding-left: .8rem; }
@media print { header nav, form, .skip, #live-note { display: none; } a { color: inherit; text-decoration: none; } }
"#;

/// Follows a running run: updates the progress and reloads the page when the run ends.
const LIVE_JS: &str = r#"(function () {
  var box = document.getElementById('progress');
  if (!box || !window.EventSource) return;
  var source = new EventSource(box.getAttribute('data-events'));
  source.addEventListener('progress', function (e) {
    var d = JSON.parse(e.data);
    var bar = box.querySelector('progress');
    bar.max = d.total; bar.value = d.done;
    box.querySelector('.count').textContent = d.done + ' of ' + d.total + ' units';
    box.querySelector('.state').textContent = d.state;
  });
  source.addEventListener('end', function () { source.close(); window.location.reload(); });
})();"#;

fn layout(title: &str, caller: Option<&Caller>, body: Markup) -> Markup {
    html! {
        (DOCTYPE)
        html lang="en" {
            head {
                meta charset="utf-8";
                meta name="viewport" content="width=device-width, initial-scale=1";
                title { (title) " · pollard" }
                style { (PreEscaped(STYLE)) }
            }
            body {
                a.skip href="#main" { "Skip to content" }
                header {
                    span.name { "pollard" }
                    nav aria-label="sections" {
                        a href="/runs" { "Runs" } " · "
                        a href="/datasets" { "Datasets" } " · "
                        a href="/schedules" { "Schedules" }
                    }
                    @if let Some(c) = caller {
                        @if c.name.is_some() {
                            form method="post" action="/sign-out" {
                                span.note { "signed in as " (c.label()) " (" (c.role) ") " }
                                button type="submit" { "Sign out" }
                            }
                        }
                    }
                }
                main id="main" { (body) }
            }
        }
    }
}

pub fn failure(status: StatusCode, message: &str) -> Markup {
    layout(
        status.canonical_reason().unwrap_or("Error"),
        None,
        html! {
            div.failure {
                h1 { (status.as_u16()) " " (status.canonical_reason().unwrap_or("")) }
                p { (message) }
                p { a href="/runs" { "Back to the runs" } }
            }
        },
    )
}

pub fn sign_in(needs_tokens: bool, problem: Option<&str>) -> Markup {
    layout(
        "Sign in",
        None,
        html! {
            h1 { "Sign in" }
            @if !needs_tokens {
                p { "This server runs without tokens: every page is open. " a href="/runs" { "Go to the runs" } }
            } @else {
                @if let Some(p) = problem { p.failure role="alert" { (p) } }
                p { "Give a token once; this browser keeps it in a cookie that pages cannot read, until you sign out." }
                form method="post" action="/sign-in" {
                    label for="token" { "Token" } " "
                    input #token type="password" name="token" autocomplete="off" required;
                    " "
                    button type="submit" { "Sign in" }
                }
            }
        },
    )
}

/// A Unix-milliseconds time as RFC 3339 (UTC, seconds).
pub fn time(ms: i64) -> String {
    chrono::DateTime::from_timestamp_millis(ms).map_or_else(|| ms.to_string(), |t| t.to_rfc3339_opts(chrono::SecondsFormat::Secs, true))
}

fn opt_time(ms: Option<i64>) -> String {
    ms.map_or_else(|| "—".into(), time)
}

/// Percent-encodes a query value.
fn enc(s: &str) -> String {
    let mut out = String::new();
    for b in s.bytes() {
        if b.is_ascii_alphanumeric() || b"-_.~".contains(&b) {
            out.push(b as char);
        } else {
            let _ = write!(out, "%{b:02X}");
        }
    }
    out
}

/// The link to the next page: the same filters, and the page token.
fn next_link(path: &str, q: &HashMap<String, String>, keys: &[&str], next: Option<&str>) -> Markup {
    let Some(token) = next else { return html! {} };
    let mut url = format!("{path}?");
    for k in keys {
        if let Some(v) = q.get(*k).filter(|v| !v.is_empty()) {
            let _ = write!(url, "{k}={}&", enc(v));
        }
    }
    let _ = write!(url, "page={}", enc(token));
    html! { p { a rel="next" href=(url) { "Next page →" } } }
}

fn q<'a>(q: &'a HashMap<String, String>, k: &str) -> &'a str {
    q.get(k).map_or("", String::as_str)
}

pub fn runs(caller: &Caller, query: &HashMap<String, String>, runs: &[Run], next: Option<&str>) -> Markup {
    let states = [RunState::Queued, RunState::Running, RunState::Finished, RunState::Failed, RunState::Cancelled];
    layout(
        "Runs",
        Some(caller),
        html! {
            h1 { "Runs" }
            p.note { "Newest first." }
            form.filters method="get" action="/runs" role="search" {
                label { "Dataset name" input type="text" name="dataset" value=(q(query, "dataset")); }
                label { "State" select name="state" {
                    option value="" selected[q(query, "state").is_empty()] { "any" }
                    @for s in states { option value=(s.as_str()) selected[q(query, "state") == s.as_str()] { (s.as_str()) } }
                } }
                label { "Label (key=value)" input type="text" name="label" value=(q(query, "label")); }
                label { "Schedule id" input type="text" name="schedule" value=(q(query, "schedule")); }
                button type="submit" { "Show" }
            }
            @if runs.is_empty() {
                p { "No run matches." }
            } @else {
                table {
                    thead { tr {
                        th.l scope="col" { "run" } th.l scope="col" { "state" } th.l scope="col" { "dataset" } th.l scope="col" { "target" }
                        th scope="col" { "units done" } th.l scope="col" { "created (UTC)" } th.l scope="col" { "labels" }
                    } }
                    tbody {
                        @for r in runs {
                            tr {
                                td.l.mono { a href={ "/runs/" (r.id) } { (r.id) } }
                                td.l { (r.state.as_str()) }
                                td.l { (r.dataset_name) " v" (r.dataset_version) }
                                td.l { (r.target) }
                                td { (r.units_done) " / " (r.units_total) }
                                td.l { (time(r.created_at)) }
                                td.l.mono { (labels(&r.labels)) }
                            }
                        }
                    }
                }
            }
            (next_link("/runs", query, &["dataset", "state", "label", "schedule"], next))
        },
    )
}

fn labels(l: &std::collections::BTreeMap<String, String>) -> String {
    l.iter().map(|(k, v)| format!("{k}={v}")).collect::<Vec<_>>().join(" ")
}

fn fold_plan(p: Option<&FoldPlan>) -> String {
    let Some(p) = p else { return "the task's default".into() };
    let scheme = match &p.scheme {
        FoldScheme::Shuffled => "shuffled".to_string(),
        FoldScheme::Stratified => "stratified".to_string(),
        FoldScheme::Grouped { column } => format!("grouped by {column}"),
        FoldScheme::Forward { column } => format!("forward in {column}"),
        FoldScheme::Given { column } => format!("given by {column}"),
    };
    format!("{scheme}, {} folds, {} repeat{}", p.k, p.repeats, if p.repeats == 1 { "" } else { "s" })
}

/// Monotone limits in words, in the order given: `age increasing, debt decreasing`.
fn monotone_limits(limits: &[(String, crate::tree::Monotone)]) -> String {
    limits.iter().map(|(f, m)| format!("{f} {}", m.as_str())).collect::<Vec<_>>().join(", ")
}

/// A score with four decimals; `n/a` when undefined.
fn score(v: f64) -> String {
    if v.is_finite() {
        format!("{v:.4}")
    } else {
        "n/a".into()
    }
}

/// The knob columns of the score table: (short name, long name, value of a setting).
fn knobs() -> [(&'static str, &'static str, fn(&SettingScore) -> String); 8] {
    fn opt(v: Option<u32>) -> String {
        v.map_or_else(|| "none".into(), |v| v.to_string())
    }
    [
        ("depth", "max_depth", |s| opt(s.setting.options.limits.max_depth)),
        ("split", "min_split_rows", |s| s.setting.options.limits.min_split_rows.to_string()),
        ("leaf", "min_leaf_rows", |s| s.setting.options.limits.min_leaf_rows.to_string()),
        ("leaf_cap", "max_leaves", |s| opt(s.setting.options.limits.max_leaves)),
        ("gain", "min_gain", |s| format!("{}", s.setting.options.limits.min_gain)),
        ("alpha", "prune_alpha", |s| format!("{}", s.setting.options.limits.prune_alpha)),
        ("criterion", "split criterion", |s| s.setting.options.criterion.map_or("default", |c| c.as_str()).to_string()),
        ("weight", "class weighting", |s| s.setting.options.class_weight.as_str().to_string()),
    ]
}

/// The knob columns whose values vary over the run's settings (only those get a column).
fn varying_knobs(o: &RunOutcome) -> Vec<(&'static str, &'static str, fn(&SettingScore) -> String)> {
    knobs().into_iter().filter(|(_, _, f)| o.scores.iter().map(f).collect::<std::collections::BTreeSet<_>>().len() > 1).collect()
}

/// Most rows of the score table on the run page.
pub const SCORE_ROWS: usize = 40;

pub fn run(caller: &Caller, run: &Run, outcome: Option<&RunOutcome>) -> Markup {
    let metric = run.spec.metric;
    let can_cancel = !run.state.is_terminal() && caller.role >= Role::Writer && caller.owns(run.owner.as_deref());
    layout(
        &run.id,
        Some(caller),
        html! {
            h1 { "Run " span.mono { (run.id) } }
            dl.facts {
                dt { "state" } dd { (run.state.as_str()) @if let Some(r) = &run.reason { " — " (r) } }
                dt { "dataset" } dd { a href={ "/runs?dataset=" (enc(&run.dataset_name)) } { (run.dataset_name) } " version " (run.dataset_version) ", " (run.dataset_rows) " rows " span.mono { "(" (run.dataset_id) ")" } }
                dt { "target" } dd { (run.target) @if let Some(t) = run.spec.task { " (" (t.as_str()) ")" } }
                dt { "metric" } dd { @if let Some(m) = metric { (m.as_str()) " (" (if m.higher_is_better() { "higher" } else { "lower" }) " is better)" } @else { "the task's default" } }
                dt { "pick rule" } dd { (run.spec.pick.as_str()) }
                dt { "fold plan" } dd { (fold_plan(run.spec.folds.as_ref())) ", seed " (run.spec.seed) }
                @if !run.spec.monotone.is_empty() { dt { "monotone limits" } dd { (monotone_limits(&run.spec.monotone)) } }
                dt { "settings" } dd { (run.settings) }
                dt { "created" } dd { (time(run.created_at)) }
                dt { "started" } dd { (opt_time(run.started_at)) }
                dt { "ended" } dd { (opt_time(run.finished_at)) }
                @if let Some(o) = &run.owner { dt { "started by" } dd { (o) } }
                @if let Some(s) = &run.schedule_id { dt { "schedule" } dd { a.mono href={ "/schedules/" (s) } { (s) } } }
                @if !run.labels.is_empty() { dt { "labels" } dd.mono { (labels(&run.labels)) } }
            }
            @if !run.state.is_terminal() {
                section #progress data-events={ "/runs/" (run.id) "/events?after=" (run.next_sequence.saturating_sub(1)) } aria-live="polite" {
                    h2 { "Progress" }
                    p { span.state { (run.state.as_str()) } ": " span.count { (run.units_done) " of " (run.units_total) " units" } }
                    progress max=(run.units_total.max(1)) value=(run.units_done) { (run.units_done) " of " (run.units_total) }
                    p #live-note .note { "This page follows the run while it is open; without JavaScript, reload it to see new progress." }
                }
                @if can_cancel {
                    form method="post" action={ "/runs/" (run.id) "/cancel" } {
                        button type="submit" { "Cancel this run" }
                    }
                }
                script { (PreEscaped(LIVE_JS)) }
            }
            @if let (Some(o), Some(m)) = (outcome, metric) {
                (scores(run, o, m))
                (front(o, m))
                @if let Some(n) = &o.nested { (nested(n, m)) }
                (importances(o, m))
                (plots(o, m))
                (tree(run, o))
                (downloads(run, o))
            }
        },
    )
}

/// What nested cross-validation measured: the outer estimate and the optimism of the inner
/// best, then one row per outer split.
fn nested(n: &crate::sweep::NestedResult, m: Metric) -> Markup {
    html! {
        section #nested {
            h2 { "Nested cross-validation" }
            p {
                "Outer " (m.as_str()) " " (score(n.outer_mean)) " ± " (score(n.outer_sd)) " (sd over " (n.folds.len()) " outer splits); "
                "optimism of the inner best " (score(n.optimism)) " (the inner best's lead over the outer score, so larger means more optimistic; "
                (if m.higher_is_better() { "higher" } else { "lower" }) " " (m.as_str()) " is better)."
            }
            table {
                thead { tr { th { "outer split" } th { "picked grid#" } th { "inner best" } th { "inner picked" } th { "outer" } th { "leaves" } } }
                tbody {
                    @for f in &n.folds {
                        tr { td { (f.repeat) "." (f.fold) } td { (f.picked) } td { (score(f.inner_best)) } td { (score(f.inner_picked)) } td { (score(f.outer_score)) } td { (f.leaves) } }
                    }
                }
            }
        }
    }
}

fn scores(run: &Run, o: &RunOutcome, m: Metric) -> Markup {
    let hib = m.higher_is_better();
    let picked = o.picked as usize;
    let mut order: Vec<usize> = (0..o.scores.len()).filter(|&i| i != picked).collect();
    order.sort_by(|&a, &b| {
        let (x, y) = (o.scores[a].valid_mean, o.scores[b].valid_mean);
        let c = if hib { y.total_cmp(&x) } else { x.total_cmp(&y) };
        c.then(a.cmp(&b))
    });
    if picked < o.scores.len() {
        order.insert(0, picked);
    }
    let shown = order.len().min(SCORE_ROWS);
    let knobs = varying_knobs(o);
    let gap = |s: &SettingScore| if hib { s.gap } else { -s.gap };
    html! {
        section {
            h2 { "Scores" }
            p.note {
                "Mean " (m.as_str()) " over the folds (" (if hib { "higher" } else { "lower" }) " is better): "
                "train on the training rows, valid on the held-out rows; gap is oriented so that larger means more overfit. "
                "The picked setting (" (run.spec.pick.as_str()) " rule) comes first, marked ◆; then best first."
                @if order.len() > shown { " Showing " (shown) " of " (order.len()) " settings." }
            }
            @if !knobs.is_empty() {
                p.note { "columns: " @for (i, (short, long, _)) in knobs.iter().enumerate() { @if i > 0 { ", " } code { (short) } " = " (long) } }
            }
            table {
                thead { tr {
                    th.l scope="col" { "" }
                    @for (short, _, _) in &knobs { th scope="col" { (short) } }
                    th scope="col" { "train" } th scope="col" { "valid" } th scope="col" { "sd" } th scope="col" { "gap" } th scope="col" { "leaves" }
                } }
                tbody {
                    @for &i in order.iter().take(shown) {
                        @let s = &o.scores[i];
                        tr.picked[i == picked] {
                            td.l { @if i == picked { "◆ picked" } @else if i == o.best as usize { "best" } }
                            @for (_, _, f) in &knobs { td { (f(s)) } }
                            td { (score(s.train_mean)) } td { (score(s.valid_mean)) } td { (score(s.valid_sd)) } td { (score(gap(s))) } td { (format!("{:.1}", s.mean_leaves)) }
                        }
                    }
                }
            }
        }
    }
}

/// The Pareto front of (validation score, mean leaves), fewest leaves first: the settings a
/// reader who trades score against size can choose among, as `pollard show` lists them.
fn front(o: &RunOutcome, m: Metric) -> Markup {
    let front = crate::sweep::pareto_front(&o.scores, m);
    let knobs = varying_knobs(o);
    html! {
        @if !front.is_empty() {
            section #front {
                h2 { "Score against size" }
                p.note { "No other setting has a mean " (m.as_str()) " at least as good with no more mean leaves (and one of the two strictly better) than these; fewest leaves first." }
                table {
                    thead { tr {
                        @for (short, _, _) in &knobs { th scope="col" { (short) } }
                        th scope="col" { "leaves" } th scope="col" { "valid" } th scope="col" { "sd" }
                    } }
                    tbody {
                        @for &i in &front {
                            @let s = &o.scores[i];
                            tr {
                                @for (_, _, f) in &knobs { td { (f(s)) } }
                                td { (format!("{:.1}", s.mean_leaves)) } td { (score(s.valid_mean)) } td { (score(s.valid_sd)) }
                            }
                        }
                    }
                }
            }
        }
    }
}

/// What the picked setting leans on: permutation drops over the validation folds and the
/// model's impurity shares, most first, as in `pollard show`.
fn importances(o: &RunOutcome, m: Metric) -> Markup {
    let shares = o.model.as_ref().map(|t| t.impurity_importances());
    let (mean, sd) = o.permutation.as_ref().map(|p| (p.mean(), p.sd())).unzip();
    let names: Vec<String> = match (&o.permutation, &o.model) {
        (Some(p), _) => p.features.clone(),
        (None, Some(t)) => t.columns.iter().map(|c| c.name.clone()).collect(),
        (None, None) => Vec::new(),
    };
    let key = |j: usize| mean.as_ref().or(shares.as_ref()).and_then(|v| v.get(j).copied()).unwrap_or(0.0);
    let mut order: Vec<usize> = (0..names.len()).collect();
    order.sort_by(|&a, &b| key(b).total_cmp(&key(a)).then(a.cmp(&b)));
    let cell = |v: &Option<Vec<f64>>, j: usize| v.as_ref().and_then(|v| v.get(j)).map_or("–".to_string(), |x| format!("{x:.4}"));
    html! {
        @if !names.is_empty() {
            section {
                h2 { "Importances" }
                p.note {
                    @if let Some(p) = &o.permutation {
                        "shuffled: the drop in " (m.as_str()) " when the feature's values are shuffled among a validation fold's rows ("
                        (p.repeats) " shuffles per fold), mean and sd over " (p.per_fold.len()) " folds, larger means the picked setting leans on it more. "
                    }
                    "share: the feature's share of the model's total impurity decrease."
                }
                table {
                    thead { tr { th.l scope="col" { "feature" } th scope="col" { "shuffled" } th scope="col" { "sd" } th scope="col" { "share" } } }
                    tbody {
                        @for &j in order.iter().take(SCORE_ROWS) {
                            tr { td.l { (names[j]) } td { (cell(&mean, j)) } td { (cell(&sd, j)) } td { (cell(&shares, j)) } }
                        }
                    }
                }
            }
        }
    }
}

fn plots(o: &RunOutcome, m: Metric) -> Markup {
    let svgs = crate::cli::plots::limit_svgs(&o.scores, m, Some(o.picked as usize));
    html! {
        section {
            h2 { "Plots" }
            @if svgs.is_empty() { p { "No limit took more than one value, so there is nothing to plot." } }
            @for (limit, svg) in &svgs {
                figure {
                    (PreEscaped(strip_xml_declaration(svg)))
                    figcaption { "Training (dashed, open squares) and validation (solid, filled circles) against " code { (limit) } "." }
                }
            }
        }
    }
}

/// An SVG document's text without its XML declaration, to sit inside HTML.
fn strip_xml_declaration(svg: &str) -> &str {
    match svg.strip_prefix("<?xml") {
        Some(rest) => rest.split_once("?>").map_or(svg, |(_, body)| body.trim_start()),
        None => svg,
    }
}

fn tree(run: &Run, o: &RunOutcome) -> Markup {
    html! {
        section {
            h2 { "Picked tree" }
            @match &o.model {
                None => p { "This run kept no model." },
                Some(t) => {
                    @if let Some(d) = t.decision {
                        p { "Decides " (t.labels.get(1).map_or("class 1", String::as_str)) " when its probability is at least " (format!("{:.4}", d.threshold)) ", the threshold with the lowest cost on the validation folds for a false alarm costing " (d.false_alarm) " and a miss " (d.miss) " (Bayes threshold " (format!("{:.4}", d.false_alarm / (d.false_alarm + d.miss))) ")." }
                    }
                    @match crate::export::to_svg(t) {
                        Some(svg) => div.tree { (PreEscaped(svg)) },
                        None => p { "The tree has more than " (crate::export::svg::MAX_DRAWN_LEAVES) " leaves, too many to draw here; see " a href={ "/runs/" (run.id) "/model/model.txt" } { "the text" } "." },
                    }
                }
            }
        }
    }
}

fn downloads(run: &Run, o: &RunOutcome) -> Markup {
    html! {
        section {
            h2 { "Downloads" }
            ul {
                @if o.model.is_some() {
                    @for (file, _, _) in super::MODEL_FILES {
                        li { a href={ "/runs/" (run.id) "/model/" (file) } download { "model as " (file.rsplit('.').next().unwrap_or(file).to_uppercase()) } }
                    }
                }
                li { a href={ "/runs/" (run.id) "/folds.csv" } download { "fold assignment (CSV: row, repeat, fold)" } }
            }
        }
    }
}

pub fn datasets(caller: &Caller, query: &HashMap<String, String>, list: &[DatasetMeta], next: Option<&str>) -> Markup {
    layout(
        "Datasets",
        Some(caller),
        html! {
            h1 { "Datasets" }
            p.note { "Newest first; each upload under a name is a new version." }
            form.filters method="get" action="/datasets" role="search" {
                label { "Name" input type="text" name="name" value=(q(query, "name")); }
                button type="submit" { "Show" }
            }
            @if list.is_empty() { p { "No dataset matches." } } @else {
                table {
                    thead { tr {
                        th.l scope="col" { "name" } th scope="col" { "version" } th scope="col" { "rows" } th scope="col" { "columns" }
                        th.l scope="col" { "target" } th.l scope="col" { "created (UTC)" } th scope="col" { "bytes" } th.l scope="col" { "id" }
                    } }
                    tbody {
                        @for d in list {
                            tr {
                                td.l { a href={ "/runs?dataset=" (enc(&d.name)) } { (d.name) } }
                                td { (d.version) } td { (d.rows) } td { (d.columns.len()) }
                                td.l { (d.target.as_deref().unwrap_or("—")) @if let Some(t) = d.task { " (" (t.as_str()) ")" } }
                                td.l { (time(d.created_at)) } td { (d.bytes) }
                                td.l.mono { (d.id.chars().take(15).collect::<String>()) "…" }
                            }
                        }
                    }
                }
            }
            (next_link("/datasets", query, &["name"], next))
        },
    )
}

pub fn schedules(caller: &Caller, query: &HashMap<String, String>, list: &[ScheduleView], next: Option<&str>) -> Markup {
    layout(
        "Schedules",
        Some(caller),
        html! {
            h1 { "Schedules" }
            @if list.is_empty() { p { "No schedule yet." } } @else {
                table {
                    thead { tr {
                        th.l scope="col" { "schedule" } th.l scope="col" { "name" } th.l scope="col" { "when" } th.l scope="col" { "dataset" }
                        th.l scope="col" { "state" } th.l scope="col" { "next fire (UTC)" } th.l scope="col" { "last fire" }
                    } }
                    tbody {
                        @for v in list {
                            @let s = &v.schedule;
                            tr {
                                td.l.mono { a href={ "/schedules/" (s.id) } { (s.id) } }
                                td.l { (s.name) }
                                td.l.mono { (s.cron) " " (s.time_zone) }
                                td.l { (s.dataset_name) }
                                td.l { (if s.paused { "paused" } else { "active" }) }
                                td.l { (opt_time(v.next_fire)) }
                                td.l { @if let Some(f) = &v.last_fire { (f.outcome.as_str()) " at " (time(f.handled_at)) } @else { "—" } }
                            }
                        }
                    }
                }
            }
            (next_link("/schedules", query, &[], next))
        },
    )
}

/// One finished run of a schedule for its drift history: validation score, its standard
/// error over the folds, and the picked tree's mean leaves.
pub struct NightScore {
    pub run: Run,
    pub valid: f64,
    pub se: f64,
    pub leaves: f64,
}

pub fn schedule(caller: &Caller, view: &ScheduleView, fires: &[Fire], next: Option<&str>, history: &[NightScore]) -> Markup {
    let s = &view.schedule;
    layout(
        &s.id,
        Some(caller),
        html! {
            h1 { "Schedule " span.mono { (s.id) } }
            dl.facts {
                dt { "name" } dd { (s.name) }
                dt { "when" } dd.mono { (s.cron) " in " (s.time_zone) }
                dt { "dataset" } dd { (s.dataset_name) @if let Some(id) = &s.dataset_id { " " span.mono { "(" (id) ")" } } }
                dt { "target" } dd { (s.target) }
                dt { "state" } dd { (if s.paused { "paused" } else { "active" }) }
                dt { "next fire" } dd { (opt_time(view.next_fire)) }
                dt { "runs" } dd { a href={ "/runs?schedule=" (s.id) } { "every run of this schedule" } }
            }
            h2 { "Drift history" }
            @if history.is_empty() { p { "No finished run yet." } } @else {
                figure {
                    (PreEscaped(drift_svg(history)))
                    figcaption { "Validation score (filled circles, solid line, bars ± one standard error) and the picked tree's leaves (open squares, dashed line), oldest run first." }
                }
                table {
                    thead { tr { th.l scope="col" { "run" } th.l scope="col" { "created (UTC)" } th scope="col" { "valid" } th scope="col" { "± se" } th scope="col" { "leaves" } } }
                    tbody {
                        @for n in history.iter().rev() {
                            tr {
                                td.l.mono { a href={ "/runs/" (n.run.id) } { (n.run.id) } }
                                td.l { (time(n.run.created_at)) }
                                td { (score(n.valid)) } td { (score(n.se)) } td { (format!("{:.1}", n.leaves)) }
                            }
                        }
                    }
                }
            }
            h2 { "Fires" }
            @if fires.is_empty() { p { "No fire yet." } } @else {
                table {
                    thead { tr { th.l scope="col" { "for (UTC)" } th.l scope="col" { "handled (UTC)" } th.l scope="col" { "outcome" } th.l scope="col" { "run" } th scope="col" { "missed" } th.l scope="col" { "detail" } } }
                    tbody {
                        @for f in fires {
                            tr {
                                td.l { (time(f.scheduled_for)) } td.l { (time(f.handled_at)) } td.l { (f.outcome.as_str()) }
                                td.l.mono { @if let Some(r) = &f.run_id { a href={ "/runs/" (r) } { (r) } } @else { "—" } }
                                td { (f.missed) } td.l { (f.detail.as_deref().unwrap_or("")) }
                            }
                        }
                    }
                }
            }
            (next_link(&format!("/schedules/{}", s.id), &HashMap::new(), &[], next))
        },
    )
}

/// Two stacked panels over the runs, oldest first: the validation score with ± one standard
/// error, and the picked tree's mean leaves. Plum filled circles with a solid line for the
/// score, olive open squares with a dashed line for the leaves, as in the limit plots.
fn drift_svg(history: &[NightScore]) -> String {
    let (w, panel, left, top) = (720.0, 150.0, 70.0, 20.0);
    let n = history.len();
    let xs = |i: usize| if n == 1 { left + (w - left - 20.0) / 2.0 } else { left + (w - left - 20.0) * i as f64 / (n - 1) as f64 };
    let mut out = String::new();
    let h = top + 2.0 * panel + 60.0;
    let _ = write!(out, r#"<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {w} {h}" width="{w}" height="{h}" role="img" aria-label="drift history" font-family="DejaVu Sans Mono, monospace" font-size="11">"#);
    let series: [(&str, Vec<(f64, f64)>, &str); 2] = [
        ("valid", history.iter().map(|n| (n.valid, if n.se.is_finite() { n.se } else { 0.0 })).collect(), "#6d3b6b"),
        ("leaves", history.iter().map(|n| (n.leaves, 0.0)).collect(), "#5f6b1f"),
    ];
    for (p, (name, values, colour)) in series.iter().enumerate() {
        let y0 = top + p as f64 * (panel + 20.0);
        let finite: Vec<f64> = values.iter().filter(|(v, _)| v.is_finite()).flat_map(|(v, e)| [v - e, v + e]).collect();
        let (mut lo, mut hi) = finite.iter().fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), &v| (a.min(v), b.max(v)));
        if !lo.is_finite() {
            (lo, hi) = (0.0, 1.0);
        }
        if hi - lo < 1e-12 {
            (lo, hi) = (lo - 0.5, hi + 0.5);
        }
        let ys = |v: f64| y0 + panel - 10.0 - (v - lo) / (hi - lo) * (panel - 20.0);
        let _ = write!(out, r##"<rect x="{left}" y="{y0}" width="{}" height="{panel}" fill="none" stroke="#999"/>"##, w - left - 10.0);
        let _ = write!(out, r#"<text x="6" y="{:.1}">{name}</text><text x="{:.1}" y="{:.1}" text-anchor="end">{}</text><text x="{:.1}" y="{:.1}" text-anchor="end">{}</text>"#, y0 + panel / 2.0, left - 4.0, ys(hi) + 4.0, score(hi), left - 4.0, ys(lo) + 4.0, score(lo));
        let points: Vec<String> = values.iter().enumerate().filter(|(_, (v, _))| v.is_finite()).map(|(i, (v, _))| format!("{:.1},{:.1}", xs(i), ys(*v))).collect();
        let dash = if p == 0 { "" } else { r#" stroke-dasharray="5 4""# };
        let _ = write!(out, r#"<polyline points="{}" fill="none" stroke="{colour}" stroke-width="1.5"{dash}/>"#, points.join(" "));
        for (i, (v, e)) in values.iter().enumerate().filter(|(_, (v, _))| v.is_finite()) {
            let (x, y) = (xs(i), ys(*v));
            if *e > 0.0 {
                let _ = write!(out, r#"<line x1="{x:.1}" y1="{:.1}" x2="{x:.1}" y2="{:.1}" stroke="{colour}"/>"#, ys(v - e), ys(v + e));
            }
            let title = format!("<title>{}: {name} {}</title>", history[i].run.id, score(*v));
            if p == 0 {
                let _ = write!(out, r#"<circle cx="{x:.1}" cy="{y:.1}" r="4" fill="{colour}">{title}</circle>"#);
            } else {
                let _ = write!(out, r##"<rect x="{:.1}" y="{:.1}" width="8" height="8" fill="#fff" stroke="{colour}" stroke-width="1.5">{title}</rect>"##, x - 4.0, y - 4.0);
            }
        }
    }
    let _ = write!(out, r#"<text x="{left}" y="{:.1}">oldest</text><text x="{:.1}" y="{:.1}" text-anchor="end">newest</text>"#, h - 12.0, w - 10.0, h - 12.0);
    out.push_str("</svg>");
    out
}

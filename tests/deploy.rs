//! Checks the files under `deploy/` against the program they deploy: every YAML file parses,
//! every configuration (the sample file and the one inside the ConfigMap) loads through
//! `pollard::config::Config::load`, the gRPC probes name services the server registers, the
//! ports and paths agree across the Containerfile, the manifests and the config, and the
//! systemd unit uses only known options and only the flags `pollard serve` accepts.

use std::collections::{BTreeMap, HashMap};
use std::path::{Path, PathBuf};

use pollard::config::{Config, Flags};
use serde::Deserialize;
use serde_yaml_ng::Value;

fn deploy_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("deploy")
}

fn files_under(dir: &Path, out: &mut Vec<PathBuf>) {
    for e in std::fs::read_dir(dir).unwrap_or_else(|e| panic!("{}: {e}", dir.display())) {
        let p = e.unwrap().path();
        if p.is_dir() {
            files_under(&p, out);
        } else {
            out.push(p);
        }
    }
}

fn deploy_files(ext: &[&str]) -> Vec<PathBuf> {
    let mut all = Vec::new();
    files_under(&deploy_dir(), &mut all);
    all.retain(|p| p.extension().and_then(|e| e.to_str()).is_some_and(|e| ext.contains(&e)));
    all.sort();
    all
}

fn read(p: &Path) -> String {
    std::fs::read_to_string(p).unwrap_or_else(|e| panic!("{}: {e}", p.display()))
}

/// Every document of a YAML file (`---` separated), empty documents left out.
fn yaml_docs(p: &Path) -> Vec<Value> {
    let text = read(p);
    let mut docs = Vec::new();
    for d in serde_yaml_ng::Deserializer::from_str(&text) {
        let v = Value::deserialize(d).unwrap_or_else(|e| panic!("{}: {e}", p.display()));
        if !v.is_null() {
            docs.push(v);
        }
    }
    docs
}

/// The compose file (deploy/compose/): YAML, but not Kubernetes objects.
fn compose_file() -> PathBuf {
    deploy_dir().join("compose/compose.yaml")
}

/// The Kubernetes manifests: every YAML file under deploy/ but the compose file.
fn kubernetes_files() -> Vec<PathBuf> {
    deploy_files(&["yaml", "yml"]).into_iter().filter(|p| *p != compose_file()).collect()
}

/// Every Kubernetes object in deploy/, with the file it came from.
fn manifests() -> Vec<(PathBuf, Value)> {
    kubernetes_files().into_iter().flat_map(|p| yaml_docs(&p).into_iter().map(move |d| (p.clone(), d))).collect()
}

fn of_kind(kind: &str) -> Vec<Value> {
    manifests().into_iter().filter(|(_, d)| d["kind"].as_str() == Some(kind)).map(|(_, d)| d).collect()
}

fn scratch(name: &str) -> PathBuf {
    let dir = std::env::temp_dir().join(format!("pollard-deploy-test-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    dir.join(name)
}

/// Loads a config file the way `pollard serve --config FILE` does, with no environment.
fn load(config_file: &Path, listen: Option<&String>, data: Option<&String>) -> Result<Config, String> {
    let flags = Flags { config_file: Some(config_file.to_path_buf()), listen: listen.cloned(), data_dir: data.cloned(), ..Flags::default() };
    Config::load(&flags, &|_| None)
}

/// The flags after `serve` in a command line, checked against what `pollard serve` accepts
/// (`--listen ADDR`, `--data DIR`, `--config FILE`, each at most once).
fn serve_flags(argv: &[String], what: &str) -> HashMap<String, String> {
    assert!(argv.len() >= 2, "{what}: too short: {argv:?}");
    assert!(argv[0].starts_with('/') && argv[0].ends_with("/pollard"), "{what}: the program should be an absolute path to pollard, not '{}'", argv[0]);
    assert_eq!(argv[1], "serve", "{what}: the subcommand should be serve");
    let mut flags = HashMap::new();
    let mut it = argv[2..].iter();
    while let Some(a) = it.next() {
        let name = a.strip_prefix("--").unwrap_or_else(|| panic!("{what}: '{a}' is not a flag"));
        assert!(["listen", "data", "config"].contains(&name), "{what}: pollard serve takes no flag --{name}");
        let v = it.next().unwrap_or_else(|| panic!("{what}: --{name} needs a value"));
        assert!(!v.starts_with("--"), "{what}: --{name} needs a value, got {v}");
        assert!(flags.insert(name.to_string(), v.clone()).is_none(), "{what}: --{name} given twice");
    }
    flags
}

/// The keys of the config file, read from `FileConfig` in src/config.rs so a key added
/// there must also be added to the sample.
fn config_keys() -> Vec<String> {
    let src = read(&Path::new(env!("CARGO_MANIFEST_DIR")).join("src/config.rs"));
    let start = src.find("struct FileConfig {").expect("src/config.rs has struct FileConfig");
    let body = &src[start..];
    let body = &body[body.find('{').unwrap() + 1..body.find('}').unwrap()];
    let keys: Vec<String> = body.lines().filter_map(|l| l.trim().split_once(':')).map(|(k, _)| k.trim().to_string()).filter(|k| !k.is_empty() && !k.starts_with("//")).collect();
    assert!(keys.len() >= 10, "read only {keys:?} from FileConfig");
    keys
}

// ---------------------------------------------------------------------------------------
// YAML and TOML

#[test]
fn every_yaml_file_parses_into_kubernetes_objects() {
    let files = kubernetes_files();
    assert!(files.len() >= 4, "expected the Kubernetes manifests under deploy/, found {files:?}");
    for f in &files {
        let docs = yaml_docs(f);
        assert!(!docs.is_empty(), "{}: no document", f.display());
        for d in &docs {
            assert!(d["apiVersion"].as_str().is_some() && d["kind"].as_str().is_some(), "{}: a document without apiVersion and kind", f.display());
        }
    }
    // service.yaml holds two documents; the multi-document reading must see both.
    let services = of_kind("Service");
    assert_eq!(services.len(), 3, "expected the headless and the ClusterIP Service, and the replicas' Service");
    // A kustomization lists exactly the other manifests beside it.
    for (path, d) in manifests() {
        if d["kind"].as_str() == Some("Kustomization") {
            let dir = path.parent().unwrap();
            let mut listed: Vec<String> = d["resources"].as_sequence().expect("resources").iter().map(|r| r.as_str().unwrap().to_string()).collect();
            let mut beside: Vec<String> = kubernetes_files().iter().filter(|p| p.parent() == Some(dir) && *p != &path).map(|p| p.file_name().unwrap().to_string_lossy().into_owned()).collect();
            listed.sort();
            beside.sort();
            assert_eq!(listed, beside, "{}: resources should list the manifests beside it", path.display());
        }
    }
}

#[test]
fn every_config_loads_through_config_load() {
    let tomls = deploy_files(&["toml"]);
    assert!(!tomls.is_empty(), "no TOML file under deploy/");
    for f in &tomls {
        load(f, None, None).unwrap_or_else(|e| panic!("{}: {e}", f.display()));
    }
    // The sample names every key the server reads.
    let sample = deploy_dir().join("pollard.toml");
    let table: toml::Table = toml::from_str(&read(&sample)).unwrap();
    for k in config_keys() {
        assert!(table.contains_key(&k), "deploy/pollard.toml leaves out the key {k}");
    }
    // The config files inside ConfigMaps.
    let mut embedded = 0;
    for cm in of_kind("ConfigMap") {
        for (name, text) in cm["data"].as_mapping().expect("ConfigMap data") {
            let (name, text) = (name.as_str().unwrap(), text.as_str().unwrap());
            if name.ends_with(".toml") {
                let p = scratch(name);
                std::fs::write(&p, text).unwrap();
                load(&p, None, None).unwrap_or_else(|e| panic!("ConfigMap {}: {name}: {e}", cm["metadata"]["name"].as_str().unwrap_or("?")));
                embedded += 1;
            }
        }
    }
    assert!(embedded >= 1, "no pollard.toml in a ConfigMap");
}

// ---------------------------------------------------------------------------------------
// Containerfile

struct Containerfile {
    /// (image, stage name) of each FROM.
    stages: Vec<(String, Option<String>)>,
    /// Every instruction, continuation lines joined: (INSTRUCTION, rest).
    instructions: Vec<(String, String)>,
}

fn containerfile() -> Containerfile {
    let text = read(&deploy_dir().join("Containerfile"));
    let mut instructions = Vec::new();
    let mut current = String::new();
    for line in text.lines() {
        let t = line.trim();
        if current.is_empty() && (t.is_empty() || t.starts_with('#')) {
            continue;
        }
        if let Some(head) = t.strip_suffix('\\') {
            current.push_str(head);
            current.push(' ');
            continue;
        }
        current.push_str(t);
        let (ins, rest) = current.split_once(char::is_whitespace).unwrap_or((&current, ""));
        instructions.push((ins.to_uppercase(), rest.trim().to_string()));
        current.clear();
    }
    assert!(current.is_empty(), "Containerfile ends inside a continued line");
    let stages = instructions
        .iter()
        .filter(|(i, _)| i == "FROM")
        .map(|(_, r)| {
            let w: Vec<&str> = r.split_whitespace().collect();
            let name = (w.len() == 3 && w[1].eq_ignore_ascii_case("as")).then(|| w[2].to_string());
            (w[0].to_string(), name)
        })
        .collect();
    Containerfile { stages, instructions }
}

impl Containerfile {
    /// Instructions of the final stage.
    fn last_stage(&self) -> Vec<(String, String)> {
        let start = self.instructions.iter().rposition(|(i, _)| i == "FROM").unwrap();
        self.instructions[start..].to_vec()
    }
    fn entrypoint(&self) -> Vec<String> {
        let e: Vec<_> = self.last_stage().into_iter().filter(|(i, _)| i == "ENTRYPOINT").collect();
        assert_eq!(e.len(), 1, "one ENTRYPOINT in the final stage");
        serde_json::from_str(&e[0].1).expect("ENTRYPOINT in exec (JSON array) form")
    }
}

#[test]
fn containerfile_builds_in_one_stage_and_runs_in_another() {
    let c = containerfile();
    assert!(c.stages.len() >= 2, "a multi-stage build: {:?}", c.stages);
    let (builder, builder_name) = &c.stages[0];
    assert!(builder.contains("rust:"), "the first stage builds on a Rust image, not {builder}");
    let builder_name = builder_name.as_ref().expect("the build stage is named");
    assert!(c.instructions.iter().any(|(i, r)| i == "RUN" && r.contains("cargo build --release --locked")), "the build runs cargo build --release --locked");
    let (runtime, _) = c.stages.last().unwrap();
    assert!(runtime.contains("debian:") && runtime.contains("slim"), "the runtime is a slim Debian image, not {runtime}");
    let last = c.last_stage();
    assert!(last.iter().any(|(i, r)| i == "COPY" && r.contains(&format!("--from={builder_name}"))), "the runtime copies the binary from the build stage");
    let users: Vec<&String> = last.iter().filter(|(i, _)| i == "USER").map(|(_, r)| r).collect();
    let user = users.last().expect("a USER in the final stage");
    let uid = user.split(':').next().unwrap();
    assert!(uid != "0" && uid != "root", "the container runs as a non-root user, not {user}");
    // The entrypoint's flags are ones pollard serve takes, and its data dir is the volume.
    let flags = serve_flags(&c.entrypoint(), "Containerfile ENTRYPOINT");
    assert_eq!(flags.get("listen").map(String::as_str), Some("0.0.0.0:7311"));
    assert_eq!(flags.get("data").map(String::as_str), Some("/data"));
    let volumes: Vec<&String> = last.iter().filter(|(i, _)| i == "VOLUME").map(|(_, r)| r).collect();
    assert!(volumes.iter().any(|v| v.contains("\"/data\"") || v.split_whitespace().any(|w| w == "/data")), "VOLUME /data");
    let exposed: Vec<u16> = last.iter().filter(|(i, _)| i == "EXPOSE").flat_map(|(_, r)| r.split_whitespace().map(|p| p.trim_end_matches("/tcp").parse::<u16>().unwrap()).collect::<Vec<_>>()).collect();
    assert_eq!(exposed, vec![7311], "EXPOSE the listen port");
}

// ---------------------------------------------------------------------------------------
// Kubernetes

fn statefulset() -> Value {
    let sets = of_kind("StatefulSet");
    assert_eq!(sets.len(), 1, "one StatefulSet");
    sets.into_iter().next().unwrap()
}

fn pollard_container(set: &Value) -> Value {
    let containers = set["spec"]["template"]["spec"]["containers"].as_sequence().expect("containers");
    containers.iter().find(|c| c["name"].as_str() == Some("pollard")).expect("a container named pollard").clone()
}

fn strings(v: &Value) -> Vec<String> {
    v.as_sequence().map(|s| s.iter().map(|x| x.as_str().expect("a string").to_string()).collect()).unwrap_or_default()
}

/// Every `grpc:` probe in a value tree, as (port, service).
fn grpc_probes(v: &Value, out: &mut Vec<(u64, Option<String>)>) {
    match v {
        Value::Mapping(m) => {
            for (k, x) in m {
                if k.as_str() == Some("grpc") && x["port"].as_u64().is_some() {
                    out.push((x["port"].as_u64().unwrap(), x["service"].as_str().map(str::to_string)));
                }
                grpc_probes(x, out);
            }
        }
        Value::Sequence(s) => s.iter().for_each(|x| grpc_probes(x, out)),
        _ => {}
    }
}

#[test]
fn grpc_probes_name_services_the_server_registers() {
    let set = statefulset();
    let container = pollard_container(&set);
    for probe in ["livenessProbe", "readinessProbe"] {
        assert!(container[probe]["grpc"].is_mapping(), "the pollard container has a grpc {probe}");
    }
    // The kubelet's gRPC probes speak plain text only: with TLS on the main port they go to
    // the health-only port (health_listen), which the pod declares as "health".
    let port = container["ports"].as_sequence().unwrap().iter().find(|p| p["name"].as_str() == Some("health")).expect("a port named health")["containerPort"].as_u64().unwrap();
    let cm = of_kind("ConfigMap").into_iter().next().expect("a ConfigMap");
    let local = scratch("probe-pollard.toml");
    std::fs::write(&local, cm["data"]["pollard.toml"].as_str().unwrap()).unwrap();
    let health = load(&local, None, None).unwrap().access.health_listen.expect("the ConfigMap sets health_listen");
    assert_eq!(u64::from(health.port()), port, "health_listen vs the health containerPort");
    assert!(health.ip().is_unspecified(), "the kubelet probes the pod's address: health_listen on all addresses");
    let mut probes = Vec::new();
    for (_, d) in manifests() {
        grpc_probes(&d, &mut probes);
    }
    assert!(probes.len() >= 2, "found only {probes:?}");
    for (p, service) in probes {
        let service = service.expect("a grpc probe names a service (the empty name asks about the whole server)");
        assert!(pollard::server::SERVICES.contains(&service.as_str()), "probe service '{service}' is not one of {:?}", pollard::server::SERVICES);
        assert_eq!(p, port, "probe port");
    }
}

#[test]
fn ports_and_paths_agree_with_the_config() {
    let set = statefulset();
    let container = pollard_container(&set);
    let port = container["ports"].as_sequence().unwrap().iter().find(|p| p["name"].as_str() == Some("grpc")).expect("a port named grpc")["containerPort"].as_u64().unwrap();

    // The pod's command line: the image's entrypoint (unless `command` replaces it) and args.
    let mut argv = if container["command"].is_sequence() { strings(&container["command"]) } else { containerfile().entrypoint() };
    argv.extend(strings(&container["args"]));
    let flags = serve_flags(&argv, "the pollard container's command line");

    // --config names a file a ConfigMap volume provides.
    let config_path = PathBuf::from(flags.get("config").expect("the container passes --config"));
    let mounts = container["volumeMounts"].as_sequence().expect("volumeMounts");
    let volumes = set["spec"]["template"]["spec"]["volumes"].as_sequence().expect("volumes");
    let mount = mounts.iter().find(|m| Some(Path::new(m["mountPath"].as_str().unwrap())) == config_path.parent()).expect("a volume mounted where --config points");
    let volume = volumes.iter().find(|v| v["name"] == mount["name"]).expect("the config volume");
    let cm_name = volume["configMap"]["name"].as_str().expect("the config volume is a ConfigMap");
    let cm = of_kind("ConfigMap").into_iter().find(|c| c["metadata"]["name"].as_str() == Some(cm_name)).expect("the ConfigMap the volume names");
    let file_name = config_path.file_name().unwrap().to_str().unwrap();
    let text = cm["data"][file_name].as_str().unwrap_or_else(|| panic!("ConfigMap {cm_name} has no {file_name}"));
    let local = scratch("configmap-pollard.toml");
    std::fs::write(&local, text).unwrap();

    // The file on its own and the effective config (flags beat the file) both listen on the
    // container port, and the data dir is the claimed volume.
    let claims: Vec<&str> = set["spec"]["volumeClaimTemplates"].as_sequence().expect("volumeClaimTemplates").iter().map(|c| c["metadata"]["name"].as_str().unwrap()).collect();
    for (what, config) in [("the ConfigMap's file", load(&local, None, None)), ("the effective config", load(&local, flags.get("listen"), flags.get("data")))] {
        let config = config.unwrap();
        assert_eq!(u64::from(config.listen.port()), port, "{what}: listen port vs containerPort");
        assert!(config.listen.ip().is_unspecified(), "{what}: inside a pod pollard must listen on all addresses, not {}", config.listen);
        let data_mount = mounts.iter().find(|m| Path::new(m["mountPath"].as_str().unwrap()) == config.data_dir).unwrap_or_else(|| panic!("{what}: nothing mounted at data_dir {}", config.data_dir.display()));
        assert!(claims.contains(&data_mount["name"].as_str().unwrap()), "{what}: data_dir is not on a volumeClaimTemplate");
        let cpu_limit: usize = container["resources"]["limits"]["cpu"].as_str().expect("a CPU limit").parse().expect("a whole CPU limit");
        assert!(config.cpu_threads >= 1 && config.cpu_threads <= cpu_limit, "{what}: cpu_threads {} should be set within the CPU limit {cpu_limit} (0 would follow the node's cores)", config.cpu_threads);
    }
    for r in ["requests", "limits"] {
        for k in ["cpu", "memory"] {
            assert!(container["resources"][r][k].as_str().is_some(), "resources.{r}.{k}");
        }
    }

    // Services send port 7311 to the container port, by number or by its name (the
    // StatefulSet's; deploy/replicas has a Service of its own).
    let replicas: Vec<String> = of_kind("Deployment").iter().map(|d| d["metadata"]["name"].as_str().unwrap().to_string()).collect();
    let services: Vec<Value> = of_kind("Service").into_iter().filter(|s| !replicas.iter().any(|r| s["metadata"]["name"].as_str() == Some(r))).collect();
    let cluster_ip: Vec<&Value> = services.iter().filter(|s| s["spec"]["clusterIP"].as_str() != Some("None")).collect();
    assert_eq!(cluster_ip.len(), 1, "one ClusterIP Service");
    assert!(matches!(cluster_ip[0]["spec"]["type"].as_str(), None | Some("ClusterIP")));
    assert!(services.iter().any(|s| s["metadata"]["name"] == set["spec"]["serviceName"] && s["spec"]["clusterIP"].as_str() == Some("None")), "the StatefulSet's serviceName is a headless Service");
    let pod_labels = &set["spec"]["template"]["metadata"]["labels"];
    for s in &services {
        for (k, v) in s["spec"]["selector"].as_mapping().expect("a selector") {
            assert_eq!(&pod_labels[k.as_str().unwrap()], v, "Service {} selects the pods", s["metadata"]["name"].as_str().unwrap());
        }
        let ports = s["spec"]["ports"].as_sequence().unwrap();
        let grpc = ports.iter().find(|p| p["name"].as_str() == Some("grpc")).expect("a Service port named grpc");
        assert_eq!(grpc["port"].as_u64(), Some(7311));
        let target = &grpc["targetPort"];
        assert!(target.as_u64() == Some(port) || target.as_str() == Some("grpc"), "targetPort {target:?} vs containerPort {port}");
    }
    // The grace period leaves the runs time to stop at a unit boundary, like the unit's.
    let grace = set["spec"]["template"]["spec"]["terminationGracePeriodSeconds"].as_u64().expect("terminationGracePeriodSeconds");
    assert!(grace >= 60, "terminationGracePeriodSeconds {grace} is short for runs to checkpoint");
}

/// Every pod template (the StatefulSet's and the replicas' Deployment's) carries the
/// common Prometheus scrape annotations, and they point at the web view's port, where
/// `web_listen` of the ConfigMap serves `/metrics` (on all addresses, so a scraper reaches
/// it); every Service that selects the pods offers that port too.
#[test]
fn scrape_annotations_point_at_the_metrics_port() {
    let cm = of_kind("ConfigMap").into_iter().next().expect("a ConfigMap");
    let local = scratch("web-pollard.toml");
    std::fs::write(&local, cm["data"]["pollard.toml"].as_str().unwrap()).unwrap();
    let web = load(&local, None, None).unwrap().web_listen.expect("the ConfigMap sets web_listen");
    assert!(web.ip().is_unspecified(), "web_listen {web}: inside a pod the web view must listen on all addresses");
    let pods: Vec<Value> = of_kind("StatefulSet").into_iter().chain(of_kind("Deployment")).collect();
    assert!(pods.len() >= 2, "the StatefulSet and the replicas' Deployment");
    for pod in pods {
        let name = pod["metadata"]["name"].as_str().unwrap().to_string();
        let notes = &pod["spec"]["template"]["metadata"]["annotations"];
        assert_eq!(notes["prometheus.io/scrape"].as_str(), Some("true"), "{name}: prometheus.io/scrape");
        assert_eq!(notes["prometheus.io/path"].as_str(), Some("/metrics"), "{name}: prometheus.io/path");
        let port: u64 = notes["prometheus.io/port"].as_str().expect("prometheus.io/port is a string").parse().expect("a port number");
        let container = pollard_container(&pod);
        let declared = container["ports"].as_sequence().unwrap().iter().find(|p| p["name"].as_str() == Some("web")).unwrap_or_else(|| panic!("{name}: a port named web"))["containerPort"].as_u64().unwrap();
        assert_eq!(port, declared, "{name}: the scrape port vs the web containerPort");
        assert_eq!(port, u64::from(web.port()), "{name}: the scrape port vs web_listen");
        let labels = &pod["spec"]["template"]["metadata"]["labels"];
        for svc in of_kind("Service") {
            let selects = svc["spec"]["selector"].as_mapping().is_some_and(|m| m.iter().all(|(k, v)| &labels[k.as_str().unwrap()] == v));
            if selects && svc["spec"]["clusterIP"].as_str() != Some("None") {
                let ports = svc["spec"]["ports"].as_sequence().unwrap();
                let p = ports.iter().find(|p| p["name"].as_str() == Some("web")).unwrap_or_else(|| panic!("Service {} has a port named web", svc["metadata"]["name"].as_str().unwrap()));
                assert!(p["targetPort"].as_str() == Some("web") || p["targetPort"].as_u64() == Some(port), "Service web targetPort");
            }
        }
    }
    // The sample config and the systemd unit name the key (and its variable).
    let sample = std::fs::read_to_string(deploy_dir().join("pollard.toml")).unwrap();
    assert!(sample.lines().any(|l| l.starts_with("web_listen = ")), "deploy/pollard.toml sets web_listen");
    assert!(sample.contains("POLLARD_WEB_LISTEN") && sample.contains("/metrics"));
    let unit = std::fs::read_to_string(unit_path()).unwrap();
    assert!(unit.contains("web_listen") && unit.contains("POLLARD_WEB_LISTEN") && unit.contains("/metrics"), "the unit names web_listen");
}

// ---------------------------------------------------------------------------------------
// systemd

/// `[Section]` → key → values in order (a key may repeat). Comments and blank lines skipped.
fn parse_unit(text: &str) -> BTreeMap<String, Vec<(String, String)>> {
    let mut sections: BTreeMap<String, Vec<(String, String)>> = BTreeMap::new();
    let mut current: Option<String> = None;
    for (n, line) in text.lines().enumerate() {
        let t = line.trim();
        if t.is_empty() || t.starts_with('#') || t.starts_with(';') {
            continue;
        }
        assert!(!t.ends_with('\\'), "line {}: continued lines are not used here", n + 1);
        if let Some(name) = t.strip_prefix('[').and_then(|s| s.strip_suffix(']')) {
            current = Some(name.to_string());
            sections.entry(name.to_string()).or_default();
            continue;
        }
        let section = current.clone().unwrap_or_else(|| panic!("line {}: a key before any section", n + 1));
        let (k, v) = t.split_once('=').unwrap_or_else(|| panic!("line {}: not key=value: {t}", n + 1));
        sections.get_mut(&section).unwrap().push((k.trim().to_string(), v.trim().to_string()));
    }
    sections
}

// The options each section may hold, from the systemd man pages: systemd.unit(5) for [Unit]
// and [Install]; systemd.service(5), systemd.exec(5), systemd.kill(5) and
// systemd.resource-control(5) for [Service].
const UNIT_KEYS: &[&str] = &[
    "Description", "Documentation", "Wants", "Requires", "Requisite", "BindsTo", "PartOf", "Upholds", "Conflicts", "Before", "After",
    "OnFailure", "OnSuccess", "PropagatesReloadTo", "ReloadPropagatedFrom", "PropagatesStopTo", "StopPropagatedFrom", "JoinsNamespaceOf",
    "RequiresMountsFor", "WantsMountsFor", "OnFailureJobMode", "OnSuccessJobMode", "IgnoreOnIsolate", "StopWhenUnneeded", "RefuseManualStart",
    "RefuseManualStop", "AllowIsolate", "DefaultDependencies", "SurviveFinalKillSignal", "CollectMode", "FailureAction", "SuccessAction",
    "FailureActionExitStatus", "SuccessActionExitStatus", "JobTimeoutSec", "JobRunningTimeoutSec", "JobTimeoutAction",
    "JobTimeoutRebootArgument", "StartLimitIntervalSec", "StartLimitBurst", "StartLimitAction", "RebootArgument", "SourcePath",
    "ConditionArchitecture", "ConditionFirmware", "ConditionVirtualization", "ConditionHost", "ConditionKernelCommandLine",
    "ConditionKernelVersion", "ConditionCredential", "ConditionEnvironment", "ConditionSecurity", "ConditionCapability", "ConditionACPower",
    "ConditionNeedsUpdate", "ConditionFirstBoot", "ConditionPathExists", "ConditionPathExistsGlob", "ConditionPathIsDirectory",
    "ConditionPathIsSymbolicLink", "ConditionPathIsMountPoint", "ConditionPathIsReadWrite", "ConditionPathIsEncrypted",
    "ConditionDirectoryNotEmpty", "ConditionFileNotEmpty", "ConditionFileIsExecutable", "ConditionUser", "ConditionGroup",
    "ConditionControlGroupController", "ConditionMemory", "ConditionCPUs", "ConditionCPUFeature", "ConditionOSRelease",
    "ConditionMemoryPressure", "ConditionCPUPressure", "ConditionIOPressure", "AssertArchitecture", "AssertVirtualization", "AssertHost",
    "AssertKernelCommandLine", "AssertPathExists", "AssertPathIsDirectory", "AssertFileNotEmpty", "AssertFileIsExecutable", "AssertUser",
    "AssertGroup",
];

const SERVICE_KEYS: &[&str] = &[
    // systemd.service(5)
    "Type", "ExitType", "RemainAfterExit", "GuessMainPID", "PIDFile", "BusName", "ExecStart", "ExecStartPre", "ExecStartPost", "ExecCondition",
    "ExecReload", "ExecStop", "ExecStopPost", "RestartSec", "RestartSteps", "RestartMaxDelaySec", "TimeoutStartSec", "TimeoutStopSec",
    "TimeoutAbortSec", "TimeoutSec", "TimeoutStartFailureMode", "TimeoutStopFailureMode", "RuntimeMaxSec", "RuntimeRandomizedExtraSec",
    "WatchdogSec", "Restart", "RestartMode", "SuccessExitStatus", "RestartPreventExitStatus", "RestartForceExitStatus",
    "RootDirectoryStartOnly", "NonBlocking", "NotifyAccess", "Sockets", "FileDescriptorStoreMax", "FileDescriptorStorePreserve",
    "USBFunctionDescriptors", "USBFunctionStrings", "OOMPolicy", "OpenFile", "ReloadSignal",
    // systemd.kill(5)
    "KillMode", "KillSignal", "RestartKillSignal", "SendSIGHUP", "SendSIGKILL", "FinalKillSignal", "WatchdogSignal",
    // systemd.exec(5)
    "ExecSearchPath", "WorkingDirectory", "RootDirectory", "RootImage", "RootImageOptions", "RootEphemeral", "RootHash",
    "RootHashSignature", "RootVerity", "RootImagePolicy", "MountImagePolicy", "ExtensionImagePolicy", "MountAPIVFS", "ProtectProc",
    "ProcSubset", "BindPaths", "BindReadOnlyPaths", "MountImages", "ExtensionImages", "ExtensionDirectories", "User", "Group",
    "DynamicUser", "SupplementaryGroups", "SetLoginEnvironment", "PAMName", "CapabilityBoundingSet", "AmbientCapabilities",
    "NoNewPrivileges", "SecureBits", "SELinuxContext", "AppArmorProfile", "SmackProcessLabel", "LimitCPU", "LimitFSIZE", "LimitDATA",
    "LimitSTACK", "LimitCORE", "LimitRSS", "LimitNOFILE", "LimitAS", "LimitNPROC", "LimitMEMLOCK", "LimitLOCKS", "LimitSIGPENDING",
    "LimitMSGQUEUE", "LimitNICE", "LimitRTPRIO", "LimitRTTIME", "UMask", "CoredumpFilter", "KeyringMode", "OOMScoreAdjust",
    "TimerSlackNSec", "Personality", "IgnoreSIGPIPE", "Nice", "CPUSchedulingPolicy", "CPUSchedulingPriority", "CPUSchedulingResetOnFork",
    "CPUAffinity", "NUMAPolicy", "NUMAMask", "IOSchedulingClass", "IOSchedulingPriority", "ProtectSystem", "ProtectHome",
    "RuntimeDirectory", "StateDirectory", "CacheDirectory", "LogsDirectory", "ConfigurationDirectory", "RuntimeDirectoryMode",
    "StateDirectoryMode", "CacheDirectoryMode", "LogsDirectoryMode", "ConfigurationDirectoryMode", "RuntimeDirectoryPreserve",
    "TimeoutCleanSec", "ReadWritePaths", "ReadOnlyPaths", "InaccessiblePaths", "ExecPaths", "NoExecPaths", "TemporaryFileSystem",
    "PrivateTmp", "PrivateDevices", "PrivateNetwork", "NetworkNamespacePath", "PrivateIPC", "IPCNamespacePath", "MemoryKSM",
    "PrivateUsers", "ProtectHostname", "ProtectClock", "ProtectKernelTunables", "ProtectKernelModules", "ProtectKernelLogs",
    "ProtectControlGroups", "RestrictAddressFamilies", "RestrictFileSystems", "RestrictNamespaces", "LockPersonality",
    "MemoryDenyWriteExecute", "RestrictRealtime", "RestrictSUIDSGID", "RemoveIPC", "PrivateMounts", "MountFlags", "SystemCallFilter",
    "SystemCallErrorNumber", "SystemCallArchitectures", "SystemCallLog", "Environment", "EnvironmentFile", "PassEnvironment",
    "UnsetEnvironment", "StandardInput", "StandardOutput", "StandardError", "StandardInputText", "StandardInputData", "LogLevelMax",
    "LogExtraFields", "LogRateLimitIntervalSec", "LogRateLimitBurst", "LogFilterPatterns", "LogNamespace", "SyslogIdentifier",
    "SyslogFacility", "SyslogLevel", "SyslogLevelPrefix", "TTYPath", "TTYReset", "TTYVHangup", "TTYRows", "TTYColumns",
    "TTYVTDisallocate", "LoadCredential", "LoadCredentialEncrypted", "ImportCredential", "SetCredential", "SetCredentialEncrypted",
    "UtmpIdentifier", "UtmpMode",
    // systemd.resource-control(5)
    "CPUAccounting", "CPUWeight", "StartupCPUWeight", "CPUQuota", "CPUQuotaPeriodSec", "AllowedCPUs", "StartupAllowedCPUs",
    "AllowedMemoryNodes", "StartupAllowedMemoryNodes", "MemoryAccounting", "MemoryMin", "MemoryLow", "StartupMemoryLow",
    "DefaultStartupMemoryLow", "MemoryHigh", "StartupMemoryHigh", "MemoryMax", "StartupMemoryMax", "MemorySwapMax",
    "StartupMemorySwapMax", "MemoryZSwapMax", "StartupMemoryZSwapMax", "MemoryZSwapWriteback", "TasksAccounting", "TasksMax",
    "IOAccounting", "IOWeight", "StartupIOWeight", "IODeviceWeight", "IOReadBandwidthMax", "IOWriteBandwidthMax", "IOReadIOPSMax",
    "IOWriteIOPSMax", "IODeviceLatencyTargetSec", "IPAccounting", "IPAddressAllow", "IPAddressDeny", "SocketBindAllow", "SocketBindDeny",
    "RestrictNetworkInterfaces", "NFTSet", "IPIngressFilterPath", "IPEgressFilterPath", "BPFProgram", "DeviceAllow", "DevicePolicy",
    "Slice", "Delegate", "DelegateSubgroup", "DisableControllers", "ManagedOOMSwap", "ManagedOOMMemoryPressure",
    "ManagedOOMMemoryPressureLimit", "ManagedOOMMemoryPressureDurationSec", "ManagedOOMPreference", "MemoryPressureWatch",
    "MemoryPressureThresholdSec", "CoredumpReceive",
];

const INSTALL_KEYS: &[&str] = &["Alias", "WantedBy", "RequiredBy", "UpheldBy", "Also", "DefaultInstance"];

fn known_keys(section: &str) -> Option<&'static [&'static str]> {
    match section {
        "Unit" => Some(UNIT_KEYS),
        "Service" => Some(SERVICE_KEYS),
        "Install" => Some(INSTALL_KEYS),
        _ => None,
    }
}

fn unit_path() -> PathBuf {
    deploy_dir().join("pollard.service")
}

#[test]
fn systemd_unit_uses_known_options_and_serve_flags() {
    let text = read(&unit_path());
    let unit = parse_unit(&text);
    assert_eq!(unit.keys().map(String::as_str).collect::<Vec<_>>(), ["Install", "Service", "Unit"], "the unit's sections");
    for (section, keys) in &unit {
        let known = known_keys(section).unwrap();
        for (k, _) in keys {
            assert!(known.contains(&k.as_str()), "[{section}] {k} is not a systemd option of that section");
        }
    }
    let service = &unit["Service"];
    let get = |k: &str| -> Vec<&str> { service.iter().filter(|(key, _)| key == k).map(|(_, v)| v.as_str()).collect() };
    let one = |k: &str| -> &str {
        let v = get(k);
        assert_eq!(v.len(), 1, "[Service] {k} should appear once, found {v:?}");
        v[0]
    };
    let required = [
        ("Restart", "on-failure"),
        ("KillSignal", "SIGTERM"),
        ("StateDirectory", "pollard"),
        ("NoNewPrivileges", "yes"),
        ("ProtectSystem", "strict"),
        ("ProtectHome", "yes"),
        ("PrivateTmp", "yes"),
        ("PrivateDevices", "yes"),
        ("ProtectKernelTunables", "yes"),
        ("ProtectKernelModules", "yes"),
        ("ProtectControlGroups", "yes"),
        ("RestrictAddressFamilies", "AF_INET AF_INET6 AF_UNIX"),
        ("RestrictNamespaces", "yes"),
        ("LockPersonality", "yes"),
        ("MemoryDenyWriteExecute", "yes"),
        ("SystemCallArchitectures", "native"),
        ("CapabilityBoundingSet", ""),
    ];
    for (k, v) in required {
        assert_eq!(one(k), v, "[Service] {k}");
    }
    assert!(get("DynamicUser") == ["yes"] || get("User").iter().any(|u| !u.is_empty() && *u != "root"), "a dedicated user: DynamicUser=yes or User=");
    let stop = one("TimeoutStopSec");
    let secs: u64 = stop.strip_suffix('s').unwrap_or(stop).parse().expect("TimeoutStopSec in seconds");
    assert!(secs >= 60, "TimeoutStopSec={stop} is short for runs to checkpoint");

    // ExecStart runs pollard serve with flags it takes, and the config it names keeps the
    // store in the StateDirectory.
    let exec = one("ExecStart");
    assert!(!exec.contains('"') && !exec.contains('\''), "ExecStart without quoting");
    let argv: Vec<String> = exec.split_whitespace().map(str::to_string).collect();
    let flags = serve_flags(&argv, "ExecStart");
    assert_eq!(flags.get("config").map(String::as_str), Some("/etc/pollard/pollard.toml"));
    let config = load(&deploy_dir().join("pollard.toml"), flags.get("listen"), flags.get("data")).unwrap();
    assert_eq!(config.data_dir, Path::new("/var/lib").join(one("StateDirectory")), "the store lives in the StateDirectory");

    // Tokens and TLS are on, their files systemd credentials: each path the config names
    // under the credentials directory has its LoadCredential= line.
    let a = &config.access;
    let (tokens, cert, key) = (a.tokens_file.clone().expect("tokens_file"), a.tls_cert_file.clone().expect("tls_cert_file"), a.tls_key_file.clone().expect("tls_key_file"));
    let creds = Path::new("/run/credentials/pollard.service");
    let loaded: Vec<&str> = get("LoadCredential").iter().map(|v| v.split(':').next().unwrap()).collect();
    for p in [tokens, cert, key] {
        let id = p.strip_prefix(creds).unwrap_or_else(|_| panic!("{} is not under {}", p.display(), creds.display()));
        assert!(loaded.contains(&id.to_str().unwrap()), "no LoadCredential= for {}", id.display());
    }
    assert!(!get("ExecReload").is_empty(), "ExecReload (SIGHUP) rereads tokens and certificates");
}

#[test]
fn kubernetes_serves_tls_and_tokens_from_secrets() {
    let set = statefulset();
    let container = pollard_container(&set);
    let cm = of_kind("ConfigMap").into_iter().next().expect("a ConfigMap");
    let local = scratch("secrets-pollard.toml");
    std::fs::write(&local, cm["data"]["pollard.toml"].as_str().unwrap()).unwrap();
    let config = load(&local, None, None).unwrap();
    assert!(!config.access.allow_tokenless, "the cluster config does not open the port to everyone");
    let mounts = container["volumeMounts"].as_sequence().expect("volumeMounts");
    let volumes = set["spec"]["template"]["spec"]["volumes"].as_sequence().expect("volumes");
    let a = &config.access;
    for (what, p) in [("tokens_file", &a.tokens_file), ("tls_cert_file", &a.tls_cert_file), ("tls_key_file", &a.tls_key_file)] {
        let p = p.as_ref().unwrap_or_else(|| panic!("the ConfigMap sets {what}"));
        let mount = mounts.iter().find(|m| Some(Path::new(m["mountPath"].as_str().unwrap())) == p.parent()).unwrap_or_else(|| panic!("{what}: nothing mounted at {}", p.parent().unwrap().display()));
        assert_eq!(mount["readOnly"].as_bool(), Some(true), "{what}: mounted read-only");
        let volume = volumes.iter().find(|v| v["name"] == mount["name"]).unwrap();
        assert!(volume["secret"]["secretName"].as_str().is_some(), "{what}: {} comes from a Secret", p.display());
        assert!(volume["secret"]["items"].is_null(), "{what}: the whole Secret is mounted (no subPath or items), so updates reach the pod");
    }
}

/// When systemd-analyze is installed, it must accept the unit too (its own option tables,
/// value parsers and the binary pointed at the built pollard). Skipped where it is absent.
#[test]
fn systemd_analyze_verify_when_available() {
    let Ok(out) = std::process::Command::new("systemd-analyze").arg("--version").output() else {
        eprintln!("systemd-analyze not installed: skipped");
        return;
    };
    if !out.status.success() {
        eprintln!("systemd-analyze does not run here: skipped");
        return;
    }
    let copy = scratch("pollard.service");
    let text = read(&unit_path()).replace("/usr/local/bin/pollard", env!("CARGO_BIN_EXE_pollard"));
    std::fs::write(&copy, text).unwrap();
    let out = std::process::Command::new("systemd-analyze").arg("verify").arg(&copy).output().unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr);
    // Lines about the unit itself; anything else is about this machine's own units.
    let ours: Vec<&str> = stderr.lines().filter(|l| l.contains("pollard.service")).collect();
    assert!(ours.is_empty(), "systemd-analyze verify:\n{}", ours.join("\n"));
}

// ---------------------------------------------------------------------------------------
// Replicas on one PostgreSQL database

/// The environment a container sets with plain values, and the names it takes from Secrets.
fn container_env(container: &Value) -> (BTreeMap<String, String>, Vec<String>) {
    let mut plain = BTreeMap::new();
    let mut secret = Vec::new();
    for e in container["env"].as_sequence().into_iter().flatten() {
        let name = e["name"].as_str().expect("an env name").to_string();
        match e["value"].as_str() {
            Some(v) => {
                plain.insert(name, v.to_string());
            }
            None => {
                assert!(e["valueFrom"]["secretKeyRef"]["name"].is_string(), "{name} comes from a Secret");
                secret.push(name);
            }
        }
    }
    (plain, secret)
}

#[test]
fn the_replicas_share_a_database_and_keep_nothing_on_disk() {
    let deployments = of_kind("Deployment");
    assert_eq!(deployments.len(), 1, "one Deployment (deploy/replicas)");
    let d = &deployments[0];
    assert_eq!(d["spec"]["replicas"].as_u64(), Some(3));
    let container = pollard_container(d);
    let (plain, secret) = container_env(&container);
    assert_eq!(plain.get("POLLARD_STORE").map(String::as_str), Some("postgres"));
    assert_eq!(secret, ["POLLARD_DATABASE_URL"], "the database URL (and its password) comes from a Secret");
    // The pods' config, with that environment, chooses the postgres store.
    let cm = of_kind("ConfigMap").into_iter().next().expect("a ConfigMap");
    let local = scratch("replicas-pollard.toml");
    std::fs::write(&local, cm["data"]["pollard.toml"].as_str().unwrap()).unwrap();
    let env = |k: &str| plain.get(k).cloned().or_else(|| (k == "POLLARD_DATABASE_URL").then(|| "postgres://pollard@db.internal:5432/pollard".to_string()));
    let config = Config::load(&Flags { config_file: Some(local), ..Flags::default() }, &env).unwrap();
    assert!(matches!(config.store, pollard::config::StoreChoice::Postgres(_)), "{:?}", config.store);
    // No volume claim; a writable /tmp for uploads under a read-only root filesystem.
    assert!(d["spec"]["volumeClaimTemplates"].is_null());
    let mounts = container["volumeMounts"].as_sequence().expect("volumeMounts");
    let tmp = mounts.iter().find(|m| m["mountPath"].as_str() == Some("/tmp")).expect("/tmp is mounted");
    let volumes = d["spec"]["template"]["spec"]["volumes"].as_sequence().expect("volumes");
    assert!(volumes.iter().any(|v| v["name"] == tmp["name"] && v["emptyDir"].is_mapping()), "/tmp is an emptyDir");
    // A Service selects the replicas.
    let labels = &d["spec"]["template"]["metadata"]["labels"];
    assert!(of_kind("Service").iter().any(|s| s["spec"]["selector"].as_mapping().is_some_and(|sel| sel.iter().all(|(k, v)| &labels[k] == v))), "no Service selects the replicas");
}

#[test]
fn the_compose_example_runs_two_replicas_on_one_database() {
    let docs = yaml_docs(&compose_file());
    let services = docs[0]["services"].as_mapping().expect("services");
    let mut replicas = 0;
    for (name, svc) in services {
        let env = &svc["environment"];
        if env["POLLARD_STORE"].as_str() == Some("postgres") {
            replicas += 1;
            let url = env["POLLARD_DATABASE_URL"].as_str().expect("a database URL");
            let vars = |k: &str| match k {
                "POLLARD_STORE" => Some("postgres".to_string()),
                "POLLARD_DATABASE_URL" => Some(url.to_string()),
                _ => None,
            };
            let config = Config::load(&Flags::default(), &vars).unwrap_or_else(|e| panic!("{name:?}: {e}"));
            assert!(matches!(config.store, pollard::config::StoreChoice::Postgres(_)));
            let host = url.split('@').nth(1).and_then(|h| h.split(':').next()).expect("a host in the URL");
            assert!(services.contains_key(host), "{name:?}: the database host {host} is a service of the file");
        }
    }
    assert_eq!(replicas, 2);
}

//! The deployment files name only what exists: flags the binary has, the port it listens on,
//! probe paths that answer, a config that validates, mounts where the config points, and
//! dashboard queries over metrics the daemon exports. (tests/deploy_check.sh adds promtool and
//! systemd-analyze.)

mod common;

use std::collections::BTreeSet;
use std::path::PathBuf;
use std::process::Command;

use common::{bin, free_port, Daemon, TempDir};
use serde_json::Value;

fn repo(rel: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join(rel)
}

fn yaml(rel: &str) -> Vec<Value> {
    let text = std::fs::read_to_string(repo(rel)).unwrap();
    serde_saphyr::from_multiple(&text).unwrap_or_else(|e| panic!("{rel}: {e}"))
}

/// Every `--flag` of `riskbound run --help`.
fn run_flags() -> BTreeSet<String> {
    let out = Command::new(bin()).args(["run", "--help"]).output().unwrap();
    let help = String::from_utf8(out.stdout).unwrap();
    help.split_whitespace()
        .filter(|w| w.starts_with("--"))
        .map(|w| w.trim_end_matches([',', '.']).split('=').next().unwrap().to_string())
        .collect()
}

/// The args must be `run` followed by flags `run` has; returns the value of --config.
fn check_args(args: &[String], what: &str) -> String {
    assert_eq!(args.first().map(String::as_str), Some("run"), "{what}: {args:?}");
    let flags = run_flags();
    let mut config = None;
    for (i, a) in args.iter().enumerate().skip(1) {
        if a.starts_with("--") {
            assert!(flags.contains(a), "{what}: {a} is not a flag of riskbound run ({flags:?})");
            if a == "--config" {
                config = args.get(i + 1).cloned();
            }
            if a == "--log-format" {
                assert!(["human", "json"].contains(&args[i + 1].as_str()), "{what}: log format {}", args[i + 1]);
            }
        }
    }
    config.unwrap_or_else(|| panic!("{what}: no --config"))
}

/// The config map's daemon config with its absolute paths moved under `dir`.
fn configmap_config(dir: &TempDir) -> (String, PathBuf) {
    let cm = &yaml("deploy/kubernetes/configmap.yaml")[0];
    let text = cm["data"]["riskbound.yaml"].as_str().unwrap().to_string();
    let root = dir.0.display().to_string();
    let moved =
        text.replace("/spool", &format!("{root}/spool")).replace("/var/lib/riskbound", &format!("{root}/state"));
    for kind in ["predictions", "labels"] {
        std::fs::create_dir_all(dir.path(&format!("spool/{kind}"))).unwrap();
    }
    let p = dir.path("riskbound.yaml");
    std::fs::write(&p, &moved).unwrap();
    (text, p)
}

#[test]
fn kubernetes_sidecar_names_what_exists() {
    for file in ["deploy/kubernetes/deployment.yaml", "deploy/kubernetes/statefulset.yaml"] {
        sidecar_names_what_exists(file);
    }
}

/// Converts a Kubernetes quantity such as `2Gi` or `1536Mi` to bytes.
fn quantity(q: &str) -> u64 {
    let (num, unit) = q.split_at(q.find(|c: char| !c.is_ascii_digit()).unwrap_or(q.len()));
    let scale = match unit {
        "" => 1,
        "Ki" => 1 << 10,
        "Mi" => 1 << 20,
        "Gi" => 1 << 30,
        other => panic!("unit {other} in {q}"),
    };
    num.parse::<u64>().unwrap() * scale
}

fn sidecar_names_what_exists(file: &str) {
    let dep = &yaml(file)[0];
    let spec = &dep["spec"]["template"]["spec"];
    let c = spec["containers"]
        .as_array()
        .unwrap()
        .iter()
        .find(|c| c["name"] == "riskbound")
        .expect("a riskbound container");
    let args: Vec<String> = c["args"].as_array().unwrap().iter().map(|a| a.as_str().unwrap().to_string()).collect();
    let config_path = check_args(&args, file);

    // The config comes from the config map, mounted where --config points.
    let mounts = c["volumeMounts"].as_array().unwrap();
    let mount = |name: &str| mounts.iter().find(|m| m["name"] == name).unwrap_or_else(|| panic!("mount {name}"));
    let cfg_mount = mount("config");
    assert_eq!(format!("{}/riskbound.yaml", cfg_mount["mountPath"].as_str().unwrap()), config_path);
    let volumes = spec["volumes"].as_array().unwrap();
    let cm_volume = volumes.iter().find(|v| v["name"] == "config").unwrap();
    let cm = &yaml("deploy/kubernetes/configmap.yaml")[0];
    assert_eq!(cm_volume["configMap"]["name"], cm["metadata"]["name"]);
    // Each pod has its own state: an emptyDir with a sizeLimit, or a claim per replica.
    let state_size = match volumes.iter().find(|v| v["name"] == "state") {
        Some(v) => quantity(v["emptyDir"]["sizeLimit"].as_str().expect("the state emptyDir has a sizeLimit")),
        None => {
            let t = dep["spec"]["volumeClaimTemplates"].as_array().expect("a state claim per replica");
            let claim = t.iter().find(|c| c["metadata"]["name"] == "state").unwrap();
            quantity(claim["spec"]["resources"]["requests"]["storage"].as_str().unwrap())
        }
    };
    // Several replicas, rolled one at a time without taking the model down.
    assert!(dep["spec"]["replicas"].as_u64().unwrap() > 1, "{file}: more than one replica");
    let rolling = if dep["kind"] == "Deployment" { &dep["spec"]["strategy"] } else { &dep["spec"]["updateStrategy"] };
    assert_eq!(rolling["type"], "RollingUpdate", "{file}");

    // The config validates, and its paths are the mounts: spool read-only, state writable.
    let dir = TempDir::new("deploy-k8s");
    let (text, moved) = configmap_config(&dir);
    let out = Command::new(bin()).args(["check-config", moved.to_str().unwrap()]).output().unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let spool = mount("spool");
    assert_eq!(spool["readOnly"], true, "riskbound only reads the spool");
    let spool_path = spool["mountPath"].as_str().unwrap();
    for line in text.lines().filter(|l| l.trim_start().starts_with("dir:")) {
        let d = line.split(':').nth(1).unwrap().trim();
        assert!(d.starts_with(spool_path), "{d} is not under the spool mount {spool_path}");
    }
    let state_line = text.lines().find(|l| l.trim_start().starts_with("state_dir:")).unwrap();
    assert_eq!(state_line.split(':').nth(1).unwrap().trim(), mount("state")["mountPath"].as_str().unwrap());
    assert_ne!(mount("state")["readOnly"], true);
    // The state is capped below its volume, so it pauses ingest instead of filling the volume
    // (an emptyDir past its sizeLimit gets the whole pod evicted). The WAL adds up to ~4 MiB.
    let cap_line = text.lines().find(|l| l.trim_start().starts_with("state_max_size:")).expect("state_max_size set");
    let cap = quantity(cap_line.split(':').nth(1).unwrap().trim());
    assert!(cap + (8 << 20) <= state_size, "{file}: state_max_size {cap} leaves no room below {state_size}");

    // The port is the config's listen port, and the probes answer on a running daemon.
    let listen = text.lines().find(|l| l.trim_start().starts_with("listen:")).unwrap();
    let port: u64 = listen.rsplit(':').next().unwrap().trim_matches(|c: char| !c.is_ascii_digit()).parse().unwrap();
    let ports = c["ports"].as_array().unwrap();
    assert_eq!(ports[0]["containerPort"].as_u64(), Some(port));
    let port_name = ports[0]["name"].as_str().unwrap();
    let local = free_port();
    let live =
        std::fs::read_to_string(&moved).unwrap().replace(&format!("0.0.0.0:{port}"), &format!("127.0.0.1:{local}"));
    std::fs::write(&moved, live).unwrap();
    let daemon = Daemon::start(&moved, local);
    // Do no harm: no readiness probe (the pod's readiness is the model's), a startup probe
    // that answers before the state is resumed, and liveness.
    assert!(c["readinessProbe"].is_null(), "{file}: riskbound must not gate the pod's readiness");
    let model = spec["containers"].as_array().unwrap().iter().find(|c| c["name"] != "riskbound").unwrap();
    assert!(model["readinessProbe"].is_null() || model["readinessProbe"]["httpGet"]["port"] != port_name);
    for probe in ["startupProbe", "livenessProbe"] {
        let get = &c[probe]["httpGet"];
        assert_eq!(get["port"], port_name, "{probe} uses the named port");
        let (status, _) = daemon.get(get["path"].as_str().unwrap()).unwrap();
        assert_eq!(status, 200, "{probe} {}", get["path"]);
    }

    // Hardening.
    let sc = &c["securityContext"];
    assert_eq!(sc["readOnlyRootFilesystem"], true);
    assert_eq!(sc["allowPrivilegeEscalation"], false);
    assert_eq!(sc["capabilities"]["drop"][0], "ALL");
    assert_eq!(spec["securityContext"]["runAsNonRoot"], true);
    assert!(c["resources"]["limits"]["memory"].is_string() && c["resources"]["limits"]["cpu"].is_string());

    // The Kubernetes scrape job keeps exactly this container's named port.
    let scrape = &yaml("deploy/prometheus/kubernetes-scrape.yaml")[0];
    let relabel = scrape["scrape_configs"][0]["relabel_configs"].as_array().unwrap();
    let keep = |label: &str| relabel.iter().find(|r| r["source_labels"][0] == label).unwrap()["regex"].clone();
    assert_eq!(keep("__meta_kubernetes_pod_container_port_name"), port_name);
    assert_eq!(keep("__meta_kubernetes_pod_container_name"), "riskbound");
}

/// The fleet view's Deployment: `riskbound fleet` with flags it has, the sidecars' config map
/// (read without its directories), the sidecars' scrape job, a port its scrape job keeps, and
/// probes that answer on a running fleet view.
#[test]
fn kubernetes_fleet_view_names_what_exists() {
    let file = "deploy/kubernetes/fleet.yaml";
    let dep = &yaml(file)[0];
    let spec = &dep["spec"]["template"]["spec"];
    let c = &spec["containers"][0];
    let args: Vec<String> = c["args"].as_array().unwrap().iter().map(|a| a.as_str().unwrap().to_string()).collect();
    assert_eq!(args[0], "fleet");
    let out = Command::new(bin()).args(["fleet", "--help"]).output().unwrap();
    let help = String::from_utf8(out.stdout).unwrap();
    let value = |flag: &str| args.iter().position(|a| a == flag).map(|i| args[i + 1].clone());
    for a in args.iter().filter(|a| a.starts_with("--")) {
        assert!(help.contains(&format!("{a} ")), "{file}: {a} is not a flag of riskbound fleet");
    }
    // The sidecars' config map, mounted where --config points.
    let mount = &c["volumeMounts"][0];
    assert_eq!(format!("{}/riskbound.yaml", mount["mountPath"].as_str().unwrap()), value("--config").unwrap());
    let cm = &yaml("deploy/kubernetes/configmap.yaml")[0];
    assert_eq!(spec["volumes"][0]["configMap"]["name"], cm["metadata"]["name"]);
    // --job is the sidecars' scrape job; the fleet view's own job keeps its port.
    let scrape = &yaml("deploy/prometheus/kubernetes-scrape.yaml")[0];
    let jobs = scrape["scrape_configs"].as_array().unwrap();
    assert_eq!(jobs[0]["job_name"].as_str(), value("--job").as_deref());
    let fleet_job = jobs.iter().find(|j| j["job_name"] == "riskbound-fleet").expect("a scrape job for the fleet view");
    let relabel = fleet_job["relabel_configs"].as_array().unwrap();
    let keep = |label: &str| relabel.iter().find(|r| r["source_labels"][0] == label).unwrap()["regex"].clone();
    let port = &c["ports"][0];
    assert_eq!(keep("__meta_kubernetes_pod_container_port_name"), port["name"]);
    assert_eq!(keep("__meta_kubernetes_pod_container_name"), c["name"]);
    let listen = value("--listen").unwrap();
    assert_eq!(listen.rsplit(':').next().unwrap().parse::<u64>().ok(), port["containerPort"].as_u64());

    // The config map's config is read without its directories (none exist here), and an
    // unreachable Prometheus is the user's to fix: exit 2, saying so.
    let dir = TempDir::new("deploy-fleet");
    let cfg = dir.path("riskbound.yaml");
    std::fs::write(&cfg, cm["data"]["riskbound.yaml"].as_str().unwrap()).unwrap();
    let dead = format!("http://127.0.0.1:{}", free_port());
    let out = Command::new(bin())
        .args(["fleet", "--config", cfg.to_str().unwrap(), "--prometheus", &dead, "--once"])
        .output()
        .unwrap();
    let err = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(2), "{err}");
    assert!(err.contains("connecting to Prometheus at"), "{err}");

    // Served, /healthz answers at once and /readyz only after a round read Prometheus (which
    // is not there): 503.
    let local = free_port();
    let mut child = Command::new(bin())
        .args(["fleet", "--config", cfg.to_str().unwrap(), "--prometheus", &dead])
        .args(["--listen", &format!("127.0.0.1:{local}"), "--interval", "1s"])
        .stderr(std::process::Stdio::null())
        .spawn()
        .unwrap();
    let get = |path: &str| common::http(local, "GET", path);
    let mut health = None;
    for _ in 0..100 {
        health = get(c["livenessProbe"]["httpGet"]["path"].as_str().unwrap()).ok();
        if health.is_some() {
            break;
        }
        std::thread::sleep(std::time::Duration::from_millis(50));
    }
    assert_eq!(health.map(|h| h.0), Some(200));
    assert_eq!(get(c["readinessProbe"]["httpGet"]["path"].as_str().unwrap()).unwrap().0, 503);
    // The failed round shows in the fleet view's own series.
    let mut metrics = String::new();
    for _ in 0..100 {
        metrics = get("/metrics").unwrap().1;
        if metrics.contains("riskbound_fleet_stale 1") {
            break;
        }
        std::thread::sleep(std::time::Duration::from_millis(50));
    }
    assert!(metrics.contains("riskbound_fleet_stale 1"), "{metrics}");
    assert!(metrics.contains("riskbound_fleet_query_failures_total{reason=\"unreachable\"}"), "{metrics}");
    child.kill().unwrap();
    child.wait().unwrap();
    for probe in ["readinessProbe", "livenessProbe"] {
        assert_eq!(c[probe]["httpGet"]["port"], port["name"], "{probe}");
    }
    assert!(c["resources"]["limits"]["memory"].is_string() && c["resources"]["limits"]["cpu"].is_string());
    assert_eq!(c["securityContext"]["readOnlyRootFilesystem"], true);
}

#[test]
fn containerfile_and_systemd_unit_name_what_exists() {
    let cf = std::fs::read_to_string(repo("deploy/Containerfile")).unwrap();
    let default_port = riskbound::config::DEFAULT_LISTEN.rsplit(':').next().unwrap();
    assert!(cf.lines().any(|l| l == format!("EXPOSE {default_port}")), "EXPOSE the default port {default_port}");
    let json_array = |key: &str| -> Vec<String> {
        let line = cf.lines().find(|l| l.starts_with(key)).unwrap_or_else(|| panic!("{key}"));
        serde_json::from_str(line[key.len()..].trim()).unwrap()
    };
    assert_eq!(json_array("ENTRYPOINT"), vec!["/usr/local/bin/riskbound".to_string()]);
    assert!(cf.contains("COPY --from=build /src/target/release/riskbound /usr/local/bin/riskbound"));
    check_args(&json_array("CMD"), "Containerfile CMD");
    assert!(cf.contains("--bin riskbound"), "the build names the real binary target");

    let unit = std::fs::read_to_string(repo("deploy/systemd/riskbound.service")).unwrap();
    let exec = unit.lines().find_map(|l| l.strip_prefix("ExecStart=")).unwrap();
    let mut words = exec.split_whitespace();
    assert_eq!(words.next(), Some("/usr/local/bin/riskbound"));
    let args: Vec<String> = words.map(str::to_string).collect();
    let config = check_args(&args, "riskbound.service");
    // ConfigurationDirectory=riskbound is /etc/riskbound; StateDirectory=riskbound is /var/lib/riskbound.
    assert!(config.starts_with("/etc/riskbound/") && unit.contains("ConfigurationDirectory=riskbound"));
    assert!(unit.contains("StateDirectory=riskbound") && unit.contains("ReadOnlyPaths=/var/spool/model"));
}

/// Every sample name in a scrape of a daemon that has taken files for a model with an SLA.
fn exported_names() -> BTreeSet<String> {
    let dir = TempDir::new("deploy-names");
    let port = free_port();
    let cfg = common::simple_config(
        &dir,
        port,
        "rescan_interval: 100ms\nmemory_limit: 1GiB",
        "m",
        "    label_wait: 1d\n    sla: { max_risk: 0.2 }",
        "[{ name: all, last: 100 }]",
    );
    let daemon = Daemon::start(&cfg, port);
    dir.drop_file("pred-1.csv", "id,t,p\na,1790000000,1\nb,1790000001,1\n");
    dir.drop_file("label-1.csv", "id,t,y\na,1790000060,1\nb,1790000061,0\n");
    daemon.wait_files("m", "label", 1.0);
    daemon
        .scrape()
        .lines()
        .filter(|l| !l.starts_with('#') && !l.is_empty())
        .map(|l| l.split(['{', ' ']).next().unwrap().to_string())
        .collect()
}

#[test]
fn dashboard_queries_name_exported_metrics() {
    let text = std::fs::read_to_string(repo("deploy/dashboard/riskbound.json")).unwrap();
    let dash: Value = serde_json::from_str(&text).expect("the dashboard is JSON");
    // The description sends the reader to a file that exists, and that file names every panel.
    let about = dash["description"].as_str().unwrap();
    let target = about.split_whitespace().find(|w| w.starts_with("deploy/")).expect("a path in the description");
    let readme = std::fs::read_to_string(repo(target)).unwrap_or_else(|e| panic!("{target}: {e}"));
    for p in dash["panels"].as_array().unwrap() {
        assert!(readme.contains(p["title"].as_str().unwrap()), "{target} does not describe panel {}", p["title"]);
    }
    let mut queries = Vec::new();
    for p in dash["panels"].as_array().unwrap() {
        assert!(p["title"].is_string() && p["gridPos"].is_object(), "{p}");
        for t in p["targets"].as_array().unwrap() {
            queries.push(t["expr"].as_str().unwrap().to_string());
        }
    }
    for v in dash["templating"]["list"].as_array().unwrap() {
        if let Some(q) = v["query"]["query"].as_str() {
            queries.push(q.to_string());
        }
    }
    assert!(queries.len() >= 15, "{} queries", queries.len());
    let exported = exported_names();
    let mut named = BTreeSet::new();
    for q in &queries {
        let mut i = 0;
        while let Some(at) = ["riskbound_", "process_"].iter().filter_map(|p| q[i..].find(p)).min() {
            let start = i + at;
            let end =
                start + q[start..].find(|c: char| !(c.is_ascii_alphanumeric() || c == '_')).unwrap_or(q.len() - start);
            named.insert(q[start..end].to_string());
            i = end;
        }
    }
    let unknown: Vec<_> = named.iter().filter(|n| !exported.contains(*n)).collect();
    assert!(unknown.is_empty(), "dashboard queries name metrics the daemon does not export: {unknown:?}");
    // The panels the dashboard promises.
    for needle in [
        "riskbound_risk_lower_bound",
        "riskbound_risk_upper_bound",
        "riskbound_sla_max_risk",
        "riskbound_window_samples",
        "riskbound_label_coverage_ratio",
        "riskbound_sla_state",
        "riskbound_last_ingest_timestamp_seconds",
        "riskbound_rows_rejected_total",
        "process_resident_memory_bytes",
        "riskbound_memory_limit_bytes",
        "riskbound_http_connections_evicted_total",
    ] {
        assert!(named.contains(needle), "no panel shows {needle}");
    }
}

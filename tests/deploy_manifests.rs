//! The deployment files checked against each other and against the crate,
//! since no container engine or cluster runs where the tests do: every
//! Kubernetes manifest parses; probes, ports and mounts agree with the
//! example config; the pod runs non-root on a read-only root; the image tag
//! is the crate's version; the Dockerfile builds the crate's binary with a
//! locked build; the ConfigMap carries deploy/plumbline.toml verbatim.

#![allow(clippy::unwrap_used, clippy::expect_used)]

use std::path::{Path, PathBuf};

use yaml_rust2::{Yaml, YamlLoader};

fn repo() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

fn read(rel: &str) -> String {
    std::fs::read_to_string(repo().join(rel)).unwrap_or_else(|e| panic!("{rel}: {e}"))
}

fn toml(text: &str) -> config::Config {
    config::Config::builder()
        .add_source(config::File::from_str(text, config::FileFormat::Toml))
        .build()
        .expect("valid TOML")
}

/// What the example config says, as the checks need it.
struct Settings {
    listen: String,
    bundles_dir: String,
    audit_path: String,
    shutdown_grace_ms: i64,
    metrics_listen: String,
}

fn settings() -> Settings {
    let c = toml(&read("deploy/plumbline.toml"));
    let get = |k: &str| c.get_string(k).unwrap_or_else(|e| panic!("{k}: {e}"));
    Settings {
        listen: get("server.listen"),
        bundles_dir: get("models.dir"),
        audit_path: get("audit.path"),
        shutdown_grace_ms: c.get_int("server.shutdown_grace_ms").expect("grace"),
        metrics_listen: get("metrics.listen"),
    }
}

fn port_of(addr: &str) -> i64 {
    let (_, port) = addr.rsplit_once(':').expect("host:port");
    port.parse().expect("numeric port")
}

fn parent(path: &str) -> String {
    Path::new(path)
        .parent()
        .expect("a parent directory")
        .to_string_lossy()
        .into_owned()
}

/// Every document of every manifest under deploy/k8s, with its file name.
fn manifests() -> Vec<(String, Yaml)> {
    let dir = repo().join("deploy/k8s");
    let mut files: Vec<PathBuf> = std::fs::read_dir(&dir)
        .expect("deploy/k8s")
        .map(|e| e.expect("entry").path())
        .filter(|p| p.extension().is_some_and(|x| x == "yaml" || x == "yml"))
        .collect();
    files.sort();
    let mut out = Vec::new();
    for f in files {
        let name = f.file_name().expect("name").to_string_lossy().into_owned();
        let text = std::fs::read_to_string(&f).expect("manifest");
        let docs = YamlLoader::load_from_str(&text).unwrap_or_else(|e| panic!("{name}: {e}"));
        for d in docs {
            out.push((name.clone(), d));
        }
    }
    out
}

fn find(kind: &str, name: &str) -> Yaml {
    manifests()
        .into_iter()
        .map(|(_, d)| d)
        .find(|d| d["kind"].as_str() == Some(kind) && d["metadata"]["name"].as_str() == Some(name))
        .unwrap_or_else(|| panic!("no {kind} named {name}"))
}

fn of_kind(kind: &str) -> Vec<Yaml> {
    manifests()
        .into_iter()
        .map(|(_, d)| d)
        .filter(|d| d["kind"].as_str() == Some(kind))
        .collect()
}

fn deployment() -> Yaml {
    let mut d = of_kind("Deployment");
    assert_eq!(d.len(), 1, "one Deployment");
    d.remove(0)
}

fn container(dep: &Yaml) -> Yaml {
    let cs = dep["spec"]["template"]["spec"]["containers"]
        .as_vec()
        .expect("containers");
    assert_eq!(cs.len(), 1, "one container");
    cs[0].clone()
}

fn list(y: &Yaml) -> Vec<Yaml> {
    y.as_vec().cloned().unwrap_or_default()
}

fn named<'a>(items: &'a [Yaml], name: &str) -> &'a Yaml {
    items
        .iter()
        .find(|i| i["name"].as_str() == Some(name))
        .unwrap_or_else(|| panic!("nothing named {name}"))
}

/// The Dockerfile as instructions (keyword upper-cased, rest), with line
/// continuations joined and comments dropped.
fn dockerfile() -> Vec<(String, String)> {
    let text = read("deploy/Dockerfile");
    let mut out = Vec::new();
    let mut current = String::new();
    for line in text.lines() {
        let t = line.trim();
        if t.starts_with('#') || (t.is_empty() && current.is_empty()) {
            continue;
        }
        if let Some(head) = t.strip_suffix('\\') {
            current.push_str(head);
            current.push(' ');
            continue;
        }
        current.push_str(t);
        let (k, rest) = current.split_once(' ').unwrap_or((current.as_str(), ""));
        out.push((k.to_ascii_uppercase(), rest.trim().to_string()));
        current.clear();
    }
    out
}

fn crate_binary_and_version() -> (String, String) {
    let c = toml(&read("Cargo.toml"));
    let bins = c.get_array("bin").expect("[[bin]]");
    assert_eq!(bins.len(), 1, "one binary");
    let bin = bins[0].clone().into_table().expect("bin table");
    let name = bin["name"].clone().into_string().expect("bin name");
    (name, c.get_string("package.version").expect("version"))
}

#[test]
fn every_manifest_parses_and_names_its_kind() {
    let all = manifests();
    for (file, d) in &all {
        for key in ["apiVersion", "kind"] {
            assert!(d[key].as_str().is_some(), "{file}: no {key}");
        }
        assert!(d["metadata"]["name"].as_str().is_some(), "{file}: no name");
    }
    let kinds: Vec<&str> = all.iter().filter_map(|(_, d)| d["kind"].as_str()).collect();
    for kind in [
        "Deployment",
        "Service",
        "ConfigMap",
        "HorizontalPodAutoscaler",
        "PersistentVolumeClaim",
    ] {
        assert!(kinds.contains(&kind), "no {kind} among {kinds:?}");
    }
}

#[test]
fn probes_and_ports_match_the_configured_listen_ports() {
    let s = settings();
    assert!(
        s.listen.starts_with("0.0.0.0:"),
        "inside a pod the server must listen on all interfaces, not {}",
        s.listen
    );
    let grpc = port_of(&s.listen);
    let c = container(&deployment());
    for probe in ["startupProbe", "livenessProbe", "readinessProbe"] {
        let p = &c[probe]["grpc"]["port"];
        assert_eq!(
            p.as_i64(),
            Some(grpc),
            "{probe} must be a gRPC probe on {grpc}"
        );
    }
    let ports = list(&c["ports"]);
    assert_eq!(named(&ports, "grpc")["containerPort"].as_i64(), Some(grpc));

    let svc = find("Service", "plumbline");
    let sports = list(&svc["spec"]["ports"]);
    let (name, port) = ("grpc", grpc);
    let p = named(&sports, name);
    assert_eq!(p["port"].as_i64(), Some(port));
    // A named target must name a container port that has that number.
    let target = match p["targetPort"].as_str() {
        Some(n) => named(&ports, n)["containerPort"].as_i64(),
        None => p["targetPort"].as_i64(),
    };
    assert_eq!(target, Some(port), "Service port {name}");
    assert_eq!(named(&sports, "grpc")["appProtocol"].as_str(), Some("grpc"));
    // The Service selects the pods of the Deployment.
    let labels = &deployment()["spec"]["template"]["metadata"]["labels"];
    let selector = svc["spec"]["selector"].as_hash().expect("selector");
    for (k, v) in selector {
        assert_eq!(&labels[k.as_str().expect("label key")], v);
    }
    // The image exposes the same ports.
    let exposed: Vec<i64> = dockerfile()
        .iter()
        .filter(|(k, _)| k == "EXPOSE")
        .flat_map(|(_, r)| {
            r.split_whitespace()
                .map(|p| p.parse().expect("port"))
                .collect::<Vec<_>>()
        })
        .collect();
    assert!(exposed.contains(&grpc), "{exposed:?}");
}

#[test]
fn the_metrics_port_agrees_between_the_config_and_the_manifests() {
    let s = settings();
    assert!(
        s.metrics_listen.starts_with("0.0.0.0:"),
        "inside a pod metrics must listen on all interfaces, not {}",
        s.metrics_listen
    );
    let port = port_of(&s.metrics_listen);
    assert_ne!(port, port_of(&s.listen), "metrics need a port of their own");
    let dep = deployment();
    let ports = list(&container(&dep)["ports"]);
    assert_eq!(
        named(&ports, "metrics")["containerPort"].as_i64(),
        Some(port)
    );

    let svc = find("Service", "plumbline");
    let sports = list(&svc["spec"]["ports"]);
    let p = named(&sports, "metrics");
    assert_eq!(p["port"].as_i64(), Some(port));
    let target = match p["targetPort"].as_str() {
        Some(n) => named(&ports, n)["containerPort"].as_i64(),
        None => p["targetPort"].as_i64(),
    };
    assert_eq!(target, Some(port), "Service port metrics");

    // Annotation values are strings in Kubernetes.
    let notes = &dep["spec"]["template"]["metadata"]["annotations"];
    assert_eq!(notes["prometheus.io/scrape"].as_str(), Some("true"));
    assert_eq!(
        notes["prometheus.io/port"].as_str(),
        Some(port.to_string().as_str())
    );
    assert_eq!(notes["prometheus.io/path"].as_str(), Some("/metrics"));

    let exposed: Vec<i64> = dockerfile()
        .iter()
        .filter(|(k, _)| k == "EXPOSE")
        .flat_map(|(_, r)| {
            r.split_whitespace()
                .map(|p| p.parse().expect("port"))
                .collect::<Vec<_>>()
        })
        .collect();
    assert!(exposed.contains(&port), "{exposed:?}");
}

#[test]
fn volumes_are_mounted_where_the_config_points() {
    let s = settings();
    let dep = deployment();
    let c = container(&dep);
    let mounts = list(&c["volumeMounts"]);
    let volumes = list(&dep["spec"]["template"]["spec"]["volumes"]);
    let mount_of = |path: &str| {
        mounts
            .iter()
            .find(|m| m["mountPath"].as_str() == Some(path))
            .unwrap_or_else(|| panic!("nothing mounted at {path}"))
            .clone()
    };

    let bundles = mount_of(&s.bundles_dir);
    assert_eq!(
        bundles["readOnly"].as_bool(),
        Some(true),
        "bundles mount read-only"
    );
    let audit = mount_of(&parent(&s.audit_path));
    assert_ne!(
        audit["readOnly"].as_bool(),
        Some(true),
        "the audit store is written"
    );

    let claims: Vec<Yaml> = of_kind("PersistentVolumeClaim");
    let claim = |volume: &Yaml| -> Yaml {
        let v = named(&volumes, volume["name"].as_str().expect("mount name"));
        let name = v["persistentVolumeClaim"]["claimName"]
            .as_str()
            .expect("a PersistentVolumeClaim");
        claims
            .iter()
            .find(|c| c["metadata"]["name"].as_str() == Some(name))
            .unwrap_or_else(|| panic!("claim {name} is not in pvc.yaml"))
            .clone()
    };
    let bundle_claim = claim(&bundles);
    let audit_claim = claim(&audit);
    assert_ne!(
        bundle_claim["metadata"]["name"],
        audit_claim["metadata"]["name"]
    );
    let modes: Vec<&str> = audit_claim["spec"]["accessModes"]
        .as_vec()
        .expect("access modes")
        .iter()
        .filter_map(Yaml::as_str)
        .collect();
    assert!(
        modes == ["ReadWriteOnce"] || modes == ["ReadWriteOncePod"],
        "SQLite needs block storage with a single writer, not {modes:?}"
    );

    // The config the entrypoint names is the ConfigMap's key, mounted.
    let config_path = entrypoint()[3].clone();
    let mount = mount_of(&parent(&config_path));
    let v = named(&volumes, mount["name"].as_str().expect("name"));
    let cm_name = v["configMap"]["name"].as_str().expect("a ConfigMap volume");
    let cm = find("ConfigMap", cm_name);
    let key = Path::new(&config_path)
        .file_name()
        .expect("file")
        .to_string_lossy()
        .into_owned();
    assert!(
        cm["data"][key.as_str()].as_str().is_some(),
        "ConfigMap lacks {key}"
    );

    // Every mount names a declared volume.
    for m in &mounts {
        named(&volumes, m["name"].as_str().expect("mount name"));
    }
}

#[test]
fn the_pod_runs_as_non_root_on_a_read_only_root() {
    let dep = deployment();
    let pod = &dep["spec"]["template"]["spec"]["securityContext"];
    assert_eq!(pod["runAsNonRoot"].as_bool(), Some(true));
    let uid = pod["runAsUser"].as_i64().expect("runAsUser");
    assert_ne!(uid, 0);
    let user = dockerfile()
        .into_iter()
        .rev()
        .find(|(k, _)| k == "USER")
        .map(|(_, r)| r)
        .expect("USER in the Dockerfile");
    let image_uid: i64 = user
        .split(':')
        .next()
        .expect("uid")
        .parse()
        .expect("numeric uid");
    assert_eq!(image_uid, uid, "the image's user is the pod's user");
    let c = container(&dep);
    let sc = &c["securityContext"];
    assert_eq!(sc["readOnlyRootFilesystem"].as_bool(), Some(true));
    assert_eq!(sc["allowPrivilegeEscalation"].as_bool(), Some(false));
    let dropped: Vec<String> = list(&sc["capabilities"]["drop"])
        .iter()
        .filter_map(|y| y.as_str().map(str::to_string))
        .collect();
    assert_eq!(dropped, ["ALL"]);
}

#[test]
fn the_image_tag_is_the_crate_version_never_latest() {
    let (_, version) = crate_binary_and_version();
    let image = container(&deployment())["image"]
        .as_str()
        .expect("image")
        .to_string();
    let (_, tag) = image.rsplit_once(':').expect("an explicit tag");
    assert_ne!(tag, "latest");
    assert_eq!(
        tag, version,
        "image {image} should be tagged with the crate version"
    );
    for (k, rest) in dockerfile() {
        if k == "FROM" {
            let base = rest.split_whitespace().next().expect("base image");
            let (_, tag) = base
                .rsplit_once(':')
                .unwrap_or_else(|| panic!("{base} has no tag"));
            assert_ne!(tag, "latest", "{base}");
        }
    }
}

/// Parses a quantity such as "500m", "2", "1Gi" or "512Mi" into base units.
fn quantity(q: &Yaml) -> f64 {
    let s = match q {
        Yaml::String(s) => s.clone(),
        Yaml::Integer(i) => i.to_string(),
        Yaml::Real(r) => r.clone(),
        other => panic!("not a quantity: {other:?}"),
    };
    let suffixes = [
        ("Ki", 1024f64),
        ("Mi", 1024f64.powi(2)),
        ("Gi", 1024f64.powi(3)),
        ("m", 1e-3),
    ];
    for (suffix, factor) in suffixes {
        if let Some(n) = s.strip_suffix(suffix) {
            return n.parse::<f64>().expect("number") * factor;
        }
    }
    s.parse().expect("number")
}

#[test]
fn resources_have_requests_within_limits() {
    let r = &container(&deployment())["resources"];
    for what in ["cpu", "memory"] {
        let request = quantity(&r["requests"][what]);
        let limit = quantity(&r["limits"][what]);
        assert!(
            request > 0.0 && request <= limit,
            "{what}: {request} vs {limit}"
        );
    }
    // Two GiB hold the bundle of 2,000 rows × 200 descriptors many times
    // over (rows × descriptors × 8 bytes × a small factor, OPS.md).
    assert!(quantity(&r["limits"]["memory"]) >= 1024f64.powi(3));
}

#[test]
fn shutdown_fits_in_the_grace_period() {
    let s = settings();
    let grace = deployment()["spec"]["template"]["spec"]["terminationGracePeriodSeconds"]
        .as_i64()
        .expect("terminationGracePeriodSeconds");
    assert!(
        grace * 1000 > s.shutdown_grace_ms,
        "the kubelet would kill the server before it drains ({grace} s vs {} ms)",
        s.shutdown_grace_ms
    );
}

/// The ENTRYPOINT in exec (JSON) form.
fn entrypoint() -> Vec<String> {
    let (_, e) = dockerfile()
        .into_iter()
        .rev()
        .find(|(k, _)| k == "ENTRYPOINT")
        .expect("ENTRYPOINT");
    serde_json::from_str(&e).expect("ENTRYPOINT in exec form")
}

#[test]
fn the_dockerfile_builds_the_crate_binary_locked_and_runs_it() {
    let (bin, _) = crate_binary_and_version();
    let steps = dockerfile();
    let runs: Vec<&String> = steps
        .iter()
        .filter(|(k, _)| k == "RUN")
        .map(|(_, r)| r)
        .collect();
    let build = runs
        .iter()
        .find(|r| r.contains("cargo build"))
        .expect("a cargo build step");
    for needle in [
        "cargo build --release --locked".to_string(),
        format!("--bin {bin}"),
        format!("target/release/{bin}"),
    ] {
        assert!(
            build.contains(&needle),
            "build step lacks `{needle}`: {build}"
        );
    }
    let e = entrypoint();
    assert_eq!(
        e,
        [
            bin.as_str(),
            "serve",
            "--config",
            "/etc/plumbline/plumbline.toml"
        ]
    );
    // Multi-stage: a Rust builder, then a Debian slim runtime.
    let froms: Vec<&String> = steps
        .iter()
        .filter(|(k, _)| k == "FROM")
        .map(|(_, r)| r)
        .collect();
    assert!(froms.len() >= 2, "multi-stage build");
    assert!(froms[0].starts_with("rust:") && froms[0].contains(" AS builder"));
    let runtime = froms.last().expect("runtime stage");
    assert!(
        runtime.starts_with("debian:") && runtime.contains("-slim"),
        "{runtime}"
    );
    assert!(steps.iter().any(|(k, r)| k == "COPY"
        && r.starts_with("--from=builder")
        && r.contains(&format!("/{bin} "))));
    // Volumes where the config points; no secrets in the image.
    let s = settings();
    let volume = steps
        .iter()
        .find(|(k, _)| k == "VOLUME")
        .expect("VOLUME")
        .1
        .clone();
    for path in [s.bundles_dir.clone(), parent(&s.audit_path)] {
        assert!(
            volume.contains(&format!("\"{path}\"")),
            "VOLUME lacks {path}"
        );
    }
    for (k, r) in &steps {
        if k == "ENV" || k == "ARG" {
            let upper = r.to_ascii_uppercase();
            for word in ["SECRET", "PASSWORD", "TOKEN", "KEY"] {
                assert!(
                    !upper.contains(word),
                    "{k} {r} looks like a baked-in secret"
                );
            }
        }
    }
}

#[test]
fn the_configmap_embeds_plumbline_toml_verbatim() {
    let cm = find("ConfigMap", "plumbline-config");
    let embedded = cm["data"]["plumbline.toml"]
        .as_str()
        .expect("plumbline.toml key");
    assert_eq!(embedded, read("deploy/plumbline.toml"));
}

#[test]
fn the_autoscaler_holds_one_replica_while_the_audit_store_is_sqlite() {
    let dep = deployment();
    let name = dep["metadata"]["name"].as_str().expect("name");
    let hpas = of_kind("HorizontalPodAutoscaler");
    assert_eq!(hpas.len(), 1);
    let target = &hpas[0]["spec"]["scaleTargetRef"];
    assert_eq!(target["kind"].as_str(), Some("Deployment"));
    assert_eq!(target["name"].as_str(), Some(name));
    // The embedded store is one SQLite file with one writer: more replicas
    // would either fail to mount it or corrupt it. Until a shared backend
    // exists, scaling is vertical.
    assert!(settings().audit_path.ends_with(".db"));
    assert_eq!(hpas[0]["spec"]["maxReplicas"].as_i64(), Some(1));
    assert_eq!(dep["spec"]["replicas"].as_i64(), Some(1));
    assert_eq!(dep["spec"]["strategy"]["type"].as_str(), Some("Recreate"));
}

#[test]
fn the_example_config_is_accepted_by_the_server_settings() {
    // The same loader `plumbline serve --config` uses, unknown keys rejected:
    // a key the server does not know would stop the container at start-up.
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("deploy/plumbline.toml");
    let loaded = plumbline::service::settings::Settings::load(
        Some(&path),
        &std::collections::HashMap::new(),
        &[],
    );
    let s = loaded.unwrap_or_else(|e| panic!("deploy/plumbline.toml is refused: {e}"));
    assert_eq!(s.server.listen.port(), 7420);
    let metrics = s.metrics.listen_addr().expect("metrics.listen parses");
    assert_eq!(
        metrics.map(|a| a.port() as i64),
        Some(port_of(&settings().metrics_listen)),
        "the server reads the metrics port the manifests use"
    );
    assert_eq!(s.audit.path, Path::new("/var/lib/plumbline/audit/audit.db"));
}

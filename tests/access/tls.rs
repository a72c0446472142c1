//! TLS and mTLS with throwaway certificates made here (rcgen): the right CA works, a wrong
//! one and plain text are refused, client certificates are checked, and new certificate
//! files are picked up without a restart.

use rcgen::{BasicConstraints, CertificateParams, DnType, ExtendedKeyUsagePurpose, IsCa, Issuer, KeyPair};

use super::process::{Serve, ServeOptions, TempDir};
use super::{eventually, put, Tokens};

/// A certificate authority of the test.
struct Ca {
    issuer: Issuer<'static, KeyPair>,
    pem: String,
}

impl Ca {
    fn new(name: &str) -> Ca {
        let key = KeyPair::generate().unwrap();
        let mut params = CertificateParams::new(Vec::<String>::new()).unwrap();
        params.is_ca = IsCa::Ca(BasicConstraints::Unconstrained);
        params.distinguished_name.push(DnType::CommonName, name);
        let cert = params.self_signed(&key).unwrap();
        Ca { pem: cert.pem(), issuer: Issuer::new(params, key) }
    }

    /// A certificate and its key (PEM) for 127.0.0.1 and localhost (a server), or for a client.
    fn leaf(&self, client: bool) -> (String, String) {
        let key = KeyPair::generate().unwrap();
        let names = if client { vec!["pollard-test-client".to_string()] } else { vec!["127.0.0.1".to_string(), "localhost".to_string()] };
        let mut params = CertificateParams::new(names).unwrap();
        params.distinguished_name.push(DnType::CommonName, if client { "test client" } else { "test server" });
        params.extended_key_usages = vec![if client { ExtendedKeyUsagePurpose::ClientAuth } else { ExtendedKeyUsagePurpose::ServerAuth }];
        let cert = params.signed_by(&key, &self.issuer).unwrap();
        (cert.pem(), key.serialize_pem())
    }
}

fn s(p: &std::path::Path) -> &str {
    p.to_str().unwrap()
}

/// A TLS server with tokens; its certificate from `ca`; client certificates checked
/// against `client_ca` when given.
fn tls_server(dir: &TempDir, ca: &Ca, client_ca: Option<&Ca>, tokens: &Tokens, more: &str) -> Serve {
    let (cert, key) = ca.leaf(false);
    put(&dir.join("server.pem"), &cert);
    put(&dir.join("server.key"), &key);
    std::fs::write(dir.join("tokens"), tokens.file_text()).unwrap();
    let mut config = format!("tokens_file = {:?}\ntls_cert_file = {:?}\ntls_key_file = {:?}\n", s(&dir.join("tokens")), s(&dir.join("server.pem")), s(&dir.join("server.key")));
    if let Some(c) = client_ca {
        put(&dir.join("client-ca.pem"), &c.pem);
        config.push_str(&format!("tls_client_ca_file = {:?}\n", s(&dir.join("client-ca.pem"))));
    }
    config.push_str(more);
    Serve::start_with(ServeOptions { config: Some(config), scheme: Some("https".into()), ..ServeOptions::default() })
}

#[test]
fn tls_with_the_right_ca_plain_text_refused_certificates_reloaded() {
    let dir = TempDir::new("access-tls");
    let tokens = Tokens::new();
    let ca = Ca::new("test CA one");
    let health_port = super::process::free_port();
    let mut server = tls_server(&dir, &ca, None, &tokens, &format!("health_listen = \"127.0.0.1:{health_port}\"\n"));
    put(&dir.join("ca1.pem"), &ca.pem);
    let ca1 = dir.join("ca1.pem");
    let url = server.url.clone();
    assert!(url.starts_with("https://"));
    let with = |ca: &std::path::Path, args: &[&str]| {
        let mut all = vec!["--ca", s(ca), "--token", &tokens.admin];
        all.extend_from_slice(args);
        super::process::client(&url, &all)
    };

    // The right CA: calls work end to end, an upload included.
    let put_out = with(&ca1, &["put", s(&super::process::data("iris.csv")), "--name", "iris", "--target", "target", "--json"]).json();
    assert_eq!(put_out["rows"], 150, "{put_out}");
    let listed = with(&ca1, &["datasets", "--json"]).json();
    assert_eq!(listed.as_array().unwrap().len(), 1);

    // A CA that did not sign the server's certificate: refused, and said so.
    let other = Ca::new("some other CA");
    put(&dir.join("other.pem"), &other.pem);
    let e = with(&dir.join("other.pem"), &["datasets"]).fails();
    assert!(e.contains("cannot reach") && e.to_lowercase().contains("certificate"), "{e}");
    // https:// without a CA is refused before any connection, naming --ca.
    let e = server.run(&["--token", &tokens.admin, "datasets"]).fails();
    assert!(e.contains("--ca"), "{e}");
    // Plain text to the TLS port: no answer, and the server stays up.
    let plain = url.replacen("https://", "http://", 1);
    super::process::client(&plain, &["--token", &tokens.admin, "datasets"]).fails();
    assert!(server.alive());

    // health_listen: health checks alone, in plain text (for probes that cannot speak TLS).
    tokio::runtime::Runtime::new().unwrap().block_on(async {
        use tonic_health::pb::{health_check_response::ServingStatus, health_client::HealthClient, HealthCheckRequest};
        let ch = super::channel(&format!("http://127.0.0.1:{health_port}")).await;
        let r = HealthClient::new(ch.clone()).check(HealthCheckRequest { service: "pollard.v1.Runs".into() }).await.unwrap().into_inner();
        assert_eq!(r.status, ServingStatus::Serving as i32);
        let e = pollard::pb::runs_client::RunsClient::new(ch).list_runs(pollard::pb::ListRunsRequest::default()).await.unwrap_err();
        assert_eq!(e.code(), tonic::Code::Unimplemented, "only health on the health address: {e:?}");
    });

    // New certificate files from another CA: picked up without a restart; the old CA no
    // longer verifies new connections.
    let ca2 = Ca::new("test CA two");
    put(&dir.join("ca2.pem"), &ca2.pem);
    let (cert, key) = ca2.leaf(false);
    put(&dir.join("server.key"), &key);
    put(&dir.join("server.pem"), &cert);
    eventually("the new certificate is served", || with(&dir.join("ca2.pem"), &["datasets", "--json"]).code == Some(0));
    with(&ca1, &["datasets"]).fails();
    // SIGHUP reloads too (the files are unchanged: the server keeps serving them).
    server.signal(libc::SIGHUP);
    eventually("a reload after SIGHUP", || server.log().matches("TLS files reloaded").count() >= 2);
    assert!(server.alive(), "SIGHUP does not end the server");
    with(&dir.join("ca2.pem"), &["datasets", "--json"]).json();
    // A broken key keeps the certificate that works.
    put(&dir.join("server.key"), "not a key\n");
    server.signal(libc::SIGHUP);
    eventually("the broken file is reported", || server.log().contains("keeping what was loaded before"));
    with(&dir.join("ca2.pem"), &["datasets", "--json"]).json();
}

#[test]
fn mtls_refuses_missing_and_wrong_client_certificates() {
    let dir = TempDir::new("access-mtls");
    let tokens = Tokens::new();
    let server_ca = Ca::new("server CA");
    let client_ca = Ca::new("client CA");
    let mut server = tls_server(&dir, &server_ca, Some(&client_ca), &tokens, "");
    put(&dir.join("ca.pem"), &server_ca.pem);
    let (good_cert, good_key) = client_ca.leaf(true);
    put(&dir.join("good.pem"), &good_cert);
    put(&dir.join("good.key"), &good_key);
    let (bad_cert, bad_key) = Ca::new("rogue CA").leaf(true);
    put(&dir.join("bad.pem"), &bad_cert);
    put(&dir.join("bad.key"), &bad_key);
    let ca = dir.join("ca.pem");
    let call = |cert: Option<(&str, &str)>| {
        let mut args = vec!["--ca", s(&ca), "--token", &tokens.reader];
        if let Some((c, k)) = cert {
            args.extend_from_slice(&["--cert", c, "--key", k]);
        }
        args.extend_from_slice(&["datasets", "--json"]);
        server.run(&args)
    };
    let (good, goodk, bad, badk) = (dir.join("good.pem"), dir.join("good.key"), dir.join("bad.pem"), dir.join("bad.key"));
    call(Some((s(&good), s(&goodk)))).json();
    // Refused; with --json the error is one JSON line on stderr.
    for out in [call(None), call(Some((s(&bad), s(&badk))))] {
        assert!(matches!(out.code, Some(c) if c != 0) && out.stdout.is_empty(), "{}", out.describe());
        let e: serde_json::Value = serde_json::from_str(&out.stderr).unwrap_or_else(|e| panic!("{e}: {}", out.describe()));
        assert!(e["error"]["code"].is_string() && e["error"]["message"].is_string(), "{}", out.describe());
    }
    // A right certificate is not a token: the token is still checked.
    let e = server.run(&["--ca", s(&ca), "--cert", s(&good), "--key", s(&goodk), "--token", "pollard_nope", "datasets"]).fails();
    assert!(e.contains("Unauthenticated"), "{e}");
    // A client certificate without its key is a usage error, before any connection.
    let e = server.run(&["--ca", s(&ca), "--cert", s(&good), "datasets"]).fails();
    assert!(e.contains("--cert and --key"), "{e}");
    assert!(server.alive());
}

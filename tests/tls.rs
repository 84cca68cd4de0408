//! TLS through the real daemon, with certificates made at test time (rcgen): a client that
//! trusts the test CA is served over https; a plaintext client, and a client that does not
//! trust the CA, are not; with --tls-client-ca a client without its own certificate is refused
//! and one with a certificate from that CA is served. A non-loopback --listen is accepted with
//! TLS.

mod common;

use std::path::Path;

use common::{Daemon, run};
use rcgen::{BasicConstraints, CertificateParams, IsCa, Issuer, KeyPair};

/// Writes ca.pem, server.pem, server.key, client.pem and client.key into `dir`.
fn make_certs(dir: &Path) {
    let ca_key = KeyPair::generate().unwrap();
    let mut ca_params = CertificateParams::new(Vec::<String>::new()).unwrap();
    ca_params.is_ca = IsCa::Ca(BasicConstraints::Unconstrained);
    let ca_cert = ca_params.self_signed(&ca_key).unwrap();
    let issuer = Issuer::new(ca_params, ca_key);
    let server_key = KeyPair::generate().unwrap();
    let server = CertificateParams::new(vec!["localhost".to_string(), "127.0.0.1".to_string()])
        .unwrap()
        .signed_by(&server_key, &issuer)
        .unwrap();
    let client_key = KeyPair::generate().unwrap();
    let client = CertificateParams::new(vec!["analyst-laptop".to_string()])
        .unwrap()
        .signed_by(&client_key, &issuer)
        .unwrap();
    let w = |name: &str, text: String| std::fs::write(dir.join(name), text).unwrap();
    w("ca.pem", ca_cert.pem());
    w("server.pem", server.pem());
    w("server.key", server_key.serialize_pem());
    w("client.pem", client.pem());
    w("client.key", client_key.serialize_pem());
}

fn p(dir: &Path, name: &str) -> String {
    dir.join(name).display().to_string()
}

#[test]
fn a_tls_round_trip_and_plaintext_or_untrusting_clients_refused() {
    let certs = tempfile::tempdir().unwrap();
    make_certs(certs.path());
    let d = Daemon::start_with(&[
        "--tls-cert",
        &p(certs.path(), "server.pem"),
        "--tls-key",
        &p(certs.path(), "server.key"),
    ]);
    let https = format!("https://{}", d.addr);
    let ok = run(
        d.client(Some(&d.admin)),
        &[
            "whoami",
            "--server",
            &https,
            "--ca",
            &p(certs.path(), "ca.pem"),
        ],
    )
    .ok();
    assert!(!ok.stdout.trim().is_empty(), "{}", ok.stdout);
    // A plaintext client cannot talk to a TLS daemon.
    let plain = run(
        d.client(Some(&d.admin)),
        &["whoami", "--server", &format!("http://{}", d.addr)],
    );
    assert_ne!(plain.code, 0, "a plaintext client was served over TLS");
    // A client that does not trust the test CA refuses the daemon's certificate.
    let untrusting = run(d.client(Some(&d.admin)), &["whoami", "--server", &https]);
    assert_ne!(
        untrusting.code, 0,
        "a client without the CA accepted the certificate"
    );
}

#[test]
fn mutual_tls_requires_a_client_certificate_from_the_ca() {
    let certs = tempfile::tempdir().unwrap();
    make_certs(certs.path());
    let d = Daemon::start_with(&[
        "--tls-cert",
        &p(certs.path(), "server.pem"),
        "--tls-key",
        &p(certs.path(), "server.key"),
        "--tls-client-ca",
        &p(certs.path(), "ca.pem"),
    ]);
    let https = format!("https://{}", d.addr);
    let ca = p(certs.path(), "ca.pem");
    let without = run(
        d.client(Some(&d.admin)),
        &["whoami", "--server", &https, "--ca", &ca],
    );
    assert_ne!(without.code, 0, "a client without a certificate was served");
    run(
        d.client(Some(&d.admin)),
        &[
            "whoami",
            "--server",
            &https,
            "--ca",
            &ca,
            "--client-cert",
            &p(certs.path(), "client.pem"),
            "--client-key",
            &p(certs.path(), "client.key"),
        ],
    )
    .ok();
}

#[test]
fn a_non_loopback_listen_is_accepted_with_tls() {
    let certs = tempfile::tempdir().unwrap();
    make_certs(certs.path());
    let dir = tempfile::tempdir().unwrap();
    let db = dir.path().join("h.db").display().to_string();
    let mut child = common::holdout()
        .args([
            "serve",
            "--db",
            &db,
            "--listen",
            "0.0.0.0:0",
            "--tls-cert",
            &p(certs.path(), "server.pem"),
            "--tls-key",
            &p(certs.path(), "server.key"),
        ])
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::null())
        .spawn()
        .unwrap();
    let mut line = String::new();
    std::io::BufRead::read_line(
        &mut std::io::BufReader::new(child.stdout.take().unwrap()),
        &mut line,
    )
    .unwrap();
    let _ = child.kill();
    let _ = child.wait();
    assert!(line.starts_with("listening on 0.0.0.0:"), "{line:?}");
}

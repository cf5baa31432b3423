//! TLS and mutual TLS with certificates made at test time (rcgen): a client with a certificate from the
//! configured authority gets in; one without a certificate, or with one from another authority, does not.

use framewise_proto::v1 as pb;
use framewise_server::config::TlsConfig;
use framewise_server::{ModelRegistry, ServerConfig};
use framewise_tests::demo_model;
use pb::frame_analysis_client::FrameAnalysisClient;
use rcgen::{
    BasicConstraints, CertificateParams, CertifiedIssuer, DnType, ExtendedKeyUsagePurpose, IsCa,
    KeyPair,
};
use tonic::transport::{Certificate, Channel, ClientTlsConfig, Identity};

fn authority(name: &str) -> CertifiedIssuer<'static, KeyPair> {
    let mut params = CertificateParams::new(Vec::<String>::new()).expect("params");
    params.is_ca = IsCa::Ca(BasicConstraints::Unconstrained);
    params.distinguished_name.push(DnType::CommonName, name);
    CertifiedIssuer::self_signed(params, KeyPair::generate().expect("key")).expect("authority")
}

fn leaf(
    issuer: &CertifiedIssuer<'static, KeyPair>,
    name: &str,
    purpose: ExtendedKeyUsagePurpose,
) -> (String, String) {
    let key = KeyPair::generate().expect("key");
    let mut params = CertificateParams::new(vec![name.to_string()]).expect("params");
    params.distinguished_name.push(DnType::CommonName, name);
    params.extended_key_usages = vec![purpose];
    let cert = params.signed_by(&key, issuer).expect("signed");
    (cert.pem(), key.serialize_pem())
}

async fn list_model_cards(
    port: u16,
    ca_pem: &str,
    identity: Option<&(String, String)>,
) -> Result<usize, String> {
    let mut tls = ClientTlsConfig::new()
        .ca_certificate(Certificate::from_pem(ca_pem))
        .domain_name("localhost");
    if let Some((cert, key)) = identity {
        tls = tls.identity(Identity::from_pem(cert, key));
    }
    let channel = Channel::from_shared(format!("https://127.0.0.1:{port}"))
        .map_err(|e| e.to_string())?
        .tls_config(tls)
        .map_err(|e| e.to_string())?
        .connect()
        .await
        .map_err(|e| format!("connect: {e}"))?;
    let reply = FrameAnalysisClient::new(channel)
        .list_model_cards(pb::ModelCardsRequest {})
        .await
        .map_err(|e| format!("call: {e}"))?;
    Ok(reply.into_inner().models.len())
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn mutual_tls_admits_only_clients_of_the_configured_authority() {
    let dir = framewise_tests::workspace_root()
        .join("target/test-scratch")
        .join(format!("tls-{}", std::process::id()));
    std::fs::create_dir_all(&dir).expect("scratch");
    let ours = authority("framewise test authority");
    let other = authority("another authority");
    let (server_cert, server_key) = leaf(&ours, "localhost", ExtendedKeyUsagePurpose::ServerAuth);
    let client = leaf(&ours, "device-1", ExtendedKeyUsagePurpose::ClientAuth);
    let stranger = leaf(&other, "device-2", ExtendedKeyUsagePurpose::ClientAuth);
    let write = |name: &str, text: &str| {
        let path = dir.join(name);
        std::fs::write(&path, text).expect("write");
        path
    };
    let tls = TlsConfig {
        cert: write("server.pem", &server_cert),
        key: write("server.key", &server_key),
        client_ca: Some(write("ca.pem", &ours.pem())),
    };
    let config = ServerConfig {
        listen: "127.0.0.1:0".parse().expect("addr"),
        tls: Some(tls),
        ..Default::default()
    };
    let server = framewise_server::start(config, Some(ModelRegistry::new(vec![demo_model()])))
        .await
        .expect("starts");
    let port = server.addr.port();

    assert_eq!(
        list_model_cards(port, &ours.pem(), Some(&client)).await,
        Ok(1),
        "a client of our authority gets in"
    );
    assert!(
        list_model_cards(port, &ours.pem(), None).await.is_err(),
        "a client without a certificate is refused"
    );
    assert!(
        list_model_cards(port, &ours.pem(), Some(&stranger))
            .await
            .is_err(),
        "another authority's client is refused"
    );
    // Plaintext to a TLS port fails too.
    let plain = FrameAnalysisClient::connect(format!("http://127.0.0.1:{port}")).await;
    let refused = match plain {
        Err(_) => true,
        Ok(mut c) => c.list_model_cards(pb::ModelCardsRequest {}).await.is_err(),
    };
    assert!(refused, "plaintext is refused on a TLS port");
    server.stop().await.expect("stops");
    let _ = std::fs::remove_dir_all(&dir);
}

#[test]
fn plaintext_on_a_non_loopback_address_is_refused_unless_allowed() {
    let config = ServerConfig {
        listen: "0.0.0.0:0".parse().expect("addr"),
        ..Default::default()
    };
    let err = config.validate().expect_err("refused");
    assert_eq!(err.field, "listen");
    let allowed = ServerConfig {
        allow_insecure_remote: true,
        ..config
    };
    assert!(allowed.validate().is_ok());
}

/// The `framewise` command against servers with TLS and mutual TLS: `--tls-ca` names the authority,
/// `--tls-cert` and `--tls-key` the client's certificate; a missing authority or certificate is refused with
/// what to give, and the usual connection mistakes (no scheme, nothing listening, https to plaintext) say
/// what happened.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_command_line_client_speaks_tls_and_mutual_tls_and_explains_failures() {
    let dir = framewise_tests::workspace_root()
        .join("target/test-scratch")
        .join(format!("tls-cli-{}", std::process::id()));
    std::fs::create_dir_all(&dir).expect("scratch");
    let ours = authority("framewise test authority");
    let (server_cert, server_key) = leaf(&ours, "127.0.0.1", ExtendedKeyUsagePurpose::ServerAuth);
    let (client_cert, client_key) = leaf(&ours, "device-1", ExtendedKeyUsagePurpose::ClientAuth);
    let write = |name: &str, text: &str| {
        let path = dir.join(name);
        std::fs::write(&path, text).expect("write");
        path
    };
    let ca = write("ca.pem", &ours.pem());
    let (cert, key) = (
        write("client.pem", &client_cert),
        write("client.key", &client_key),
    );
    let start = |client_ca: Option<std::path::PathBuf>| {
        let tls = TlsConfig {
            cert: write("server.pem", &server_cert),
            key: write("server.key", &server_key),
            client_ca,
        };
        let config = ServerConfig {
            listen: "127.0.0.1:0".parse().expect("addr"),
            tls: Some(tls),
            ..Default::default()
        };
        framewise_server::start(config, Some(ModelRegistry::new(vec![demo_model()])))
    };
    // `framewise models` itself, in this process (the function the binary calls): the server runs on this
    // runtime, so the command is not spawned as a child here.
    let models = |url: String,
                  ca: Option<&std::path::Path>,
                  identity: Option<(&std::path::Path, &std::path::Path)>| {
        let flags = framewise_cli::client::ConnectFlags {
            tls_ca: ca.map(|p| p.to_path_buf()),
            tls_cert: identity.map(|(c, _)| c.to_path_buf()),
            tls_key: identity.map(|(_, k)| k.to_path_buf()),
            ..Default::default()
        };
        async move {
            framewise_cli::models::run(&url, None, &flags, true)
                .await
                .map_err(|e| format!("{e:#}"))
        }
    };
    // The usual mistakes, through the binary (they need no server).
    let binary = |url: String, flags: Vec<String>| {
        let out = std::process::Command::new(framewise_tests::binary("framewise"))
            .args(["models", "--server", &url])
            .args(flags)
            .output()
            .expect("framewise runs");
        (
            out.status.success(),
            String::from_utf8_lossy(&out.stderr).to_string(),
        )
    };

    // TLS: the authority is needed, and enough.
    let server = start(None).await.expect("starts");
    let url = format!("https://127.0.0.1:{}", server.addr.port());
    assert_eq!(models(url.clone(), Some(&ca), None).await, Ok(()));
    let text = models(url.clone(), None, None)
        .await
        .expect_err("no authority");
    assert!(text.contains("--tls-ca"), "without the authority: {text}");
    // Plaintext to the TLS port says what happened.
    let plain = format!("http://127.0.0.1:{}", server.addr.port());
    let text = models(plain, None, None).await.expect_err("plaintext");
    assert!(
        text.contains("connection") && text.contains("https://"),
        "{text}"
    );
    server.stop().await.expect("stops");

    // Mutual TLS: the client's certificate is needed too.
    let server = start(Some(ca.clone())).await.expect("starts");
    let url = format!("https://127.0.0.1:{}", server.addr.port());
    assert_eq!(
        models(url.clone(), Some(&ca), Some((&cert, &key))).await,
        Ok(())
    );
    assert!(
        models(url, Some(&ca), None).await.is_err(),
        "no client certificate"
    );
    server.stop().await.expect("stops");

    let (ok, text) = binary("127.0.0.1:50051".into(), vec![]);
    assert!(
        !ok && text.contains("has no scheme") && text.contains("http://127.0.0.1:50051"),
        "{text}"
    );
    let (ok, text) = binary(
        format!("http://127.0.0.1:{}", framewise_tests::free_port()),
        vec![],
    );
    assert!(!ok && text.contains("nothing listens there"), "{text}");
    let (ok, text) = binary(
        format!("http://127.0.0.1:{}", framewise_tests::free_port()),
        vec!["--tls-ca".into(), ca.display().to_string()],
    );
    assert!(!ok && text.contains("not an https:// URL"), "{text}");
    let _ = std::fs::remove_dir_all(&dir);
}

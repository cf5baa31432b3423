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

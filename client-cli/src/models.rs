//! `models`: the server's models (name, version, SHA-256, classes, input recipe, cautions).

use anyhow::Result;
use framewise_proto::v1 as pb;

use crate::client;
use crate::output::{SelfTestInfo, caution_line, table};

/// Lists the models, as a table or as JSON lines.
pub async fn run(
    url: &str,
    token: Option<&str>,
    connect: &client::ConnectFlags,
    json: bool,
) -> Result<()> {
    let mut grpc = client::connect_with(url, connect).await?;
    let reply = grpc
        .list_model_cards(client::with_token(pb::ModelCardsRequest {}, token)?)
        .await
        .map_err(client::status_error)?;
    let reply = reply.into_inner();
    if json {
        println!(
            "{}",
            serde_json::json!({"kind": "header", "caution": reply.caution, "server": url})
        );
        for m in &reply.models {
            let id = m.identity.clone().unwrap_or_default();
            let input = m.input.clone().unwrap_or_default();
            let self_test = id
                .self_test
                .as_ref()
                .map(SelfTestInfo::from)
                .unwrap_or_default();
            println!(
                "{}",
                serde_json::json!({
                    "kind": "model", "name": id.name, "version": id.version, "sha256": id.sha256, "engine": id.engine,
                    "self_test": self_test,
                    "default": m.is_default, "classes": m.classes,
                    "input": {"tensor": input.tensor, "layout": input.layout, "width": input.width, "height": input.height,
                              "colour_order": input.colour_order, "resize": input.resize, "interpolation": input.interpolation,
                              "scale": input.scale, "mean": input.mean, "std": input.std, "output": input.output},
                    "intended_use": m.intended_use, "model_caution": m.model_caution,
                })
            );
        }
        return Ok(());
    }
    let rows: Vec<Vec<String>> = reply
        .models
        .iter()
        .map(|m| {
            let id = m.identity.clone().unwrap_or_default();
            let input = m.input.clone().unwrap_or_default();
            let self_test = id
                .self_test
                .as_ref()
                .map(SelfTestInfo::from)
                .unwrap_or_default();
            vec![
                format!("{}{}", id.name, if m.is_default { " *" } else { "" }),
                id.version,
                id.engine,
                format!(
                    "{}x{} {} {} {}",
                    input.width,
                    input.height,
                    input.colour_order,
                    input.resize,
                    input.interpolation
                ),
                m.classes.join(","),
                match self_test.verdict.as_str() {
                    "passed" | "failed" => format!(
                        "{} (max dev {:.1e})",
                        self_test.verdict, self_test.largest_deviation
                    ),
                    other => other.to_string(),
                },
                id.sha256,
            ]
        })
        .collect();
    print!(
        "{}",
        table(
            &[
                "model",
                "version",
                "engine",
                "input",
                "classes",
                "self-test",
                "sha256"
            ],
            &rows
        )
    );
    for m in &reply.models {
        let name = m
            .identity
            .as_ref()
            .map(|i| i.name.as_str())
            .unwrap_or_default();
        if !m.intended_use.is_empty() {
            println!("{name}: intended use: {}", m.intended_use);
        }
        if !m.model_caution.is_empty() {
            println!("{name}: model caution: {}", m.model_caution);
        }
    }
    println!("* default model\n{}", caution_line());
    Ok(())
}

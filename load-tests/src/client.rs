//! The load generator's only way to the server: plain HTTP through a blocking client. One
//! [`Client`] is shared by every worker thread (ureq's agent pools connections).

use std::time::Duration;

use anyhow::{Context, bail};
use serde_json::{Value, json};

use crate::mix::Kind;

/// What one inference request is made of, the same for every request of a run.
#[derive(Debug, Clone, PartialEq)]
pub struct RequestShape {
    /// Texts of each embed and classify request.
    pub texts: Vec<String>,
    /// Prompt and token limit of each generate request.
    pub prompt: String,
    pub max_tokens: usize,
}

impl Default for RequestShape {
    fn default() -> Self {
        Self {
            texts: [
                "Can I book a brake bleed for Saturday morning?",
                "My rear wheel has been wobbling since the last service.",
                "Do you stock tubeless sealant for gravel tyres?",
                "The shifter cable snapped halfway up the hill.",
            ]
            .map(str::to_owned)
            .to_vec(),
            prompt: "A customer brought in a bicycle with".to_owned(),
            max_tokens: 8,
        }
    }
}

/// What came back for one request.
#[derive(Debug, Clone, PartialEq)]
pub struct Answer {
    /// The HTTP status; 0 when no answer came (connection refused, reset, timed out).
    pub status: u16,
    /// `elapsed_ms.swap` of a successful answer.
    pub swap_ms: Option<f64>,
    /// `elapsed_ms.queue` and `elapsed_ms.total` of a successful answer: the server's own view.
    pub queue_ms: Option<f64>,
    pub server_ms: Option<f64>,
    /// `merged` of a successful embed or classify answer.
    pub merged: Option<bool>,
    /// `error.code` of a refusal, or the transport error.
    pub error: Option<String>,
    /// The `Retry-After` header of a refusal, in whole seconds.
    pub retry_after_s: Option<u64>,
    /// The `Switchyard-Replica` header: which replica answered (behind a front of several).
    pub replica: Option<String>,
}

/// A blocking HTTP client of one server, with the credentials of a run.
#[derive(Debug, Clone)]
pub struct Client {
    url: String,
    /// Send each inference request's target in the `Switchyard-Route` header too, for a front
    /// that routes by adapter.
    route_header: bool,
    key: Option<String>,
    admin_token: Option<String>,
    agent: ureq::Agent,
}

impl Client {
    /// A client of the server at `url` (`http://HOST:PORT`); a trailing `/` is dropped.
    pub fn new(
        url: &str,
        key: Option<String>,
        admin_token: Option<String>,
    ) -> anyhow::Result<Self> {
        let url = url.trim_end_matches('/').to_owned();
        if !url.starts_with("http://") {
            bail!("--url {url:?} must start with http:// (the server speaks plain HTTP)");
        }
        let agent = ureq::Agent::config_builder()
            .http_status_as_error(false)
            .timeout_global(Some(Duration::from_secs(120)))
            .max_idle_connections_per_host(256)
            .build()
            .into();
        Ok(Self {
            url,
            route_header: false,
            key,
            admin_token,
            agent,
        })
    }

    /// The same client, sending (or not) the `Switchyard-Route` header.
    pub fn with_route_header(mut self, on: bool) -> Self {
        self.route_header = on;
        self
    }

    pub fn url(&self) -> &str {
        &self.url
    }

    /// Fails with the URL named when the server does not answer `GET /health/ready` with 200.
    pub fn check_ready(&self) -> anyhow::Result<()> {
        let path = format!("{}/health/ready", self.url);
        let resp = self
            .agent
            .get(&path)
            .call()
            .with_context(|| format!("cannot reach the server at {}", self.url))?;
        if resp.status() != 200 {
            bail!(
                "the server at {} is not ready (GET /health/ready answered {})",
                self.url,
                resp.status()
            );
        }
        Ok(())
    }

    /// Sends one inference request of `kind` to `target` (an adapter name or `base`).
    pub fn infer(&self, kind: Kind, target: &str, shape: &RequestShape) -> Answer {
        let body = match kind {
            Kind::Embed | Kind::Classify => json!({"adapter": target, "texts": shape.texts}),
            Kind::Generate => {
                json!({"adapter": target, "prompt": shape.prompt, "max_tokens": shape.max_tokens})
            }
        };
        let mut request = self
            .agent
            .post(format!("{}{}", self.url, kind.path()))
            .header("Content-Type", "application/json");
        if let Some(key) = &self.key {
            request = request.header("Authorization", format!("Bearer {key}"));
        }
        if self.route_header {
            request = request.header("Switchyard-Route", target);
        }
        let result = request.send(body.to_string()).and_then(|mut resp| {
            let status = resp.status().as_u16();
            let header = |name: &str| {
                resp.headers()
                    .get(name)
                    .and_then(|v| v.to_str().ok())
                    .map(str::to_owned)
            };
            let retry_after = header("retry-after").and_then(|v| v.trim().parse().ok());
            let replica = header("switchyard-replica");
            let text = resp.body_mut().read_to_string()?;
            Ok((status, text, retry_after, replica))
        });
        match result {
            Ok((status, text, retry_after_s, replica)) => Answer {
                retry_after_s,
                replica,
                ..read_answer(status, &text)
            },
            Err(e) => Answer {
                status: 0,
                swap_ms: None,
                queue_ms: None,
                server_ms: None,
                merged: None,
                error: Some(e.to_string()),
                retry_after_s: None,
                replica: None,
            },
        }
    }

    /// The text of `GET /metrics` (with the admin token when one is set: the server asks for it
    /// unless its metrics are configured public).
    pub fn metrics(&self) -> anyhow::Result<String> {
        let mut req = self.agent.get(format!("{}/metrics", self.url));
        if let Some(token) = &self.admin_token {
            req = req.header("Authorization", format!("Bearer {token}"));
        }
        let mut resp = req
            .call()
            .with_context(|| format!("reading {}/metrics", self.url))?;
        let status = resp.status().as_u16();
        let text = resp.body_mut().read_to_string()?;
        if status != 200 {
            bail!("{}/metrics answered {status}: {text}", self.url);
        }
        Ok(text)
    }

    /// Uploads package bytes as a new live version of `name` through the admin API.
    pub fn upload(&self, name: &str, bytes: &[u8]) -> anyhow::Result<()> {
        let token = self
            .admin_token
            .as_deref()
            .context("creating adapters through the server needs --admin-token")?;
        let mut resp = self
            .agent
            .put(format!("{}/admin/adapters/{name}", self.url))
            .header("Authorization", format!("Bearer {token}"))
            .header("Content-Type", "application/octet-stream")
            .send(bytes)
            .with_context(|| format!("uploading {name} to {}", self.url))?;
        let status = resp.status().as_u16();
        // 201: a new live version; 200: these bytes were live already (nothing changed).
        if status != 201 && status != 200 {
            let text = resp.body_mut().read_to_string().unwrap_or_default();
            bail!("uploading {name} to {} answered {status}: {text}", self.url);
        }
        Ok(())
    }

    /// Rolls `name` back to its previous live version through the admin API.
    pub fn rollback(&self, name: &str) -> anyhow::Result<()> {
        let token = self
            .admin_token
            .as_deref()
            .context("rolling back needs --admin-token")?;
        let mut resp = self
            .agent
            .post(format!("{}/admin/adapters/{name}/rollback", self.url))
            .header("Authorization", format!("Bearer {token}"))
            .send_empty()
            .with_context(|| format!("rolling back {name} on {}", self.url))?;
        let status = resp.status().as_u16();
        if status != 200 {
            let text = resp.body_mut().read_to_string().unwrap_or_default();
            bail!(
                "rolling back {name} on {} answered {status}: {text}",
                self.url
            );
        }
        Ok(())
    }
}

/// Reads the fields a run keeps from an answer body.
pub fn read_answer(status: u16, text: &str) -> Answer {
    let body: Value = serde_json::from_str(text).unwrap_or(Value::Null);
    if status == 200 {
        Answer {
            status,
            swap_ms: body["elapsed_ms"]["swap"].as_f64(),
            queue_ms: body["elapsed_ms"]["queue"].as_f64(),
            server_ms: body["elapsed_ms"]["total"].as_f64(),
            merged: body["merged"].as_bool(),
            error: None,
            retry_after_s: None,
            replica: None,
        }
    } else {
        Answer {
            status,
            swap_ms: None,
            queue_ms: None,
            server_ms: None,
            merged: None,
            error: Some(
                body["error"]["code"]
                    .as_str()
                    .map_or_else(|| text.chars().take(200).collect(), str::to_owned),
            ),
            retry_after_s: None,
            replica: None,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn answers_keep_swap_time_merged_flag_and_error_code() {
        let ok = read_answer(
            200,
            r#"{"id": "r-1", "merged": true, "elapsed_ms": {"queue": 0.1, "swap": 2.5, "total": 9.0}}"#,
        );
        assert_eq!(
            ok,
            Answer {
                status: 200,
                swap_ms: Some(2.5),
                queue_ms: Some(0.1),
                server_ms: Some(9.0),
                merged: Some(true),
                error: None,
                retry_after_s: None,
                replica: None,
            }
        );
        let refused = read_answer(
            429,
            r#"{"error": {"code": "queue_full", "message": "the queue is full"}}"#,
        );
        assert_eq!(refused.error.as_deref(), Some("queue_full"));
        assert_eq!(
            read_answer(502, "bad gateway").error.as_deref(),
            Some("bad gateway")
        );
    }

    #[test]
    fn only_plain_http_urls() {
        let e = Client::new("localhost:7070", None, None).unwrap_err();
        assert!(e.to_string().contains("must start with http://"), "{e}");
        assert_eq!(
            Client::new("http://127.0.0.1:1/", None, None)
                .unwrap()
                .url(),
            "http://127.0.0.1:1"
        );
    }
}

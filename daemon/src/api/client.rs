//! A small blocking client of the API, for `stiltctl` and the system tests.
//!
//! Main types: [`Client`] (GET and change requests, JSON in and out, bearer token,
//! optional trusted CA for a lab's own certificate) and [`ClientError`], whose messages
//! tell a person what to do (start the daemon, check `--url`, set `STILT_TOKEN`, ask for
//! an operator token). [`EventReader`] reads a Server-Sent Events stream line by line.
//! Built on `ureq` with rustls and the ring provider.

use std::io::{BufRead, BufReader, Read};
use std::time::Duration;

use serde::Serialize;
use serde::de::DeserializeOwned;

use super::wire::{ChangeReply, TiltCorrectionBody};

/// Why a request failed, worded for the person at the terminal.
#[derive(Debug, thiserror::Error)]
pub enum ClientError {
    /// Nothing answers at the address.
    #[error("cannot connect to {url}: {detail}; is stiltd running, and is --url right?")]
    Connect {
        /// The address tried.
        url: String,
        /// The cause.
        detail: String,
    },
    /// TLS failed (untrusted certificate, plain HTTP server, …).
    #[error("TLS with {url} failed: {detail}; for a lab's own certificate pass --ca-file")]
    Tls {
        /// The address tried.
        url: String,
        /// The cause.
        detail: String,
    },
    /// The daemon answered with an error.
    #[error("{status} {code}{}: {message}{}", field_note(.field), hint(*.status))]
    Http {
        /// HTTP status.
        status: u16,
        /// The API's error code.
        code: String,
        /// The field at fault.
        field: Option<String>,
        /// The API's message.
        message: String,
    },
    /// The answer was not what the API promises.
    #[error("unexpected answer from {url}: {detail}")]
    BadAnswer {
        /// The address asked.
        url: String,
        /// What was wrong.
        detail: String,
    },
    /// Anything else (timeouts, I/O).
    #[error("request to {url} failed: {detail}")]
    Other {
        /// The address asked.
        url: String,
        /// The cause.
        detail: String,
    },
}

fn field_note(f: &Option<String>) -> String {
    match f {
        Some(f) => format!(" (field {f})"),
        None => String::new(),
    }
}

fn hint(status: u16) -> &'static str {
    match status {
        401 => {
            "\n  hint: give a token: set STILT_TOKEN, or pass --token-file FILE \
                (the daemon's administrator makes one with `stiltctl token new`)"
        }
        403 => {
            "\n  hint: this needs an operator token (or, without a token file, a loopback daemon)"
        }
        503 => "\n  hint: the control loop is busy or not running; check `stiltctl status`",
        _ => "",
    }
}

/// A client of one daemon.
#[derive(Clone)]
pub struct Client {
    agent: ureq::Agent,
    stream_agent: ureq::Agent,
    base: String,
    token: Option<String>,
}

#[derive(serde::Deserialize)]
struct ErrorBody {
    error: ErrorInner,
}

#[derive(serde::Deserialize)]
struct ErrorInner {
    code: String,
    field: Option<String>,
    message: String,
}

impl Client {
    /// A client of the daemon at `base` (e.g. `http://127.0.0.1:8040`). `ca_pem`, when
    /// given, is the only certificate authority trusted for HTTPS.
    pub fn new(
        base: &str,
        token: Option<String>,
        ca_pem: Option<&[u8]>,
        timeout: Duration,
    ) -> Result<Client, ClientError> {
        let base = base.trim_end_matches('/').to_string();
        let mut tls = ureq::tls::TlsConfig::builder();
        if let Some(pem) = ca_pem {
            let mut certs = Vec::new();
            for item in ureq::tls::parse_pem(pem) {
                match item {
                    Ok(ureq::tls::PemItem::Certificate(c)) => certs.push(c),
                    Ok(_) => {}
                    Err(e) => {
                        return Err(ClientError::Tls {
                            url: base,
                            detail: format!("the CA file is not PEM: {e}"),
                        });
                    }
                }
            }
            if certs.is_empty() {
                return Err(ClientError::Tls {
                    url: base,
                    detail: "the CA file holds no certificate".into(),
                });
            }
            tls = tls.root_certs(ureq::tls::RootCerts::new_with_certs(&certs));
        }
        let tls = tls.build();
        let agent = ureq::Agent::config_builder()
            .http_status_as_error(false)
            .timeout_global(Some(timeout))
            .tls_config(tls.clone())
            .user_agent(concat!("stiltctl/", env!("CARGO_PKG_VERSION")))
            .build()
            .new_agent();
        let stream_agent = ureq::Agent::config_builder()
            .http_status_as_error(false)
            .timeout_connect(Some(timeout))
            .timeout_recv_response(Some(timeout))
            .tls_config(tls)
            .user_agent(concat!("stiltctl/", env!("CARGO_PKG_VERSION")))
            .build()
            .new_agent();
        Ok(Client {
            agent,
            stream_agent,
            base,
            token,
        })
    }

    /// The daemon's address.
    pub fn base(&self) -> &str {
        &self.base
    }

    fn url(&self, path: &str) -> String {
        format!("{}{}", self.base, path)
    }

    fn failure(&self, url: &str, e: ureq::Error) -> ClientError {
        let detail = e.to_string();
        let url = url.to_string();
        match &e {
            ureq::Error::Io(io)
                if matches!(
                    io.kind(),
                    std::io::ErrorKind::ConnectionRefused | std::io::ErrorKind::ConnectionReset
                ) =>
            {
                ClientError::Connect { url, detail }
            }
            ureq::Error::ConnectionFailed | ureq::Error::HostNotFound => {
                ClientError::Connect { url, detail }
            }
            ureq::Error::Rustls(_) | ureq::Error::Tls(_) => ClientError::Tls { url, detail },
            _ if detail.contains("Connection refused") => ClientError::Connect { url, detail },
            _ if detail.to_ascii_lowercase().contains("tls")
                || detail.contains("rustls")
                || detail.contains("certificate") =>
            {
                ClientError::Tls { url, detail }
            }
            _ => ClientError::Other { url, detail },
        }
    }

    fn auth<B>(&self, r: ureq::RequestBuilder<B>) -> ureq::RequestBuilder<B> {
        match &self.token {
            Some(t) => r.header("Authorization", format!("Bearer {t}")),
            None => r,
        }
    }

    fn answer(
        &self,
        url: &str,
        resp: Result<ureq::http::Response<ureq::Body>, ureq::Error>,
    ) -> Result<(String, String), ClientError> {
        let mut resp = resp.map_err(|e| self.failure(url, e))?;
        let status = resp.status().as_u16();
        let ct = resp
            .headers()
            .get("content-type")
            .and_then(|v| v.to_str().ok())
            .unwrap_or("")
            .to_string();
        let text = resp
            .body_mut()
            .read_to_string()
            .map_err(|e| self.failure(url, e))?;
        if (200..300).contains(&status) {
            return Ok((ct, text));
        }
        match serde_json::from_str::<ErrorBody>(&text) {
            Ok(b) => Err(ClientError::Http {
                status,
                code: b.error.code,
                field: b.error.field,
                message: b.error.message,
            }),
            Err(_) => Err(ClientError::Http {
                status,
                code: "http".into(),
                field: None,
                message: text.chars().take(200).collect(),
            }),
        }
    }

    fn parse<T: DeserializeOwned>(&self, url: &str, text: &str) -> Result<T, ClientError> {
        serde_json::from_str(text).map_err(|e| ClientError::BadAnswer {
            url: url.to_string(),
            detail: e.to_string(),
        })
    }

    /// GET a JSON document.
    pub fn get<T: DeserializeOwned>(&self, path: &str) -> Result<T, ClientError> {
        let url = self.url(path);
        let (_, text) = self.answer(&url, self.auth(self.agent.get(&url)).call())?;
        self.parse(&url, &text)
    }

    /// GET as text, with the content type.
    pub fn get_text(
        &self,
        path: &str,
        accept: Option<&str>,
    ) -> Result<(String, String), ClientError> {
        let url = self.url(path);
        let mut r = self.auth(self.agent.get(&url));
        if let Some(a) = accept {
            r = r.header("Accept", a);
        }
        self.answer(&url, r.call())
    }

    /// PUT a change.
    pub fn put<B: Serialize>(&self, path: &str, body: &B) -> Result<ChangeReply, ClientError> {
        self.change("PUT", path, body)
    }

    /// `PUT /v1/tilt-correction`: holds a tilt correction on either axis or both, µrad
    /// (`None` keeps that axis's value). The daemon takes it in `temperature` mode only
    /// (409 otherwise) and within ±`control.tilt_output_limit_urad` (422).
    pub fn set_tilt_correction(
        &self,
        x_urad: Option<f64>,
        y_urad: Option<f64>,
    ) -> Result<ChangeReply, ClientError> {
        self.put(
            "/v1/tilt-correction",
            &TiltCorrectionBody { x_urad, y_urad },
        )
    }

    /// POST a change.
    pub fn post<B: Serialize>(&self, path: &str, body: &B) -> Result<ChangeReply, ClientError> {
        self.change("POST", path, body)
    }

    fn change<B: Serialize>(
        &self,
        method: &str,
        path: &str,
        body: &B,
    ) -> Result<ChangeReply, ClientError> {
        let url = self.url(path);
        let json = serde_json::to_string(body).map_err(|e| ClientError::Other {
            url: url.clone(),
            detail: e.to_string(),
        })?;
        let r = match method {
            "PUT" => self.auth(self.agent.put(&url)),
            _ => self.auth(self.agent.post(&url)),
        };
        let resp = r.content_type("application/json").send(json.as_str());
        let (_, text) = self.answer(&url, resp)?;
        self.parse(&url, &text)
    }

    /// Opens the live stream (`/v1/stream?every=N`).
    pub fn stream(&self, every: u64) -> Result<EventReader, ClientError> {
        let url = self.url(&format!("/v1/stream?every={every}"));
        let mut resp = self
            .auth(self.stream_agent.get(&url))
            .header("Accept", "text/event-stream")
            .call()
            .map_err(|e| self.failure(&url, e))?;
        let status = resp.status().as_u16();
        if status != 200 {
            let text = resp.body_mut().read_to_string().unwrap_or_default();
            return match serde_json::from_str::<ErrorBody>(&text) {
                Ok(b) => Err(ClientError::Http {
                    status,
                    code: b.error.code,
                    field: b.error.field,
                    message: b.error.message,
                }),
                Err(_) => Err(ClientError::BadAnswer {
                    url,
                    detail: format!("status {status}"),
                }),
            };
        }
        Ok(EventReader {
            reader: BufReader::new(Box::new(resp.into_body().into_reader())),
        })
    }
}

/// One Server-Sent Event.
#[derive(Debug, Clone, PartialEq)]
pub struct SseEvent {
    /// The `event:` name (`message` when absent, as the standard says).
    pub event: String,
    /// The `data:` lines, joined by newlines.
    pub data: String,
}

/// Reads events from a stream, blocking.
pub struct EventReader {
    reader: BufReader<Box<dyn Read + Send>>,
}

impl EventReader {
    /// The next event; `Ok(None)` when the stream ended.
    pub fn next_event(&mut self) -> std::io::Result<Option<SseEvent>> {
        let mut event = String::new();
        let mut data = String::new();
        let mut any = false;
        loop {
            let mut line = String::new();
            if self.reader.read_line(&mut line)? == 0 {
                return Ok(None);
            }
            let line = line.trim_end_matches(['\n', '\r']);
            if line.is_empty() {
                if any {
                    if event.is_empty() {
                        event = "message".into();
                    }
                    return Ok(Some(SseEvent { event, data }));
                }
                continue;
            }
            if line.starts_with(':') {
                continue;
            }
            let (k, v) = line.split_once(':').unwrap_or((line, ""));
            let v = v.strip_prefix(' ').unwrap_or(v);
            match k {
                "event" => event = v.to_string(),
                "data" => {
                    if !data.is_empty() {
                        data.push('\n');
                    }
                    data.push_str(v);
                }
                _ => {}
            }
            any = true;
        }
    }
}

//! [`ApiError`]: the one error type every endpoint answers with.
//!
//! Its JSON body is always `{"error": {"code", "field", "message"}}`: `code` is a stable
//! machine-readable word, `field` names the offending request field (or is `null`), and
//! `message` tells a person what was wrong and what is allowed. Internal causes (I/O
//! errors, a closed channel) are logged and never shown to the client.

use axum::Json;
use axum::http::{HeaderValue, StatusCode, header};
use axum::response::{IntoResponse, Response};
use serde::Serialize;

/// An error answer: an HTTP status, a stable code, the field at fault and a message.
#[derive(Debug, Clone, PartialEq)]
pub struct ApiError {
    /// HTTP status.
    pub status: StatusCode,
    /// Stable machine-readable code (`out_of_range`, `missing_token` …).
    pub code: &'static str,
    /// The request field at fault, if one is.
    pub field: Option<String>,
    /// What was wrong and what is allowed.
    pub message: String,
    /// The `WWW-Authenticate` challenge to send with a 401.
    pub challenge: Option<&'static str>,
}

#[derive(Serialize)]
struct ErrorBody<'a> {
    error: ErrorInner<'a>,
}

#[derive(Serialize)]
struct ErrorInner<'a> {
    code: &'a str,
    field: Option<&'a str>,
    message: &'a str,
}

impl ApiError {
    /// A new error without a field.
    pub fn new(status: StatusCode, code: &'static str, message: impl Into<String>) -> Self {
        ApiError {
            status,
            code,
            field: None,
            message: message.into(),
            challenge: None,
        }
    }

    /// Names the field at fault.
    pub fn field(mut self, field: impl Into<String>) -> Self {
        let f = field.into();
        self.field = if f.is_empty() { None } else { Some(f) };
        self
    }

    /// 400: the body is not the JSON asked for.
    pub fn bad_request(code: &'static str, message: impl Into<String>) -> Self {
        Self::new(StatusCode::BAD_REQUEST, code, message)
    }

    /// 422: the body is well formed but a value is not allowed.
    pub fn invalid(field: &str, message: impl Into<String>) -> Self {
        Self::new(StatusCode::UNPROCESSABLE_ENTITY, "out_of_range", message).field(field)
    }

    /// 401 with a Bearer challenge (RFC 6750 §3).
    pub fn unauthorized(code: &'static str, message: impl Into<String>) -> Self {
        let mut e = Self::new(StatusCode::UNAUTHORIZED, code, message);
        e.challenge = Some(if code == "invalid_token" {
            "Bearer realm=\"stiltd\", error=\"invalid_token\""
        } else {
            "Bearer realm=\"stiltd\""
        });
        e
    }

    /// 403: the caller is known but may not do this.
    pub fn forbidden(code: &'static str, message: impl Into<String>) -> Self {
        Self::new(StatusCode::FORBIDDEN, code, message)
    }

    /// 503: the control loop cannot take the request now.
    pub fn unavailable(code: &'static str, message: impl Into<String>) -> Self {
        Self::new(StatusCode::SERVICE_UNAVAILABLE, code, message)
    }

    /// 500: something inside failed. The cause goes to the log, not to the client.
    pub fn internal(cause: &dyn std::fmt::Display) -> Self {
        tracing::error!(cause = %cause, "internal error answering an API request");
        Self::new(
            StatusCode::INTERNAL_SERVER_ERROR,
            "internal",
            "internal error; the daemon's log has the details",
        )
    }
}

impl std::fmt::Display for ApiError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match &self.field {
            Some(field) => write!(
                f,
                "{} {} ({field}): {}",
                self.status, self.code, self.message
            ),
            None => write!(f, "{} {}: {}", self.status, self.code, self.message),
        }
    }
}

impl std::error::Error for ApiError {}

impl IntoResponse for ApiError {
    fn into_response(self) -> Response {
        let body = ErrorBody {
            error: ErrorInner {
                code: self.code,
                field: self.field.as_deref(),
                message: &self.message,
            },
        };
        let mut r = (self.status, Json(body)).into_response();
        if let Some(c) = self.challenge {
            r.headers_mut()
                .insert(header::WWW_AUTHENTICATE, HeaderValue::from_static(c));
        }
        r
    }
}

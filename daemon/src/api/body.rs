//! [`JsonBody`]: the request-body extractor of every changing endpoint.
//!
//! It checks, in order: the content type is `application/json` (else 415), the body
//! fits in [`MAX_BODY_BYTES`] (else 413), the body is one JSON value of the expected
//! shape (else 400 naming the field, via `serde_path_to_error`). Numbers beyond f64's
//! range (`1e999`) fail JSON parsing; strings such as `"NaN"` fail the type check; both
//! are 400. Range checks against the configuration come after, in the handlers (422).

use axum::body::Bytes;
use axum::extract::{FromRequest, Request};
use axum::http::StatusCode;
use axum::http::header::CONTENT_TYPE;
use serde::de::DeserializeOwned;

use super::error::ApiError;

/// Largest request body accepted, bytes. Every body we take is a few small numbers.
pub const MAX_BODY_BYTES: usize = 4096;

/// A JSON body of type `T`, or an [`ApiError`] saying precisely what is wrong with it.
#[derive(Debug)]
pub struct JsonBody<T>(pub T);

/// Parses a JSON body, naming the field at fault when it does not fit `T`.
pub fn parse_json<T: DeserializeOwned>(bytes: &[u8]) -> Result<T, ApiError> {
    if bytes.iter().all(u8::is_ascii_whitespace) {
        return Err(ApiError::bad_request(
            "empty_body",
            "the body is empty; send a JSON object",
        ));
    }
    // serde's derived structs also accept a positional array (`[1, 2]`); an API body
    // names its fields, so anything but an object is refused.
    if bytes.iter().find(|b| !b.is_ascii_whitespace()) != Some(&b'{') {
        return Err(ApiError::bad_request(
            "not_an_object",
            "the body must be a JSON object, e.g. {\"x_urad\": 1.5}",
        ));
    }
    let mut de = serde_json::Deserializer::from_slice(bytes);
    let v: T = serde_path_to_error::deserialize(&mut de).map_err(|e| {
        let path = e.path().to_string();
        let inner = e.into_inner();
        let msg = inner.to_string();
        // serde_path_to_error writes `.` for the root and `?` where it lost track.
        let field = if path != "." && !path.is_empty() && !path.contains('?') {
            path
        } else {
            named_in(&msg).unwrap_or_default()
        };
        let code = match inner.classify() {
            serde_json::error::Category::Data => "invalid_field",
            _ => "malformed_json",
        };
        let message = if field.is_empty() {
            format!("the body is not the JSON expected: {msg}")
        } else {
            format!("field `{field}`: {msg}")
        };
        ApiError::bad_request(code, message).field(field)
    })?;
    de.end().map_err(|e| {
        ApiError::bad_request(
            "malformed_json",
            format!("unexpected text after the JSON value: {e}"),
        )
    })?;
    Ok(v)
}

/// The field serde names in "unknown field `x`" / "missing field `x`" messages.
fn named_in(msg: &str) -> Option<String> {
    for pre in ["unknown field `", "missing field `", "duplicate field `"] {
        if let Some(i) = msg.find(pre) {
            let rest = &msg[i + pre.len()..];
            return rest.find('`').map(|j| rest[..j].to_string());
        }
    }
    None
}

fn is_json(ct: &str) -> bool {
    let essence = ct.split(';').next().unwrap_or("").trim();
    essence.eq_ignore_ascii_case("application/json")
}

impl<T, S> FromRequest<S> for JsonBody<T>
where
    T: DeserializeOwned,
    S: Send + Sync,
{
    type Rejection = ApiError;

    async fn from_request(req: Request, state: &S) -> Result<Self, Self::Rejection> {
        let ct = req
            .headers()
            .get(CONTENT_TYPE)
            .and_then(|v| v.to_str().ok())
            .unwrap_or("");
        if !is_json(ct) {
            return Err(ApiError::new(
                StatusCode::UNSUPPORTED_MEDIA_TYPE,
                "unsupported_media_type",
                format!(
                    "the body must be JSON with `Content-Type: application/json` (got {:?})",
                    ct
                ),
            ));
        }
        let bytes = Bytes::from_request(req, state).await.map_err(|r| {
            if r.status() == StatusCode::PAYLOAD_TOO_LARGE {
                ApiError::new(
                    StatusCode::PAYLOAD_TOO_LARGE,
                    "body_too_large",
                    format!("the body is larger than {MAX_BODY_BYTES} bytes"),
                )
            } else {
                ApiError::bad_request("unreadable_body", "the body could not be read")
            }
        })?;
        parse_json(&bytes).map(JsonBody)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::api::wire::{GainsBody, LegBiasBody};

    #[test]
    fn errors_name_the_field() {
        let e = parse_json::<GainsBody>(br#"{"kp": "NaN"}"#).unwrap_err();
        assert_eq!((e.status.as_u16(), e.field.as_deref()), (400, Some("kp")));
        assert_eq!(e.code, "invalid_field");
        let e = parse_json::<GainsBody>(br#"{"kp": 1e999}"#).unwrap_err();
        assert_eq!(e.field.as_deref(), Some("kp"), "{e}");
        let e = parse_json::<GainsBody>(br#"{"kpp": 1}"#).unwrap_err();
        assert_eq!(e.field.as_deref(), Some("kpp"), "{e}");
        let e = parse_json::<LegBiasBody>(br#"{}"#).unwrap_err();
        assert_eq!(e.field.as_deref(), Some("bias_c"), "{e}");
        let e = parse_json::<LegBiasBody>(br#"{"bias_c": 1"#).unwrap_err();
        assert_eq!(e.code, "malformed_json");
        let e = parse_json::<LegBiasBody>(br#"{"bias_c": 1} x"#).unwrap_err();
        assert_eq!(e.code, "malformed_json");
        let e = parse_json::<LegBiasBody>(b"  ").unwrap_err();
        assert_eq!(e.code, "empty_body");
        assert_eq!(
            parse_json::<LegBiasBody>(br#" {"bias_c": 25.5} "#)
                .unwrap()
                .bias_c,
            25.5
        );
    }

    #[test]
    fn content_types() {
        assert!(is_json("application/json"));
        assert!(is_json("Application/JSON; charset=utf-8"));
        assert!(!is_json("text/plain"));
        assert!(!is_json(""));
        assert!(!is_json("application/jsonp"));
    }
}

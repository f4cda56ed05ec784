//! Request extractors whose refusals are [`ApiError`]s: a body that is not JSON is a 400
//! `malformed_json` that says where it broke, JSON of the wrong shape a 400 `invalid_field` that
//! names the field in plain words (never a Rust type), an oversized body a 413, all in the API's
//! JSON error shape.

use axum::body::Bytes;
use axum::extract::rejection::BytesRejection;
use axum::extract::{FromRequest, Request};
use axum::http::{StatusCode, header};
use serde::de::DeserializeOwned;

use crate::http::error::ApiError;

/// A JSON body, refused with our error shape.
pub struct ApiJson<T>(pub T);

impl<S, T> FromRequest<S> for ApiJson<T>
where
    T: DeserializeOwned,
    S: Send + Sync,
{
    type Rejection = ApiError;

    async fn from_request(req: Request, state: &S) -> Result<Self, Self::Rejection> {
        if !is_json(req.headers()) {
            return Err(ApiError::bad_request(
                "malformed_json",
                "send the body as JSON with Content-Type: application/json",
            ));
        }
        let bytes = Bytes::from_request(req, state)
            .await
            .map_err(bytes_rejection)?;
        parse_json(&bytes).map(ApiJson)
    }
}

fn is_json(headers: &axum::http::HeaderMap) -> bool {
    headers
        .get(header::CONTENT_TYPE)
        .and_then(|v| v.to_str().ok())
        .and_then(|v| v.split(';').next())
        .is_some_and(|mime| {
            let mime = mime.trim().to_ascii_lowercase();
            mime == "application/json"
                || (mime.starts_with("application/") && mime.ends_with("+json"))
        })
}

/// Parses a request body as `T`, refusing it in plain words: where the JSON broke, or which
/// field has the wrong kind of value and what kind it needs.
pub fn parse_json<T: DeserializeOwned>(bytes: &[u8]) -> Result<T, ApiError> {
    if bytes.iter().all(u8::is_ascii_whitespace) {
        return Err(ApiError::bad_request(
            "malformed_json",
            "the body is empty; send a JSON object",
        ));
    }
    let mut de = serde_json::Deserializer::from_slice(bytes);
    let value = serde_path_to_error::deserialize(&mut de).map_err(|e| {
        let path = e.path().to_string();
        refusal(&path, e.inner())
    })?;
    de.end().map_err(|e| refusal("", &e))?;
    Ok(value)
}

fn refusal(path: &str, e: &serde_json::Error) -> ApiError {
    use serde_json::error::Category;
    match e.classify() {
        Category::Syntax | Category::Eof | Category::Io => ApiError::bad_request(
            "malformed_json",
            format!(
                "the body is not valid JSON: {} (line {}, column {})",
                strip_position(&e.to_string()),
                e.line(),
                e.column()
            ),
        ),
        Category::Data => ApiError::bad_request("invalid_field", plain_words(path, e)),
    }
}

/// serde_json appends " at line L column C" to its messages; the refusal says it once, its way.
fn strip_position(message: &str) -> &str {
    message
        .rfind(" at line ")
        .map_or(message, |at| &message[..at])
}

/// A data error of serde as a sentence about the field: `max_tokens: expected a whole number
/// (0 or more), found the text "ten"`.
fn plain_words(path: &str, e: &serde_json::Error) -> String {
    let message = strip_position(&e.to_string()).to_owned();
    let field = |p: &str| {
        if p.is_empty() || p == "." {
            "the body".to_owned()
        } else {
            format!("field `{p}`")
        }
    };
    if let Some(rest) = message.strip_prefix("missing field `") {
        let name = rest.trim_end_matches('`');
        let at = if path.is_empty() || path == "." {
            format!("field `{name}`")
        } else {
            format!("field `{path}.{name}`")
        };
        return format!("{at} is missing");
    }
    if let Some(rest) = message.strip_prefix("unknown field `") {
        let (name, expected) = rest.split_once('`').unwrap_or((rest, ""));
        let known = expected
            .trim_start_matches(", expected one of ")
            .trim_start_matches(", expected ")
            .replace('`', "");
        let parent = path.rsplit_once('.').map(|(p, _)| p).unwrap_or("");
        let place = if parent.is_empty() || parent == "." {
            "this request".to_owned()
        } else {
            format!("`{parent}`")
        };
        return if known.is_empty() {
            format!("`{name}` is not a field of {place}")
        } else {
            format!("`{name}` is not a field of {place}; its fields are {known}")
        };
    }
    for (prefix, kind) in [("invalid type: ", "found"), ("invalid value: ", "found")] {
        if let Some(rest) = message.strip_prefix(prefix)
            && let Some((found, expected)) = rest.split_once(", expected ")
        {
            return format!(
                "{}: expected {}, {kind} {}",
                field(path),
                plain_kind(expected),
                plain_found(found)
            );
        }
    }
    if message.contains("out of range") {
        return format!("{}: the number is out of range", field(path));
    }
    format!("{}: {message}", field(path))
}

/// serde's name for what it expected, as a person would say it.
fn plain_kind(expected: &str) -> String {
    let e = expected.trim();
    match e {
        "usize" | "u64" | "u32" | "u16" | "u8" => "a whole number (0 or more)".to_owned(),
        "isize" | "i64" | "i32" | "i16" | "i8" => "a whole number".to_owned(),
        "f64" | "f32" => "a number".to_owned(),
        "a boolean" => "true or false".to_owned(),
        "a sequence" => "a list".to_owned(),
        "a string" => "text (a JSON string)".to_owned(),
        _ if e.starts_with("struct ") || e == "a map" => "an object".to_owned(),
        _ if e.starts_with("a sequence") => "a list".to_owned(),
        _ => e.to_owned(),
    }
}

/// serde's description of the value it found (`string "ten"`, `integer `-1``, `sequence`).
fn plain_found(found: &str) -> String {
    let f = found.trim();
    if let Some(s) = f.strip_prefix("string ") {
        return format!("the text {s}");
    }
    for (prefix, noun) in [
        ("integer ", "the number "),
        ("floating point ", "the number "),
        ("boolean ", ""),
    ] {
        if let Some(v) = f.strip_prefix(prefix) {
            return format!("{noun}{}", v.trim_matches('`'));
        }
    }
    match f {
        "sequence" => "a list".to_owned(),
        "map" => "an object".to_owned(),
        "null" => "null".to_owned(),
        other => other.to_owned(),
    }
}

/// A raw body (a package upload), refused with our error shape.
pub struct ApiBytes(pub Bytes);

impl<S> FromRequest<S> for ApiBytes
where
    S: Send + Sync,
{
    type Rejection = ApiError;

    async fn from_request(req: Request, state: &S) -> Result<Self, Self::Rejection> {
        match Bytes::from_request(req, state).await {
            Ok(b) => Ok(ApiBytes(b)),
            Err(r) => Err(bytes_rejection(r)),
        }
    }
}

fn bytes_rejection(r: BytesRejection) -> ApiError {
    if r.status() == StatusCode::PAYLOAD_TOO_LARGE {
        ApiError::new(
            StatusCode::PAYLOAD_TOO_LARGE,
            "body_too_large",
            "the request body is over the size limit for this endpoint",
        )
    } else {
        ApiError::bad_request("unreadable_body", r.body_text())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use serde::Deserialize;

    #[derive(Debug, Deserialize)]
    #[serde(deny_unknown_fields)]
    #[allow(dead_code)]
    struct Body {
        texts: Vec<String>,
        max_tokens: Option<usize>,
        temperature: Option<f64>,
        stream: Option<bool>,
    }

    fn refused(json: &str) -> ApiError {
        parse_json::<Body>(json.as_bytes()).unwrap_err()
    }

    #[test]
    fn a_field_of_the_wrong_type_is_named_in_plain_words() {
        let e = refused(r#"{"texts": ["a"], "max_tokens": "ten"}"#);
        assert_eq!(e.code, "invalid_field");
        assert_eq!(
            e.message,
            "field `max_tokens`: expected a whole number (0 or more), found the text \"ten\""
        );
        let e = refused(r#"{"texts": ["a"], "max_tokens": -1}"#);
        assert_eq!(
            e.message,
            "field `max_tokens`: expected a whole number (0 or more), found the number -1"
        );
        let e = refused(r#"{"texts": "a"}"#);
        assert_eq!(
            e.message,
            "field `texts`: expected a list, found the text \"a\""
        );
        let e = refused(r#"{"texts": [3]}"#);
        assert_eq!(
            e.message,
            "field `texts[0]`: expected text (a JSON string), found the number 3"
        );
        let e = refused(r#"{"texts": [], "stream": "yes"}"#);
        assert_eq!(
            e.message,
            "field `stream`: expected true or false, found the text \"yes\""
        );
        let m = &e.message;
        assert!(!m.contains("usize") && !m.contains("f64"), "{m}");
    }

    #[test]
    fn missing_and_unknown_fields_are_named() {
        assert_eq!(refused("{}").message, "field `texts` is missing");
        let e = refused(r#"{"texts": [], "seeds": 3}"#);
        assert_eq!(e.code, "invalid_field");
        assert!(
            e.message
                .starts_with("`seeds` is not a field of this request; its fields are texts, "),
            "{}",
            e.message
        );
    }

    #[test]
    fn broken_json_says_where() {
        let e = refused("{\"texts\": [\"a\",\n]}");
        assert_eq!(e.code, "malformed_json");
        assert!(e.message.contains("line 2"), "{}", e.message);
        assert_eq!(
            refused("  ").message,
            "the body is empty; send a JSON object"
        );
        let e = refused(r#"{"texts": []} trailing"#);
        assert_eq!(e.code, "malformed_json");
    }

    #[test]
    fn a_number_too_large_for_any_float_is_refused() {
        let e = refused(r#"{"texts": [], "temperature": 1e400}"#);
        assert!(
            e.code == "malformed_json" || e.code == "invalid_field",
            "{e:?}"
        );
        assert!(e.message.contains("out of range"), "{}", e.message);
    }
}

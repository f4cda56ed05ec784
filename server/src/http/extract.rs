//! Request extractors whose refusals are [`ApiError`]s: malformed JSON is a 400 that says what
//! was wrong, an oversized body a 413, both in the API's JSON error shape.

use axum::extract::rejection::{BytesRejection, JsonRejection};
use axum::extract::{FromRequest, Request};
use axum::http::StatusCode;
use bytes_like::Bytes;
use serde::de::DeserializeOwned;

use crate::http::error::ApiError;

mod bytes_like {
    pub use axum::body::Bytes;
}

/// A JSON body, refused with our error shape.
pub struct ApiJson<T>(pub T);

impl<S, T> FromRequest<S> for ApiJson<T>
where
    T: DeserializeOwned,
    S: Send + Sync,
{
    type Rejection = ApiError;

    async fn from_request(req: Request, state: &S) -> Result<Self, Self::Rejection> {
        match axum::Json::<T>::from_request(req, state).await {
            Ok(axum::Json(v)) => Ok(ApiJson(v)),
            Err(rejection) => Err(json_rejection(rejection)),
        }
    }
}

fn json_rejection(r: JsonRejection) -> ApiError {
    if r.status() == StatusCode::PAYLOAD_TOO_LARGE {
        return ApiError::new(
            StatusCode::PAYLOAD_TOO_LARGE,
            "body_too_large",
            "the request body is over the size limit",
        );
    }
    match r {
        JsonRejection::MissingJsonContentType(_) => ApiError::bad_request(
            "malformed_json",
            "send the body as JSON with Content-Type: application/json",
        ),
        other => ApiError::bad_request(
            "malformed_json",
            format!(
                "the body is not valid JSON for this endpoint: {}",
                other.body_text()
            ),
        ),
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
            "the upload is over the body size limit",
        )
    } else {
        ApiError::bad_request("unreadable_body", r.body_text())
    }
}

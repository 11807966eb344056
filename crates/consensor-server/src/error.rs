//! The one error type of the HTTP layer, producing the JSON error body of the API contract:
//! `{"error": "<machine code>", "message": "<human sentence>", "details": [...]}`.

use axum::http::{header, HeaderValue, StatusCode};
use axum::response::{IntoResponse, Response};
use consensor_store::StoreError;
use serde::Serialize;

/// One bad field of one reading (or of a request body), for `details`.
#[derive(Debug, Clone, PartialEq, Serialize, utoipa::ToSchema)]
pub struct Detail {
    #[serde(skip_serializing_if = "Option::is_none")]
    pub index: Option<usize>,
    pub field: String,
    pub reason: String,
}

/// What an error answer said, attached to the response's extensions so that middleware (the metrics
/// layer) can count refusals by their machine code and fields without parsing the body.
#[derive(Debug, Clone, PartialEq)]
pub struct ErrorSummary {
    /// The machine code (`error` of the body).
    pub code: &'static str,
    /// `(index, field)` of each entry of `details`.
    pub details: Vec<(Option<usize>, String)>,
}

/// An error answered to a client.
#[derive(Debug)]
pub struct ApiError {
    status: StatusCode,
    code: &'static str,
    message: String,
    details: Vec<Detail>,
    retry_after_seconds: Option<u64>,
}

impl ApiError {
    fn new(status: StatusCode, code: &'static str, message: impl Into<String>) -> Self {
        ApiError {
            status,
            code,
            message: message.into(),
            details: Vec::new(),
            retry_after_seconds: None,
        }
    }

    pub fn with_details(mut self, details: Vec<Detail>) -> Self {
        self.details = details;
        self
    }

    /// 400: the body is not well-formed.
    pub fn malformed(message: impl Into<String>) -> Self {
        Self::new(StatusCode::BAD_REQUEST, "malformed_body", message)
    }

    /// 400: a query parameter or path segment that cannot be parsed.
    pub fn bad_request(message: impl Into<String>) -> Self {
        Self::new(StatusCode::BAD_REQUEST, "bad_request", message)
    }

    /// 422: well-formed but invalid input.
    pub fn invalid(message: impl Into<String>) -> Self {
        Self::new(StatusCode::UNPROCESSABLE_ENTITY, "invalid_input", message)
    }

    /// 422 with `message` and one detail naming `field` (no index) and `reason`.
    pub fn invalid_detail(
        message: impl Into<String>,
        field: &str,
        reason: impl Into<String>,
    ) -> Self {
        Self::invalid(message).with_details(vec![Detail {
            index: None,
            field: field.to_owned(),
            reason: reason.into(),
        }])
    }

    /// 422 for one bad field of a request body: the message `field: reason`, and the detail.
    pub fn invalid_field(field: &str, reason: impl Into<String>) -> Self {
        let reason = reason.into();
        Self::invalid_detail(format!("{field}: {reason}"), field, reason)
    }

    /// 401: no token, or one that is unknown or revoked.
    pub fn unauthenticated(message: impl Into<String>) -> Self {
        Self::new(StatusCode::UNAUTHORIZED, "unauthenticated", message)
    }

    /// 403: a valid token without the right to do this.
    pub fn forbidden(message: impl Into<String>) -> Self {
        Self::new(StatusCode::FORBIDDEN, "forbidden", message)
    }

    pub fn not_found(message: impl Into<String>) -> Self {
        Self::new(StatusCode::NOT_FOUND, "not_found", message)
    }

    pub fn payload_too_large(limit_bytes: usize) -> Self {
        Self::new(
            StatusCode::PAYLOAD_TOO_LARGE,
            "payload_too_large",
            format!("the body is larger than the limit of {limit_bytes} bytes"),
        )
    }

    pub fn unsupported_media_type(message: impl Into<String>) -> Self {
        Self::new(
            StatusCode::UNSUPPORTED_MEDIA_TYPE,
            "unsupported_media_type",
            message,
        )
    }

    /// 503 with `Retry-After`: the database cannot be reached right now; nothing was stored.
    pub fn unavailable(message: impl Into<String>) -> Self {
        let mut error = Self::new(StatusCode::SERVICE_UNAVAILABLE, "unavailable", message);
        error.retry_after_seconds = Some(5);
        error
    }

    /// 429 with `Retry-After` (whole seconds): the caller has used up its request budget
    /// (`[rate_limit]`); nothing was done.
    pub fn too_many_requests(retry_after_seconds: u64, per_second: f64, burst: f64) -> Self {
        let mut error = Self::new(
            StatusCode::TOO_MANY_REQUESTS,
            "rate_limited",
            format!(
                "too many requests: this caller may make {per_second} per second (bursts of up \
                 to {burst}); nothing was done, try again in {retry_after_seconds} s"
            ),
        );
        error.retry_after_seconds = Some(retry_after_seconds);
        error
    }

    /// 431: the request's header fields are larger than `limit_bytes` in all (RFC 6585 §5).
    pub fn header_fields_too_large(limit_bytes: usize) -> Self {
        Self::new(
            StatusCode::REQUEST_HEADER_FIELDS_TOO_LARGE,
            "header_fields_too_large",
            format!("the request's header fields are larger than the limit of {limit_bytes} bytes"),
        )
    }

    /// 500 with an opaque message; the cause is logged, never sent.
    pub fn internal(cause: &dyn std::fmt::Display) -> Self {
        tracing::error!(error = %cause, "internal error");
        Self::new(
            StatusCode::INTERNAL_SERVER_ERROR,
            "internal",
            "an internal error occurred; it has been logged",
        )
    }

    pub fn status(&self) -> StatusCode {
        self.status
    }

    /// An error with `status` and a machine code derived from it, for answers that were not made
    /// as an `ApiError` (a rejection of axum's own extractors, a 405 of its router, the 408 of the
    /// timeout layer), so that they too carry the contract's body.
    pub fn from_status(status: StatusCode, message: impl Into<String>) -> Self {
        let code = match status {
            StatusCode::BAD_REQUEST => "bad_request",
            StatusCode::UNAUTHORIZED => "unauthenticated",
            StatusCode::FORBIDDEN => "forbidden",
            StatusCode::NOT_FOUND => "not_found",
            StatusCode::METHOD_NOT_ALLOWED => "method_not_allowed",
            StatusCode::REQUEST_TIMEOUT => "request_timeout",
            StatusCode::PAYLOAD_TOO_LARGE => "payload_too_large",
            StatusCode::UNSUPPORTED_MEDIA_TYPE => "unsupported_media_type",
            StatusCode::UNPROCESSABLE_ENTITY => "invalid_input",
            StatusCode::TOO_MANY_REQUESTS => "rate_limited",
            StatusCode::REQUEST_HEADER_FIELDS_TOO_LARGE => "header_fields_too_large",
            StatusCode::SERVICE_UNAVAILABLE => "unavailable",
            status if status.is_server_error() => "internal",
            _ => "http_error",
        };
        Self::new(status, code, message)
    }
}

#[derive(Serialize)]
struct Body<'a> {
    error: &'a str,
    message: &'a str,
    #[serde(skip_serializing_if = "<[Detail]>::is_empty")]
    details: &'a [Detail],
}

impl IntoResponse for ApiError {
    fn into_response(self) -> Response {
        let body = Body {
            error: self.code,
            message: &self.message,
            details: &self.details,
        };
        let mut response = (self.status, axum::Json(body)).into_response();
        response.extensions_mut().insert(ErrorSummary {
            code: self.code,
            details: self
                .details
                .iter()
                .map(|detail| (detail.index, detail.field.clone()))
                .collect(),
        });
        if let Some(seconds) = self.retry_after_seconds {
            response
                .headers_mut()
                .insert(header::RETRY_AFTER, HeaderValue::from(seconds));
        }
        response
    }
}

impl From<StoreError> for ApiError {
    fn from(error: StoreError) -> Self {
        match error {
            StoreError::NotFound(what) => ApiError::not_found(what),
            StoreError::Conflict(what) => ApiError::new(StatusCode::CONFLICT, "conflict", what),
            StoreError::Unavailable(cause) => {
                tracing::warn!(%cause, "database unavailable");
                ApiError::unavailable("the database is unavailable; nothing was stored, try again")
            }
            StoreError::Other(cause) => ApiError::internal(&cause),
        }
    }
}

/// A JSON body extractor whose rejections are [`ApiError`]s with the contract's body: malformed
/// JSON is 400, JSON of the wrong shape (unknown fields included) is 422, a missing JSON content
/// type is 415 and an over-long body 413.
pub struct ApiJson<T>(pub T);

impl<S, T> axum::extract::FromRequest<S> for ApiJson<T>
where
    T: serde::de::DeserializeOwned,
    S: Send + Sync,
{
    type Rejection = ApiError;

    async fn from_request(request: axum::extract::Request, state: &S) -> Result<Self, ApiError> {
        use axum::extract::rejection::JsonRejection;
        match axum::Json::<T>::from_request(request, state).await {
            Ok(axum::Json(value)) => Ok(ApiJson(value)),
            Err(JsonRejection::JsonDataError(error)) => Err(ApiError::invalid(error.body_text())),
            Err(JsonRejection::JsonSyntaxError(error)) => {
                Err(ApiError::malformed(error.body_text()))
            }
            Err(JsonRejection::MissingJsonContentType(_)) => Err(ApiError::unsupported_media_type(
                "expected Content-Type: application/json",
            )),
            Err(JsonRejection::BytesRejection(error)) => {
                if error.status() == StatusCode::PAYLOAD_TOO_LARGE {
                    Err(ApiError::new(
                        StatusCode::PAYLOAD_TOO_LARGE,
                        "payload_too_large",
                        error.body_text(),
                    ))
                } else {
                    Err(ApiError::bad_request(error.body_text()))
                }
            }
            Err(other) => Err(ApiError::bad_request(other.body_text())),
        }
    }
}

//! What stands between a client and the handlers: bearer-token checks, request ids, the
//! request timeout, panic capture, and the mapping of every error reply to the one JSON error
//! shape (axum's own rejections — bad query, bad path, body too large, wrong method — are
//! plain text, so they are rewritten here rather than route by route).

use std::net::SocketAddr;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Arc;

use axum::body::Body;
use axum::extract::{Request, State};
use axum::http::{header, HeaderValue, Method, StatusCode};
use axum::middleware::Next;
use axum::response::{IntoResponse, Response};
use axum::{Json, Router};
use serde_json::{json, Value};
use sha2::{Digest, Sha256};
use subtle::ConstantTimeEq;
use tower_http::request_id::{
    MakeRequestId, PropagateRequestIdLayer, RequestId, SetRequestIdLayer,
};

use crate::config::HttpConfig;
use crate::doc;

/// The header carrying the request id (set on every response; a client may send its own).
pub const REQUEST_ID: &str = "x-request-id";

/// Paths that never need a token: probes must work without secrets, and the API
/// description is public documentation.
const OPEN_PATHS: &[&str] = &["/healthz", "/readyz", "/v1/openapi.json"];

/// Why the server must not start.
#[derive(Debug, thiserror::Error)]
#[error("refusing to listen on {addr} without an API token: anyone who can reach that address could post events and change experiments. Set POSTERIORD_API_TOKENS (comma-separated) or http.token_file, or listen on a loopback address such as 127.0.0.1")]
pub struct Unprotected {
    /// The address that is not loopback.
    pub addr: SocketAddr,
}

/// Who may do what.
#[derive(Clone)]
pub struct Auth {
    /// SHA-256 of each token: compared in constant time, and the tokens themselves are not
    /// kept around in this struct.
    digests: Arc<Vec<[u8; 32]>>,
    protect_reads: bool,
}

impl std::fmt::Debug for Auth {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Auth")
            .field("tokens", &self.digests.len())
            .field("protect_reads", &self.protect_reads)
            .finish()
    }
}

fn digest(token: &[u8]) -> [u8; 32] {
    Sha256::digest(token).into()
}

/// Refuse to serve `addr` without a token unless it is a loopback address (checked before
/// binding, and again on the bound address).
pub fn check_exposure(http: &HttpConfig, addr: SocketAddr) -> Result<(), Unprotected> {
    if http.tokens.0.is_empty() && !addr.ip().is_loopback() {
        return Err(Unprotected { addr });
    }
    Ok(())
}

impl Auth {
    /// The policy for a server bound to `bound`: with no token, writes are open only on a
    /// loopback address, and any other address is refused.
    pub fn new(http: &HttpConfig, bound: SocketAddr) -> Result<Auth, Unprotected> {
        check_exposure(http, bound)?;
        let digests: Vec<[u8; 32]> = http.tokens.0.iter().map(|t| digest(t.as_bytes())).collect();
        if digests.is_empty() {
            tracing::warn!(addr = %bound, "no API token configured: writes are accepted without a token because the server listens on a loopback address only");
        } else {
            tracing::info!(
                tokens = digests.len(),
                protect_reads = http.protect_reads,
                "API writes need a bearer token"
            );
        }
        Ok(Auth {
            digests: Arc::new(digests),
            protect_reads: http.protect_reads,
        })
    }

    /// Whether `presented` is one of the tokens. Every token is compared, in constant time
    /// over equal-length digests, so timing tells nothing about which bytes matched.
    fn accepts(&self, presented: &[u8]) -> bool {
        let d = digest(presented);
        let mut ok = subtle::Choice::from(0);
        for t in self.digests.iter() {
            ok |= t.ct_eq(&d);
        }
        ok.into()
    }
}

/// `{"error":...}` with `status`.
pub fn error(status: StatusCode, code: &str, message: &str, details: Value) -> Response {
    (status, Json(doc::error_body(code, message, details))).into_response()
}

/// Checks the bearer token of writes (every method but GET and HEAD) and, with
/// `protect_reads`, of reads, except on [`OPEN_PATHS`].
async fn check_token(State(auth): State<Auth>, request: Request, next: Next) -> Response {
    let path = request.uri().path();
    let read = matches!(*request.method(), Method::GET | Method::HEAD);
    let needs_token =
        !OPEN_PATHS.contains(&path) && !auth.digests.is_empty() && (!read || auth.protect_reads);
    if !needs_token {
        return next.run(request).await;
    }
    let presented = request
        .headers()
        .get(header::AUTHORIZATION)
        .and_then(|v| v.as_bytes().strip_prefix(b"Bearer "))
        .map(|t| t.trim_ascii());
    match presented {
        None => {
            let mut r = error(
                StatusCode::UNAUTHORIZED,
                "unauthenticated",
                "this request needs an `Authorization: Bearer <token>` header",
                Value::Null,
            );
            r.headers_mut()
                .insert(header::WWW_AUTHENTICATE, HeaderValue::from_static("Bearer"));
            r
        }
        Some(t) if auth.accepts(t) => next.run(request).await,
        Some(_) => error(
            StatusCode::FORBIDDEN,
            "forbidden",
            "the bearer token is not one of the configured API tokens",
            Value::Null,
        ),
    }
}

/// Request ids: a per-process prefix and a counter, short enough to read out of a log.
#[derive(Clone)]
struct RequestIds {
    prefix: u32,
    next: Arc<AtomicU64>,
}

impl MakeRequestId for RequestIds {
    fn make_request_id<B>(&mut self, _request: &axum::http::Request<B>) -> Option<RequestId> {
        let n = self.next.fetch_add(1, Ordering::Relaxed);
        HeaderValue::from_str(&format!("{:08x}-{n}", self.prefix))
            .ok()
            .map(RequestId::new)
    }
}

fn code_for(status: StatusCode) -> &'static str {
    match status {
        StatusCode::BAD_REQUEST => "bad_request",
        StatusCode::UNAUTHORIZED => "unauthenticated",
        StatusCode::FORBIDDEN => "forbidden",
        StatusCode::NOT_FOUND => "not_found",
        StatusCode::METHOD_NOT_ALLOWED => "method_not_allowed",
        StatusCode::REQUEST_TIMEOUT => "timeout",
        StatusCode::PAYLOAD_TOO_LARGE => "too_large",
        StatusCode::UNSUPPORTED_MEDIA_TYPE => "unsupported_media_type",
        StatusCode::UNPROCESSABLE_ENTITY => "unprocessable",
        StatusCode::SERVICE_UNAVAILABLE => "unavailable",
        s if s.is_server_error() => "internal",
        _ => "error",
    }
}

/// Rewrites every error reply that is not JSON yet into the one error shape, and makes
/// server errors carry the request id (also logged) so a report can be matched to the log.
async fn json_errors(request: Request, next: Next) -> Response {
    let request_id = request
        .headers()
        .get(REQUEST_ID)
        .and_then(|v| v.to_str().ok())
        .unwrap_or("")
        .to_string();
    let method = request.method().clone();
    let path = request.uri().path().to_string();
    let response = next.run(request).await;
    let status = response.status();
    if !(status.is_client_error() || status.is_server_error()) {
        return response;
    }
    let ctype = response.headers().get(header::CONTENT_TYPE);
    let is_json = ctype.is_some_and(|v| v.as_bytes().starts_with(b"application/json"));
    // Pages for people (HTML) keep their own error pages; axum's rejections are plain text.
    let is_page = ctype.is_some_and(|v| v.as_bytes().starts_with(b"text/html"));
    if status.is_server_error() {
        tracing::error!(request_id, %method, path, status = status.as_u16(), "request failed");
    }
    if is_page || (is_json && !status.is_server_error()) {
        return response;
    }
    let (parts, body) = response.into_parts();
    let bytes = axum::body::to_bytes(body, 64 * 1024)
        .await
        .unwrap_or_default();
    if is_json {
        // A JSON server error: ours gets the request id; any other (the readiness document
        // of a 503) passes unchanged.
        let mut v: Value = serde_json::from_slice(&bytes).unwrap_or(Value::Null);
        let Some(e) = v.get_mut("error").and_then(Value::as_object_mut) else {
            return Response::from_parts(parts, Body::from(bytes));
        };
        if e.get("details").is_none_or(Value::is_null) {
            e.insert("details".into(), json!({}));
        }
        if let Some(d) = e.get_mut("details").and_then(Value::as_object_mut) {
            d.insert("request_id".into(), json!(request_id));
        }
        let mut r = (status, Json(v)).into_response();
        copy_headers(&parts.headers, r.headers_mut());
        return r;
    }
    let body = {
        let text = String::from_utf8_lossy(&bytes).trim().to_string();
        let message = if status.is_server_error() {
            format!("internal error; quote request id {request_id} when reporting it")
        } else if text.is_empty() {
            status
                .canonical_reason()
                .unwrap_or("request refused")
                .to_string()
        } else {
            text
        };
        let details = if status.is_server_error() {
            json!({ "request_id": request_id })
        } else {
            Value::Null
        };
        doc::error_body(code_for(status), &message, details)
    };
    let mut response = (status, Json(body)).into_response();
    copy_headers(&parts.headers, response.headers_mut());
    response
}

/// Headers of a replaced reply (allow, www-authenticate, ...) without its body's framing.
fn copy_headers(from: &axum::http::HeaderMap, to: &mut axum::http::HeaderMap) {
    for (name, value) in from {
        if name != header::CONTENT_TYPE && name != header::CONTENT_LENGTH {
            to.insert(name.clone(), value.clone());
        }
    }
}

fn panic_reply(panic: Box<dyn std::any::Any + Send + 'static>) -> Response<Body> {
    let what = panic
        .downcast_ref::<String>()
        .map(String::as_str)
        .or_else(|| panic.downcast_ref::<&str>().copied())
        .unwrap_or("(no message)");
    tracing::error!(panic = what, "a request handler panicked");
    // Plain on purpose: `json_errors` outside turns it into the error shape with the id.
    StatusCode::INTERNAL_SERVER_ERROR.into_response()
}

/// Wrap `routes` in the guards: tokens, timeout, panic capture, JSON errors, request ids.
/// Every route added to `routes` gets all of them.
pub fn guard(routes: Router, http: &HttpConfig, auth: Auth) -> Router {
    let ids = RequestIds {
        prefix: rand::random(),
        next: Arc::new(AtomicU64::new(1)),
    };
    let header_name = header::HeaderName::from_static(REQUEST_ID);
    routes
        .layer(axum::middleware::from_fn_with_state(auth, check_token))
        .layer(tower_http::timeout::TimeoutLayer::with_status_code(
            StatusCode::REQUEST_TIMEOUT,
            http.request_timeout,
        ))
        .layer(tower_http::catch_panic::CatchPanicLayer::custom(
            panic_reply,
        ))
        .layer(axum::middleware::from_fn(json_errors))
        .layer(PropagateRequestIdLayer::new(header_name.clone()))
        .layer(SetRequestIdLayer::new(header_name, ids))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A handler that panics answers 500 in the error shape with the request id, over real
    /// HTTP on loopback; the server keeps serving.
    #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
    async fn a_panicking_handler_becomes_a_500_with_a_request_id() {
        let http = HttpConfig::on("127.0.0.1:0".parse().unwrap());
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
        let addr = listener.local_addr().unwrap();
        let auth = Auth::new(&http, addr).unwrap();
        let routes = Router::new()
            .route(
                "/boom",
                axum::routing::get(|| async {
                    if true {
                        panic!("the oven caught fire");
                    }
                    "unreachable"
                }),
            )
            .route("/fine", axum::routing::get(|| async { "ok" }));
        let app = guard(routes, &http, auth);
        let server = tokio::spawn(async move { axum::serve(listener, app).await });
        let c = reqwest::Client::new();
        let r = c.get(format!("http://{addr}/boom")).send().await.unwrap();
        assert_eq!(r.status().as_u16(), 500);
        let id = r.headers()[REQUEST_ID].to_str().unwrap().to_string();
        let body: Value = r.json().await.unwrap();
        assert_eq!(body["error"]["code"], "internal");
        assert_eq!(body["error"]["details"]["request_id"], id.as_str());
        assert!(body["error"]["message"].as_str().unwrap().contains(&id));
        let r = c.get(format!("http://{addr}/fine")).send().await.unwrap();
        assert_eq!(r.status().as_u16(), 200);
        server.abort();
    }

    #[test]
    fn tokens_are_matched_exactly() {
        let mut http = HttpConfig::on("127.0.0.1:0".parse().unwrap());
        http.tokens.0 = vec![
            "crumb-ops-7c1f9e2a4b6d8e0f".into(),
            "orchard-ci-3a5b7c9d1e2f4a6b".into(),
        ];
        let auth = Auth::new(&http, "0.0.0.0:80".parse().unwrap()).unwrap();
        assert!(auth.accepts(b"orchard-ci-3a5b7c9d1e2f4a6b"));
        assert!(auth.accepts(b"crumb-ops-7c1f9e2a4b6d8e0f"));
        assert!(!auth.accepts(b"crumb-ops-7c1f9e2a4b6d8e0"));
        assert!(!auth.accepts(b""));
        http.tokens.0.clear();
        assert!(Auth::new(&http, "0.0.0.0:80".parse().unwrap()).is_err());
        assert!(Auth::new(&http, "[::1]:80".parse().unwrap()).is_ok());
    }
}

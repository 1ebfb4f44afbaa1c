//! Every request passes here first: the Host it names, the access token,
//! and for a request that changes anything, proof that the console's own
//! page sent it.

use super::Console;
use axum::extract::{Request, State};
use axum::http::{header, HeaderMap, Method, StatusCode};
use axum::middleware::Next;
use axum::response::{IntoResponse, Response};
use std::sync::Arc;

/// The header the console's own script sends with every change. A page
/// of another site cannot send it without the browser asking first (a
/// CORS preflight), which the console never grants.
pub const REQUEST_HEADER: &str = "x-packbench-request";
/// The cookie the token is kept in after `/?token=…`.
pub const TOKEN_COOKIE: &str = "packbench_token";

fn refuse(status: StatusCode, why: &str) -> Response {
    (
        status,
        [(header::CONTENT_TYPE, "application/json")],
        serde_json::json!({ "error": why }).to_string(),
    )
        .into_response()
}

/// Equal in time whatever the first difference (a token compare).
fn same(a: &str, b: &str) -> bool {
    a.len() == b.len()
        && a.bytes()
            .zip(b.bytes())
            .fold(0u8, |acc, (x, y)| acc | (x ^ y))
            == 0
}

fn header_text(h: &HeaderMap, name: impl header::AsHeaderName) -> Option<&str> {
    h.get(name).and_then(|v| v.to_str().ok())
}

/// The token a request carries: bearer header, cookie, or `?token=`.
fn token_of(req: &Request) -> Option<String> {
    let h = req.headers();
    // RFC 9110 §11.1: the scheme's name is case-insensitive.
    if let Some(b) = header_text(h, header::AUTHORIZATION).and_then(|v| {
        let (scheme, rest) = v.trim_start().split_once(' ')?;
        scheme.eq_ignore_ascii_case("bearer").then_some(rest)
    }) {
        return Some(b.trim().to_string());
    }
    if let Some(c) = header_text(h, header::COOKIE) {
        for part in c.split(';') {
            if let Some(v) = part.trim().strip_prefix(&format!("{TOKEN_COOKIE}=")) {
                return Some(v.to_string());
            }
        }
    }
    req.uri().query().and_then(|q| {
        q.split('&')
            .find_map(|kv| kv.strip_prefix("token=").map(str::to_string))
    })
}

/// The guard on every route.
pub async fn guard(State(c): State<Arc<Console>>, req: Request, next: Next) -> Response {
    // RFC 9112 §3.2: a request with more than one Host field is refused
    // (400), whatever the first one says.
    if req.headers().get_all(header::HOST).iter().count() > 1 {
        return refuse(StatusCode::BAD_REQUEST, "more than one Host header");
    }
    let host = header_text(req.headers(), header::HOST)
        .unwrap_or("")
        .to_string();
    if let Some(hosts) = &c.hosts {
        if !hosts.contains(&host) {
            return refuse(
                StatusCode::MISDIRECTED_REQUEST,
                "this console answers to its own address only",
            );
        }
    }
    let mut set_cookie = None;
    if let Some(t) = &c.token {
        match token_of(&req) {
            Some(given) if same(&given, t) => {
                let from_query = req
                    .uri()
                    .query()
                    .is_some_and(|q| q.split('&').any(|kv| kv.starts_with("token=")));
                if from_query {
                    set_cookie = Some(format!(
                        "{TOKEN_COOKIE}={t}; HttpOnly; SameSite=Strict; Path=/"
                    ));
                }
            }
            _ => {
                return refuse(
                    StatusCode::UNAUTHORIZED,
                    "an access token is needed (Authorization: Bearer TOKEN, or open /?token=TOKEN once)",
                )
            }
        }
    }
    if req.method() != Method::GET && req.method() != Method::HEAD {
        let h = req.headers();
        if header_text(h, REQUEST_HEADER) != Some("1") {
            return refuse(
                StatusCode::FORBIDDEN,
                "a change must come from the console's own page or a script that says so (header X-Packbench-Request: 1)",
            );
        }
        if let Some(origin) = header_text(h, header::ORIGIN) {
            let own = [format!("http://{host}"), format!("https://{host}")];
            if !own.iter().any(|o| o == origin) {
                return refuse(
                    StatusCode::FORBIDDEN,
                    "a change from another site is refused",
                );
            }
        }
        if header_text(h, "sec-fetch-site").is_some_and(|s| s == "cross-site") {
            return refuse(
                StatusCode::FORBIDDEN,
                "a change from another site is refused",
            );
        }
        let json =
            header_text(h, header::CONTENT_TYPE).is_some_and(|t| t.starts_with("application/json"));
        if !json {
            return refuse(
                StatusCode::UNSUPPORTED_MEDIA_TYPE,
                "a change carries a JSON body (Content-Type: application/json)",
            );
        }
    }
    let mut resp = next.run(req).await;
    let h = resp.headers_mut();
    if let Some(c) = set_cookie.and_then(|c| c.parse().ok()) {
        h.insert(header::SET_COOKIE, c);
    }
    // Nothing of another origin is loaded, no inline script runs (the
    // reports' inline styles may), and no other site frames us.
    if let Ok(v) = "default-src 'self'; style-src 'self' 'unsafe-inline'; img-src 'self' data:; frame-ancestors 'none'".parse() {
        h.insert(header::CONTENT_SECURITY_POLICY, v);
    }
    if let Ok(v) = "nosniff".parse() {
        h.insert(header::X_CONTENT_TYPE_OPTIONS, v);
    }
    resp
}

/// Pack ids and run folder names from a request, checked as the CLI
/// checks pack ids (no separators, no leading dot, no `..`): the refusal
/// of the first that fails.
pub fn refused_names(names: &[(&str, &str)]) -> Option<Response> {
    names.iter().find_map(|(what, s)| {
        model::pack::check_pack_id(s)
            .err()
            .map(|e| refuse(StatusCode::BAD_REQUEST, &format!("{what}: {e}")))
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn tokens_compare_whole() {
        assert!(same("abc123", "abc123"));
        assert!(!same("abc123", "abc124"));
        assert!(!same("abc", "abc123"));
    }

    #[test]
    fn names_with_separators_or_dots_are_refused() {
        for bad in ["..", "../etc", "a/b", ".hidden", ""] {
            assert!(
                refused_names(&[("pack", "FR-1"), ("run", bad)]).is_some(),
                "{bad}"
            );
        }
        assert!(refused_names(&[("pack", "FR-L04"), ("run", "20261203-x")]).is_none());
    }
}

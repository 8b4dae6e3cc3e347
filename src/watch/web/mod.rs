//! The status page's HTTP server: read-only (GET and HEAD), on a thread and runtime of
//! its own at a lower CPU priority than ingestion, answering every request from the
//! last snapshot `page` made. Bounded everywhere: at most `MAX_CONNECTIONS` at once
//! (more wait in the kernel's queue) and `clients::PER_CLIENT` from one client (more
//! are closed at once, so one client cannot take the page from the others); a
//! connection silent for `SILENT` (a new one that sends nothing, one kept alive after
//! an answer, or a request's head that takes longer) is closed; a request's head at
//! most 16 KiB, a connection at most 60 s, a URL at most 2 KiB, no request body. A URL's
//! path never reaches the file system: it names a snapshot entry or nothing. With a
//! token, every request needs it (`Authorization: Bearer`, the scheme in any case, or
//! the cookie a browser gets from `/?token=` once), compared in constant time; a client
//! that keeps failing waits longer before each attempt is looked at, and is named in the
//! log once per window.
//!
//! Its length past 600 lines is tests (each bound has one); the per-client accounting is
//! `clients`, the answers `answer`.

mod clients;

use std::convert::Infallible;
use std::net::SocketAddr;
use std::sync::atomic::Ordering;
use std::sync::{Arc, Mutex};
use std::time::Duration;

use bytes::Bytes;
use http_body_util::Full;
use hyper::body::Incoming;
use hyper::{Request, Response, StatusCode};

use self::clients::{Client, Clients};
use super::page::{PageState, Snapshot};
use crate::clock::Clock;
use crate::live;

const MAX_CONNECTIONS: usize = 64;
/// A connection that sends no complete request head for this long is closed: long
/// enough for a slow phone link to send a head of a few hundred bytes, and longer than
/// the page's own 3 s polling, so a browser's kept-alive connection is reused.
pub const SILENT: Duration = Duration::from_secs(5);
const MAX_TARGET: usize = 2048;
const COOKIE: &str = "subwatch_token";

/// What a request asks, as far as answering it needs.
#[derive(Debug, Clone, Default)]
pub struct Asked<'a> {
    pub method: &'a str,
    /// Path and query as sent.
    pub target: &'a str,
    pub authorization: Option<&'a str>,
    pub cookie: Option<&'a str>,
    /// The declared body length, if any (`Transfer-Encoding` counts as a body).
    pub has_body: bool,
}

/// An answer before it becomes HTTP.
#[derive(Debug, Clone)]
pub struct Answer {
    pub status: StatusCode,
    pub content_type: &'static str,
    pub body: Bytes,
    pub headers: Vec<(&'static str, String)>,
}

impl Answer {
    fn new(status: StatusCode, content_type: &'static str, body: impl Into<Bytes>) -> Self {
        Answer {
            status,
            content_type,
            body: body.into(),
            headers: Vec::new(),
        }
    }

    fn text(status: StatusCode, words: &str) -> Self {
        Answer::new(status, "text/plain; charset=utf-8", format!("{words}\n"))
    }
}

/// Equal strings, in time that depends only on their lengths.
pub fn same_secret(a: &[u8], b: &[u8]) -> bool {
    let n = a.len().max(b.len()).max(1);
    let mut diff = (a.len() ^ b.len()) as u64;
    for i in 0..n {
        let x = a.get(i).copied().unwrap_or(0);
        let y = b.get(i).copied().unwrap_or(0);
        diff |= u64::from(x ^ y);
    }
    std::hint::black_box(diff) == 0
}

fn cookie_value<'a>(cookies: &'a str, name: &str) -> Option<&'a str> {
    cookies.split(';').find_map(|c| {
        let (k, v) = c.trim().split_once('=')?;
        (k == name).then_some(v)
    })
}

fn query_value<'a>(query: &'a str, name: &str) -> Option<&'a str> {
    query.split('&').find_map(|kv| {
        let (k, v) = kv.split_once('=')?;
        (k == name).then_some(v)
    })
}

/// The token of an `Authorization` header's Bearer credentials. The scheme is
/// case-insensitive and followed by one or more spaces (RFC 7235 §2.1).
fn bearer(authorization: &str) -> Option<&str> {
    let (scheme, rest) = authorization.trim().split_once(' ')?;
    scheme
        .eq_ignore_ascii_case("bearer")
        .then(|| rest.trim_start_matches(' '))
}

/// What a request carries towards the token.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Credentials {
    /// Nothing: a browser's first visit, or a script that forgot it.
    None,
    /// A header or a cookie holding the token.
    Held,
    /// `/?token=` holding the token: a browser signing in.
    InAddress,
    /// Something offered as the token, and not it: a failed sign-in.
    Wrong,
}

/// Whether a request holds the token, by header, cookie or (on `/` only) the address.
pub fn credentials(asked: &Asked<'_>, token: &str) -> Credentials {
    let (path, query) = asked.target.split_once('?').unwrap_or((asked.target, ""));
    let offered = [
        asked.authorization.map(|h| bearer(h).unwrap_or("")),
        asked.cookie.and_then(|c| cookie_value(c, COOKIE)),
    ];
    let by_address = query_value(query, "token").filter(|_| path == "/");
    let matches = |t: &str| same_secret(t.as_bytes(), token.as_bytes());
    if offered.iter().flatten().any(|t| matches(t)) {
        Credentials::Held
    } else if by_address.is_some_and(matches) {
        Credentials::InAddress
    } else if offered.iter().flatten().next().is_some() || by_address.is_some() {
        Credentials::Wrong
    } else {
        Credentials::None
    }
}

/// The answer to one request, from a snapshot. Pure: no I/O.
pub fn answer(asked: &Asked<'_>, snap: &Snapshot, token: Option<&str>) -> Answer {
    if asked.target.len() > MAX_TARGET {
        return Answer::text(StatusCode::URI_TOO_LONG, "address too long");
    }
    if asked.method != "GET" && asked.method != "HEAD" {
        let mut a = Answer::text(
            StatusCode::METHOD_NOT_ALLOWED,
            "this page is read-only: GET and HEAD only",
        );
        a.headers.push(("allow", "GET, HEAD".into()));
        return a;
    }
    if asked.has_body {
        return Answer::text(StatusCode::PAYLOAD_TOO_LARGE, "no request body is accepted");
    }
    let path = asked
        .target
        .split_once('?')
        .map_or(asked.target, |(p, _)| p);
    // The paths served are plain: letters, digits, '/', '.', '-', '_'. Anything else
    // (percent-encoding, "..", a backslash, a NUL) is refused before anything else.
    let plain = path.starts_with('/')
        && !path.contains("..")
        && path
            .bytes()
            .all(|b| b.is_ascii_alphanumeric() || b"/._-".contains(&b));
    if !plain {
        return Answer::text(StatusCode::BAD_REQUEST, "no such address");
    }
    if let Some(token) = token {
        match credentials(asked, token) {
            Credentials::Held => {}
            Credentials::InAddress => {
                // A browser shows the page after opening /?token=... once.
                let mut a = Answer::text(StatusCode::SEE_OTHER, "signed in");
                a.headers.push(("location", "/".into()));
                a.headers.push((
                    "set-cookie",
                    format!("{COOKIE}={token}; HttpOnly; SameSite=Strict; Path=/"),
                ));
                return a;
            }
            Credentials::None | Credentials::Wrong => {
                let mut a = Answer::text(
                    StatusCode::UNAUTHORIZED,
                    "this page needs its access token: send \"Authorization: Bearer TOKEN\", or open /?token=TOKEN once in this browser",
                );
                a.headers
                    .push(("www-authenticate", "Bearer realm=\"subwatch\"".into()));
                return a;
            }
        }
    }
    if snap.page.is_empty() && !matches!(path, "/app.js" | "/style.css" | "/icon.svg") {
        let mut a = Answer::text(
            StatusCode::SERVICE_UNAVAILABLE,
            "the page is being prepared; try again in a few seconds",
        );
        a.headers.push(("retry-after", "2".into()));
        return a;
    }
    let html = "text/html; charset=utf-8";
    let json = "application/json";
    match path {
        "/" => Answer::new(StatusCode::OK, html, snap.page.clone()),
        "/part" => Answer::new(StatusCode::OK, html, snap.part.clone()),
        "/app.js" => Answer::new(
            StatusCode::OK,
            "text/javascript; charset=utf-8",
            live::SCRIPT,
        ),
        "/style.css" => Answer::new(StatusCode::OK, "text/css; charset=utf-8", live::STYLE),
        "/icon.svg" => Answer::new(StatusCode::OK, "image/svg+xml", live::ICON),
        // Browsers ask for it whatever the page says; the page names its icon.
        "/favicon.ico" => Answer::new(StatusCode::NO_CONTENT, "image/svg+xml", Bytes::new()),
        "/api/night" => Answer::new(StatusCode::OK, json, snap.night_json.clone()),
        "/api/version" => Answer::new(StatusCode::OK, json, snap.version_json.clone()),
        _ => match snap.images.get(&path[1..]) {
            Some(png) => Answer::new(StatusCode::OK, "image/png", png.clone()),
            None => Answer::text(StatusCode::NOT_FOUND, "no such address"),
        },
    }
}

fn to_response(a: Answer) -> Response<Full<Bytes>> {
    let mut r = Response::new(Full::new(a.body));
    *r.status_mut() = a.status;
    let h = r.headers_mut();
    let mut put = |k: &'static str, v: &str| {
        if let Ok(v) = hyper::header::HeaderValue::from_str(v) {
            h.insert(k, v);
        }
    };
    put("content-type", a.content_type);
    put("cache-control", "no-store");
    put("content-security-policy", live::CONTENT_SECURITY_POLICY);
    put("x-content-type-options", "nosniff");
    put("referrer-policy", "no-referrer");
    put("x-frame-options", "DENY");
    for (k, v) in &a.headers {
        put(k, v);
    }
    r
}

/// What every connection's requests are answered with.
struct Served {
    state: Arc<PageState>,
    token: Option<String>,
    clock: Arc<dyn Clock>,
    clients: Mutex<Clients>,
}

impl Served {
    fn clients(&self) -> std::sync::MutexGuard<'_, Clients> {
        self.clients.lock().unwrap_or_else(|p| p.into_inner())
    }
}

async fn respond(
    req: Request<Incoming>,
    served: Arc<Served>,
    client: Client,
) -> Response<Full<Bytes>> {
    let header = |name| req.headers().get(name).and_then(|v| v.to_str().ok());
    let has_body = header("transfer-encoding").is_some()
        || header("content-length").is_some_and(|n| n.trim() != "0");
    let target = req
        .uri()
        .path_and_query()
        .map_or("/", |p| p.as_str())
        .to_string();
    let asked = Asked {
        method: req.method().as_str(),
        target: &target,
        authorization: header("authorization"),
        cookie: header("cookie"),
        has_body,
    };
    let token = served.token.as_deref();
    let offered = token.map_or(Credentials::None, |t| credentials(&asked, t));
    if offered != Credentials::None {
        // A client that kept failing waits before any attempt of its is looked at, the
        // right token included: the wait cannot tell a guess that is right.
        let wait = served.clients().wait(client, served.clock.now_unix());
        if !wait.is_zero() {
            tokio::time::sleep(wait).await;
        }
    }
    let now = served.clock.now_unix();
    served.state.asked(now);
    let snap = served.state.current();
    // A bug in answering costs that request, not the server.
    let answered = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
        answer(&asked, &snap, token)
    }))
    .unwrap_or_else(|_| Answer::text(StatusCode::INTERNAL_SERVER_ERROR, "internal error"));
    if offered == Credentials::Wrong {
        if let Some(n) = served.clients().failed(client, now) {
            tracing::warn!(
                "status page: {n} failed sign-ins from {client} within {} minutes; each further attempt of it now waits up to {} s (said once per client per {} minutes)",
                clients::WINDOW_S / 60.0,
                clients::MAX_WAIT_S,
                clients::WINDOW_S / 60.0
            );
        }
    }
    to_response(answered)
}

/// A connection let in, counted against its client until it ends.
struct Held {
    served: Arc<Served>,
    client: Client,
}

impl Drop for Held {
    fn drop(&mut self) {
        self.served.clients().close(self.client);
    }
}

/// The server and its page builder; both stop when this is dropped.
pub struct WebServer {
    state: Arc<PageState>,
    pub address: SocketAddr,
}

impl Drop for WebServer {
    fn drop(&mut self) {
        self.state.stop.store(true, Ordering::Relaxed);
    }
}

/// Bind `[web] listen` and serve the page. The address bound is returned (a port 0
/// becomes the one the system chose).
pub fn start(
    config: &crate::config::Config,
    clock: Arc<dyn Clock>,
) -> Result<Option<WebServer>, String> {
    let Some(listen) = config.web.listen else {
        return Ok(None);
    };
    let token = config
        .web
        .token()
        .map_err(|e| format!("web.token_file: {e}"))?;
    let listener = std::net::TcpListener::bind(listen)
        .map_err(|e| format!("cannot listen on {listen}: {e}"))?;
    let address = listener
        .local_addr()
        .map_err(|e| format!("cannot listen on {listen}: {e}"))?;
    listener
        .set_nonblocking(true)
        .map_err(|e| format!("cannot listen on {listen}: {e}"))?;
    let state = Arc::new(PageState::default());

    let (builder_state, builder_clock, builder_config) =
        (state.clone(), clock.clone(), config.clone());
    std::thread::Builder::new()
        .name("subwatch-page".into())
        .spawn(move || {
            crate::os::lower_thread_priority();
            super::page::run(builder_config, builder_clock, builder_state)
        })
        .map_err(|e| format!("cannot start the status page: {e}"))?;

    let server_state = state.clone();
    std::thread::Builder::new()
        .name("subwatch-web".into())
        .spawn(move || {
            crate::os::lower_thread_priority();
            let runtime = match tokio::runtime::Builder::new_current_thread()
                .enable_all()
                .build()
            {
                Ok(r) => r,
                Err(e) => {
                    tracing::error!("status page: cannot start its runtime: {e}");
                    return;
                }
            };
            runtime.block_on(serve(listener, server_state, token, clock));
        })
        .map_err(|e| format!("cannot start the status page: {e}"))?;
    Ok(Some(WebServer { state, address }))
}

async fn serve(
    listener: std::net::TcpListener,
    state: Arc<PageState>,
    token: Option<String>,
    clock: Arc<dyn Clock>,
) {
    let listener = match tokio::net::TcpListener::from_std(listener) {
        Ok(l) => l,
        Err(e) => {
            tracing::error!("status page: {e}");
            return;
        }
    };
    let slots = Arc::new(tokio::sync::Semaphore::new(MAX_CONNECTIONS));
    let served = Arc::new(Served {
        state,
        token,
        clock,
        clients: Mutex::new(Clients::default()),
    });
    let mut stop_check = tokio::time::interval(Duration::from_millis(250));
    loop {
        let Ok(slot) = slots.clone().acquire_owned().await else {
            return;
        };
        let accepted = tokio::select! {
            a = listener.accept() => a,
            _ = stop_check.tick() => {
                if served.state.stop.load(Ordering::Relaxed) {
                    return;
                }
                continue;
            }
        };
        let (stream, peer) = match accepted {
            Ok(a) => a,
            Err(e) => {
                // Out of file descriptors, most likely: wait rather than spin.
                tracing::debug!("status page: accept: {e}");
                tokio::time::sleep(Duration::from_millis(100)).await;
                continue;
            }
        };
        let client = Client::of(peer.ip());
        let admitted = served.clients().open(client, served.clock.now_unix());
        if let Err(say) = admitted {
            // Closed at once: its slot goes back to everyone else.
            if say {
                tracing::warn!(
                    "status page: {client} holds {} connections, the most one client may; more from it are closed (said once per client per {} minutes)",
                    clients::PER_CLIENT,
                    clients::WINDOW_S / 60.0
                );
            }
            drop(stream);
            continue;
        }
        let held = Held {
            served: served.clone(),
            client,
        };
        let served = served.clone();
        tokio::spawn(async move {
            let _slot = slot;
            let _held = held;
            let service = hyper::service::service_fn(move |req: Request<Incoming>| {
                let served = served.clone();
                async move { Ok::<_, Infallible>(respond(req, served, client).await) }
            });
            let connection = hyper::server::conn::http1::Builder::new()
                .timer(hyper_util::rt::TokioTimer::new())
                // Runs from the moment a request's head is awaited (a new connection,
                // or one kept alive after an answer) until the whole head is in.
                .header_read_timeout(SILENT)
                .max_buf_size(16 * 1024)
                .max_headers(64)
                .serve_connection(hyper_util::rt::TokioIo::new(stream), service);
            // At most 60 s per connection, ended between requests (a keep-alive client
            // is told to close rather than cut off mid-request); 10 s more to finish.
            tokio::pin!(connection);
            tokio::select! {
                _ = connection.as_mut() => return,
                _ = tokio::time::sleep(Duration::from_secs(60)) => {}
            }
            connection.as_mut().graceful_shutdown();
            let _ = tokio::time::timeout(Duration::from_secs(10), connection).await;
        });
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn snap() -> Snapshot {
        let mut s = Snapshot {
            page: Bytes::from_static(b"<html>page</html>"),
            version_json: Bytes::from_static(b"{\"version\":3}"),
            ..Default::default()
        };
        s.images
            .insert("plot/0/fwhm.png".into(), Bytes::from_static(b"\x89PNG"));
        s
    }

    fn get(target: &str) -> Asked<'_> {
        Asked {
            method: "GET",
            target,
            ..Default::default()
        }
    }

    #[test]
    fn the_page_and_its_parts_are_served_and_nothing_else() {
        let s = snap();
        assert_eq!(answer(&get("/"), &s, None).status, StatusCode::OK);
        assert_eq!(answer(&get("/api/version"), &s, None).body, s.version_json);
        assert_eq!(
            answer(&get("/plot/0/fwhm.png"), &s, None).content_type,
            "image/png"
        );
        assert_eq!(
            answer(&get("/plot/1/fwhm.png"), &s, None).status,
            StatusCode::NOT_FOUND
        );
        assert_eq!(
            answer(&get("/etc/passwd"), &s, None).status,
            StatusCode::NOT_FOUND
        );
        // Before the first snapshot: "not yet", not an empty page.
        let a = answer(&get("/api/night"), &Snapshot::default(), None);
        assert_eq!(a.status, StatusCode::SERVICE_UNAVAILABLE);
    }

    #[test]
    fn traversal_encoded_bytes_and_other_methods_are_refused() {
        let s = snap();
        for bad in [
            "/..%2f..%2fetc/passwd",
            "/../etc/passwd",
            "/plot/0/fwhm.png%00",
            "/a\\b",
            "/%2e%2e/",
            "relative",
        ] {
            assert_eq!(
                answer(&get(bad), &s, None).status,
                StatusCode::BAD_REQUEST,
                "{bad}"
            );
        }
        let post = Asked {
            method: "POST",
            target: "/",
            ..Default::default()
        };
        let a = answer(&post, &s, None);
        assert_eq!(a.status, StatusCode::METHOD_NOT_ALLOWED);
        assert!(a
            .headers
            .iter()
            .any(|(k, v)| *k == "allow" && v == "GET, HEAD"));
        let long = format!("/{}", "a".repeat(3000));
        assert_eq!(
            answer(&get(&long), &s, None).status,
            StatusCode::URI_TOO_LONG
        );
        let body = Asked {
            has_body: true,
            ..get("/")
        };
        assert_eq!(
            answer(&body, &s, None).status,
            StatusCode::PAYLOAD_TOO_LARGE
        );
    }

    #[test]
    fn with_a_token_every_request_needs_it() {
        let s = snap();
        let token = Some("0123456789abcdef-secret");
        assert_eq!(
            answer(&get("/"), &s, token).status,
            StatusCode::UNAUTHORIZED
        );
        assert_eq!(
            answer(&get("/plot/0/fwhm.png"), &s, token).status,
            StatusCode::UNAUTHORIZED
        );
        let wrong = Asked {
            authorization: Some("Bearer 0123456789abcdef-secreT"),
            ..get("/")
        };
        assert_eq!(answer(&wrong, &s, token).status, StatusCode::UNAUTHORIZED);
        let right = Asked {
            authorization: Some("Bearer 0123456789abcdef-secret"),
            ..get("/")
        };
        assert_eq!(answer(&right, &s, token).status, StatusCode::OK);
        // A browser signs in once and then carries the cookie.
        let signin = answer(&get("/?token=0123456789abcdef-secret"), &s, token);
        assert_eq!(signin.status, StatusCode::SEE_OTHER);
        let cookie = Asked {
            cookie: Some("a=b; subwatch_token=0123456789abcdef-secret"),
            ..get("/api/version")
        };
        assert_eq!(answer(&cookie, &s, token).status, StatusCode::OK);
        assert_eq!(
            answer(&get("/?token=wrong"), &s, token).status,
            StatusCode::UNAUTHORIZED
        );
    }

    #[test]
    fn the_bearer_scheme_is_read_in_any_case() {
        // RFC 7235 §2.1: "It uses a case-insensitive token as a means to identify the
        // authentication scheme", followed by 1*SP.
        let s = snap();
        let token = Some("0123456789abcdef-secret");
        for header in [
            "Bearer 0123456789abcdef-secret",
            "bearer 0123456789abcdef-secret",
            "BEARER 0123456789abcdef-secret",
            "bEaReR   0123456789abcdef-secret",
        ] {
            let asked = Asked {
                authorization: Some(header),
                ..get("/")
            };
            assert_eq!(answer(&asked, &s, token).status, StatusCode::OK, "{header}");
        }
        for header in [
            "Basic 0123456789abcdef-secret",
            "Bearer0123456789abcdef-secret",
            "0123456789abcdef-secret",
        ] {
            let asked = Asked {
                authorization: Some(header),
                ..get("/")
            };
            assert_eq!(
                answer(&asked, &s, token).status,
                StatusCode::UNAUTHORIZED,
                "{header}"
            );
        }
    }

    #[test]
    fn only_something_offered_as_the_token_is_a_failed_sign_in() {
        let token = "0123456789abcdef-secret";
        let c = |asked: Asked<'_>| credentials(&asked, token);
        assert_eq!(c(get("/")), Credentials::None);
        assert_eq!(
            c(Asked {
                cookie: Some("theme=red"),
                ..get("/")
            }),
            Credentials::None
        );
        assert_eq!(
            c(Asked {
                cookie: Some("subwatch_token=guess"),
                ..get("/api/night")
            }),
            Credentials::Wrong
        );
        assert_eq!(
            c(Asked {
                authorization: Some("Basic Z3Vlc3M="),
                ..get("/")
            }),
            Credentials::Wrong
        );
        assert_eq!(c(get("/?token=guess")), Credentials::Wrong);
        assert_eq!(
            c(get("/?token=0123456789abcdef-secret")),
            Credentials::InAddress
        );
        // The address signs in on the page itself only.
        assert_eq!(
            c(get("/api/night?token=0123456789abcdef-secret")),
            Credentials::None
        );
        assert_eq!(
            c(Asked {
                authorization: Some("bearer 0123456789abcdef-secret"),
                cookie: Some("subwatch_token=old"),
                ..get("/")
            }),
            Credentials::Held
        );
    }

    #[test]
    fn secrets_compare_equal_only_when_equal() {
        assert!(same_secret(b"abc", b"abc"));
        assert!(!same_secret(b"abc", b"abd"));
        assert!(!same_secret(b"abc", b"abcd"));
        assert!(!same_secret(b"", b"a"));
        assert!(same_secret(b"", b""));
    }
}

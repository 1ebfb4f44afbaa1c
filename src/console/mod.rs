//! The shop's screen: `packbench serve`, a bench process that owns its
//! bays and serves a web console and a JSON API on it.
//!
//! - **Bays** run on threads of their own (one runtime each, as `packbench
//!   run`), so no request, page or stream can make a sample late; the web
//!   side only reads the bays' boards.
//! - **Everything is embedded** (pages, style, script): nothing is fetched
//!   from the network at run time.
//! - **Security**: bound to loopback unless told otherwise, and then only
//!   with an access token on every request; a state-changing request needs
//!   the console's own header and a JSON body and is refused from another
//!   origin; the Host header must name the console (no DNS rebinding);
//!   pack ids and run folders are checked as the CLI checks them; bodies
//!   are limited to 16 KiB.

pub mod api;
pub mod bays;
pub mod pages;
pub mod security;
pub mod timed;

use crate::session::emergency::Emergency;
use bays::Bay;
use std::net::SocketAddr;
use std::path::PathBuf;
use std::sync::Arc;

/// Largest request body accepted, bytes.
pub const BODY_LIMIT: usize = 16 * 1024;

/// A running console's shared state.
pub struct Console {
    pub bays: Vec<Arc<Bay>>,
    pub results: PathBuf,
    /// The procedures a start form may pick: (file name, path).
    pub procedures: Vec<(String, PathBuf)>,
    /// Every request must carry it (on a non-loopback address).
    pub token: Option<String>,
    /// The Host header values a request may carry (loopback binding).
    pub hosts: Option<Vec<String>>,
    pub emergency: Emergency,
    /// The address others open the console at (`--public-url`): the
    /// labels' QR codes link there; none, no QR code.
    pub public_url: Option<String>,
    /// The station locks this process holds for its lifetime.
    pub locks: Vec<Box<dyn std::any::Any + Send + Sync>>,
    /// Set when the console is closing: every live stream ends.
    pub closing: tokio::sync::watch::Sender<bool>,
}

impl Console {
    pub fn bay(&self, name: &str) -> Option<Arc<Bay>> {
        self.bays.iter().find(|b| b.name == name).cloned()
    }
}

/// The Host values a loopback console answers to.
pub fn loopback_hosts(addr: SocketAddr) -> Vec<String> {
    let p = addr.port();
    vec![
        format!("127.0.0.1:{p}"),
        format!("localhost:{p}"),
        format!("[::1]:{p}"),
        addr.to_string(),
    ]
}

/// The console's routes on its state.
pub fn router(console: Arc<Console>) -> axum::Router {
    use axum::routing::{get, post};
    let api = axum::Router::new()
        .route("/bays", get(api::bays))
        .route("/stream", get(api::stream))
        .route("/procedures", get(api::procedures))
        .route("/bays/{bay}/check", post(api::check))
        .route("/bays/{bay}/start", post(api::start))
        .route("/bays/{bay}/stop", post(api::stop))
        .route("/bays/{bay}/resume", post(api::resume))
        .route("/packs", get(api::packs))
        .route("/packs/{pack}", get(api::pack))
        .route("/packs/{pack}/runs/{run}", get(api::run));
    axum::Router::new()
        .route("/", get(pages::bays))
        .route("/style.css", get(pages::style))
        .route("/console.js", get(pages::script))
        .route("/packs", get(pages::packs))
        .route("/packs/{pack}", get(pages::pack))
        .route("/packs/{pack}/runs/{run}", get(pages::run))
        .route("/packs/{pack}/runs/{run}/label", get(pages::label))
        .nest("/api", api)
        .fallback(pages::not_found)
        .layer(axum::middleware::from_fn_with_state(
            console.clone(),
            security::guard,
        ))
        .layer(axum::extract::DefaultBodyLimit::max(BODY_LIMIT))
        .with_state(console)
}

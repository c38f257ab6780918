//! The local read-only HTTP surface (`[http] listen`): `/healthz`,
//! `/metrics` (Prometheus text exposition format) and `/` (an overview
//! page). It opens its own read-only connection to the store and never
//! writes.

use std::path::Path;
use std::sync::atomic::AtomicBool;

use crate::config::HttpSettings;

/// Why the HTTP surface could not serve.
#[derive(Debug, thiserror::Error)]
pub enum HttpError {
    /// The address cannot be bound.
    #[error("cannot listen on {addr}: {source}; choose another port in [http] listen")]
    Bind {
        /// The address.
        addr: std::net::SocketAddr,
        /// Why.
        source: std::io::Error,
    },
}

/// Serves until `stop` is set. `database` is the store's file.
pub fn serve(settings: &HttpSettings, database: &Path, stop: &AtomicBool) -> Result<(), HttpError> {
    let _ = (database, stop);
    Err(HttpError::Bind {
        addr: settings.listen,
        source: std::io::Error::other("the HTTP surface is not built yet"),
    })
}

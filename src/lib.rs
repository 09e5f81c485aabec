//! zonetally: conditional zone-count distributions from a calibrated probability raster and an
//! observed total.
//!
//! `engine` is the numerical core (pure, synchronous); `api` owns the wire format and HTTP;
//! `jobs` owns where jobs live and the compute pool they run on.

pub mod api;
pub mod bench;
pub mod cli;
pub mod engine;
pub mod geo;
pub mod jobs;

pub use api::config::Config;
pub use api::state::AppState;

/// The whole service as an axum router, so tests can drive it in-process.
pub fn app(state: AppState) -> axum::Router {
    api::router(state)
}

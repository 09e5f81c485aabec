//! zonetally: conditional zone-count distributions from a calibrated probability raster and an
//! observed total.
//!
//! `engine` is the numerical core (pure, synchronous); `api` owns the wire format and HTTP.

pub mod api;
pub mod bench;
pub mod cli;
pub mod engine;

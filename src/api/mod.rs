//! HTTP and the wire format: request and results documents, problem documents, routes.
//! The only layer that knows JSON.

pub mod wire;

//! The output end of the data path: the latest [`crate::window::Snapshot`] rendered as
//! Prometheus metrics, and the HTTP server that serves them with health and readiness.

pub mod fleet;
mod input_shift;
pub mod process;
pub mod registry;
pub mod server;
pub mod web;

//! The output end of the data path: the latest [`crate::window::Snapshot`] rendered as
//! Prometheus metrics and as the status page, and the HTTP server that serves them with health
//! and readiness.

pub mod fleet;
pub mod html;
mod input_shift;
pub mod page;
pub mod process;
pub mod registry;
pub mod report;
pub mod server;
pub mod web;

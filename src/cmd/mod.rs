//! One module per command-line mode. Each takes already-validated settings, does its work
//! through the library's stages, and returns a typed error that `main` maps to an exit code.

pub mod bound;
pub mod demo;
pub mod rules;
pub mod slices;
pub mod track;

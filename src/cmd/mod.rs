//! One module per command-line mode (`cli.rs` holds every mode's arguments and turns them into
//! plans; `error.rs` maps errors to exit codes). Each mode takes validated settings, does its
//! work through the library's stages, and returns a typed error.

pub mod bound;
pub mod check_config;
pub mod cli;
pub mod demo;
pub mod error;
pub mod fleet;
pub mod hash_password;
pub mod reset;
pub mod rules;
pub mod run;
pub mod slices;
pub mod track;

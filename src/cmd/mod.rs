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
pub mod input_shift;
pub mod replay;
pub mod report;
pub mod reset;
pub mod rules;
pub mod run;
pub mod slices;
pub mod track;

/// Prints a report on standard output: one JSON document, or the mode's table for people.
pub fn print_report<T: serde::Serialize>(
    report: &T,
    json: bool,
    table: impl FnOnce(&mut std::io::StdoutLock<'static>, &T) -> std::io::Result<()>,
) -> anyhow::Result<()> {
    use std::io::Write;
    let mut out = std::io::stdout().lock();
    if json {
        serde_json::to_writer_pretty(&mut out, report)?;
        writeln!(out)?;
    } else {
        table(&mut out, report)?;
    }
    Ok(())
}

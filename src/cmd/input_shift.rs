//! `riskbound input-shift`: has what the model sees changed between a reference file and a
//! current one? Label-free, so it can speak while labels are still on their way. A shift of
//! the inputs is not a rise of the risk: it can be harmless, and a harmful change can leave the
//! inputs alone. Each p-value is for one look.

use std::io::Write;
use std::path::Path;

use serde::Serialize;

use super::cli::InputShiftArgs;
use super::error::CliError;
use crate::estimate::kernel::{self, KernelError, Points, TwoSampleSettings};
use crate::ingest::points::{read_points, subsample, Coder};
use crate::ingest::{DecodeError, Format};

/// Bad input or data the tests cannot take: the user's to fix (exit 2).
#[derive(Debug, thiserror::Error)]
pub enum ShiftError {
    #[error("{0}")]
    Input(#[from] DecodeError),
    #[error("{file}: {source}")]
    Data { file: String, source: KernelError },
}

#[derive(Serialize)]
struct Test {
    p_value: f64,
    shifted: bool,
}

#[derive(Serialize)]
struct SpectralOut {
    p_value: f64,
    shifted: bool,
    eigenvalues: usize,
    statistic: f64,
    null_draws: usize,
    level: &'static str,
}

#[derive(Serialize)]
struct Tests {
    permutation: Option<Test>,
    spectral: SpectralOut,
}

#[derive(Serialize)]
struct Univariate {
    column: String,
    ks_statistic: f64,
    ks_p_value: f64,
    ks_exact: bool,
}

#[derive(Serialize)]
struct Report {
    n_reference: usize,
    n_current: usize,
    /// Rows in each file before the subsample.
    rows_reference: usize,
    rows_current: usize,
    columns: Vec<String>,
    categorical: Vec<String>,
    bandwidth: f64,
    bandwidth_rule: &'static str,
    confidence: f64,
    seed: u64,
    mmd2_unbiased: f64,
    mmd2_biased: f64,
    tests: Tests,
    univariate: Vec<Univariate>,
}

fn load(path: &Path, a: &InputShiftArgs, coder: &mut Coder) -> anyhow::Result<Points> {
    let file = path.display().to_string();
    let format = match a.format {
        Some(f) => Format::from(f),
        None => Format::from_path(path).ok_or_else(|| {
            CliError::Usage(format!("{file}: cannot tell the format from the extension; give --format csv or jsonl"))
        })?,
    };
    let h = std::fs::File::open(path).map_err(|e| CliError::Usage(format!("{file}: cannot open: {e}")))?;
    let reader = std::io::BufReader::new(h);
    Ok(read_points(reader, format, &file, &a.columns, &a.categorical, coder).map_err(ShiftError::from)?)
}

pub fn main(a: &InputShiftArgs) -> anyhow::Result<()> {
    if a.columns.is_empty() && a.categorical.is_empty() {
        return Err(
            CliError::Usage("give the columns to compare: --columns A,B and/or --categorical C,D".into()).into()
        );
    }
    let clock = std::time::Instant::now();
    let lap = |what: &str| {
        if a.timings {
            eprintln!("timing {what}: {:.3} s", clock.elapsed().as_secs_f64());
        }
    };
    let mut coder = Coder::default();
    let reference_all = load(&a.reference, a, &mut coder)?;
    let current_all = load(&a.current, a, &mut coder)?;
    let max = a.max_points as usize;
    // Different seeds per side, so equal files do not give the same rows on both sides.
    let reference = subsample(&reference_all, max, a.seed);
    let current = subsample(&current_all, max, a.seed.wrapping_add(1));
    let data = |file: &Path, source| ShiftError::Data { file: file.display().to_string(), source };
    let scale = kernel::standardiser(&reference, &a.columns).map_err(|e| data(&a.reference, e))?;
    lap("read");
    let settings = TwoSampleSettings {
        bandwidth: a.bandwidth,
        permutations: a.permutations,
        null_draws: a.null_draws as usize,
        seed: a.seed,
    };
    let t = kernel::two_sample(&reference, &current, &scale, settings, lap).map_err(|e| data(&a.current, e))?;
    let delta = a.confidence.delta();
    let permutation = t.permutation_p.map(|p| Test { p_value: p, shifted: p <= delta });
    let sp = &t.spectral;
    let univariate = a
        .columns
        .iter()
        .zip(&t.ks)
        .map(|(name, r)| Univariate {
            column: name.clone(),
            ks_statistic: r.statistic,
            ks_p_value: r.p_value,
            ks_exact: r.exact,
        })
        .collect();
    let report = Report {
        n_reference: reference.len(),
        n_current: current.len(),
        rows_reference: reference_all.len(),
        rows_current: current_all.len(),
        columns: a.columns.clone(),
        categorical: a.categorical.clone(),
        bandwidth: t.bandwidth,
        bandwidth_rule: if t.bandwidth_given { "given" } else { "median pairwise distance of the pooled sample" },
        confidence: a.confidence.level(),
        seed: a.seed,
        mmd2_unbiased: t.mmd.unbiased,
        mmd2_biased: t.mmd.biased,
        tests: Tests {
            permutation,
            spectral: SpectralOut {
                p_value: sp.p_value,
                shifted: sp.p_value <= delta,
                eigenvalues: sp.eigenvalues,
                statistic: sp.statistic,
                null_draws: sp.draws,
                level: "asymptotic",
            },
        },
        univariate,
    };
    super::print_report(&report, a.json, write_table)
}

fn write_table(out: &mut impl Write, r: &Report) -> std::io::Result<()> {
    let sub = |n: usize, rows: usize| {
        if n < rows {
            format!("{n} of {rows} rows, seeded subsample")
        } else {
            format!("{n} rows")
        }
    };
    writeln!(out, "reference: {}", sub(r.n_reference, r.rows_reference))?;
    writeln!(out, "current:   {}", sub(r.n_current, r.rows_current))?;
    writeln!(out, "bandwidth: {:.6} ({})", r.bandwidth, r.bandwidth_rule)?;
    writeln!(out, "MMD²: unbiased {:.6e}, biased {:.6e}", r.mmd2_unbiased, r.mmd2_biased)?;
    let verdict = |s: bool| if s { "SHIFTED" } else { "no shift shown" };
    let level = 1.0 - r.confidence;
    if let Some(p) = &r.tests.permutation {
        writeln!(
            out,
            "permutation test: p = {:.4} ({} at level {level:.3}; exact level)",
            p.p_value,
            verdict(p.shifted)
        )?;
    }
    let s = &r.tests.spectral;
    writeln!(
        out,
        "spectral test:    p = {:.4} ({} at level {level:.3}; asymptotic level, {} eigenvalues, {} null draws)",
        s.p_value,
        verdict(s.shifted),
        s.eigenvalues,
        s.null_draws
    )?;
    for u in &r.univariate {
        writeln!(
            out,
            "KS {}: D = {:.4}, p = {:.4}{}",
            u.column,
            u.ks_statistic,
            u.ks_p_value,
            if u.ks_exact { "" } else { " (asymptotic)" }
        )?;
    }
    writeln!(
        out,
        "A shift of the inputs is not a rise of the risk: it can be harmless, and a harmful change can leave the inputs alone. Each p-value is for this one look."
    )
}

//! `riskbound fleet`: the fleet view. Once (`--once`, a table or one JSON document, exit 2 when
//! Prometheus cannot be read) or served (`--listen`: a round every `--interval`, the
//! `riskbound_fleet_*` series on /metrics, the last good values kept and marked stale while
//! Prometheus fails).

use std::collections::BTreeSet;
use std::io::Write;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, RwLock};
use std::time::{Duration, SystemTime, UNIX_EPOCH};

use anyhow::Context;

use super::cli::FleetArgs;
use super::error::CliError;
use crate::config::Config;
use crate::export::server::{self, ListenerStats, Shared};
use crate::fleet::{pool, BasicAuth, Client, FleetReport, FleetState, PromError};

fn now() -> f64 {
    SystemTime::now().duration_since(UNIX_EPOCH).map_or(0.0, |d| d.as_secs_f64())
}

/// One round: read at one instant, pool.
async fn round(
    client: &Client,
    config: &Config,
    a: &FleetArgs,
    latched: &BTreeSet<String>,
) -> Result<FleetReport, PromError> {
    // Whole milliseconds: the instant is written into the query string as it is used here.
    let time = (now() * 1000.0).floor() / 1000.0;
    let seen = crate::fleet::observe(client, a.job.as_deref(), time).await?;
    Ok(pool::pool(config, &seen, a.max_age.as_secs_f64(), latched))
}

pub fn main(a: &FleetArgs) -> anyhow::Result<()> {
    let config = crate::config::load_elsewhere(&a.config)?;
    if !a.once && a.listen.is_none() {
        return Err(CliError::Usage(
            "give --listen ADDR to serve the fleet series, or --once to print one report".into(),
        )
        .into());
    }
    let auth = match (&a.prometheus_user, &a.prometheus_password_file) {
        (Some(user), Some(file)) => Some(BasicAuth::from_file(user.clone(), file)?),
        _ => None,
    };
    let client = Client::new(&a.prometheus, auth, a.prometheus_ca_file.as_deref(), a.timeout)?;
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(1)
        .enable_all()
        .build()
        .context("starting the async runtime")?;
    if a.once {
        let report = runtime.block_on(round(&client, &config, a, &BTreeSet::new()))?;
        return super::print_report(&report, a.json, write_table);
    }
    let web = match &a.web_config {
        Some(w) => crate::config::web::load(w)?,
        None => config.web.clone(),
    };
    serve(a, &config, client, &web, runtime)
}

fn serve(
    a: &FleetArgs,
    config: &Config,
    client: Client,
    web: &crate::config::web::WebConfig,
    runtime: tokio::runtime::Runtime,
) -> anyhow::Result<()> {
    super::run::init_logs(a.log_format);
    let addr = a.listen.expect("checked by main");
    let listener = runtime
        .block_on(tokio::net::TcpListener::bind(addr))
        .map_err(|source| crate::app::BindError { addr, source })?;
    let local = listener.local_addr()?;
    let state: crate::export::fleet::SharedFleet = Arc::new(RwLock::new(FleetState::default()));
    let shared = Arc::new(Shared {
        registry: crate::export::fleet::registry(state.clone()),
        snapshot: None,
        ready: AtomicBool::new(false),
    });
    let stop = Arc::new(tokio::sync::Notify::new());
    let server = server::spawn(
        &runtime,
        listener,
        shared.clone(),
        web,
        config.http,
        Arc::new(ListenerStats::default()),
        stop.clone(),
    );
    tracing::info!(
        addr = %local,
        prometheus = %a.prometheus,
        interval = ?a.interval,
        "fleet view serving /metrics, /healthz, /readyz; pooled bounds assume every replica's samples are i.i.d. draws \
         of the same risk; the fleet alarm averages the replicas' e-values and is an anytime alarm when their label \
         streams are independent"
    );
    let which = runtime.block_on(async {
        let mut term = tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate())?;
        let mut tick = tokio::time::interval(a.interval);
        tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
        loop {
            tokio::select! {
                _ = term.recv() => return Ok::<_, std::io::Error>("SIGTERM"),
                r = tokio::signal::ctrl_c() => return r.map(|_| "SIGINT"),
                _ = tick.tick() => {}
            }
            let latched = state.read().unwrap_or_else(|p| p.into_inner()).latched.clone();
            let outcome = round(&client, config, a, &latched).await;
            match &outcome {
                Ok(r) => tracing::debug!(windows = r.models.len(), replicas = r.replicas_seen, "round"),
                Err(e) => tracing::warn!(error = %e, "round failed: the last good values stay, marked stale"),
            }
            let ok = outcome.is_ok();
            state.write().unwrap_or_else(|p| p.into_inner()).record(outcome, now());
            // Ready once a round has read Prometheus, and from then on (stale values are marked
            // in riskbound_fleet_stale rather than by taking the endpoint away).
            if ok {
                shared.ready.store(true, Ordering::SeqCst);
            }
        }
    })?;
    tracing::info!(signal = which, "stopping");
    stop.notify_waiters();
    stop.notify_one();
    let _ = runtime.block_on(async { tokio::time::timeout(Duration::from_secs(5), server).await });
    Ok(())
}

fn pair(b: &std::collections::BTreeMap<&'static str, pool::Pair>, method: &str) -> String {
    b.get(method).map_or("-".to_string(), |p| format!("[{:.4}, {:.4}]", p.lower, p.upper))
}

/// The report for people: one line per window, then the alarms and who sat out.
fn write_table(out: &mut impl Write, r: &FleetReport) -> std::io::Result<()> {
    writeln!(
        out,
        "{:<16} {:<12} {:>8} {:>10} {:>10}  {:<20} {:<20} {:<20} sla",
        "model", "window", "replicas", "n", "loss", "clopper-pearson", "empirical-bernstein", "delay-robust"
    )?;
    for w in &r.models {
        let robust = w.delay_robust.as_ref().map_or("-".to_string(), |c| {
            let m = w.decided_by.unwrap_or(if c.bounds.contains_key("clopper-pearson") {
                "clopper-pearson"
            } else {
                "empirical-bernstein"
            });
            pair(&c.bounds, m)
        });
        writeln!(
            out,
            "{:<16} {:<12} {:>8} {:>10} {:>10.4}  {:<20} {:<20} {:<20} {}",
            w.model,
            w.window,
            w.replicas,
            w.n,
            w.total_loss,
            pair(&w.bounds, "clopper-pearson"),
            pair(&w.bounds, "empirical-bernstein"),
            robust,
            w.sla_state.map_or("-".to_string(), |s| format!("{s} ({})", w.sla_reason.unwrap_or(""))),
        )?;
    }
    for a in &r.alarms {
        writeln!(
            out,
            "alarm {} {}: {} replicas, ln mean e-value {:.3} of {:.3}{}",
            a.model,
            a.test,
            a.replicas,
            a.log_evidence,
            a.log_threshold,
            if a.firing { ", FIRING" } else { "" }
        )?;
    }
    for l in &r.left_out {
        let scope = if l.model.is_empty() { String::new() } else { format!(" from {} {}", l.model, l.window) };
        writeln!(out, "left out{scope}: {} {} ({})", l.job, l.instance, l.reason.as_str())?;
    }
    Ok(())
}

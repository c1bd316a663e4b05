//! `riskbound reset MODEL`: restart a model's anytime sequences and alarms (safe while the
//! daemon runs: the daemon notices the reset in the state database).

use anyhow::Context;

use super::cli::ResetArgs;
use super::error::CliError;

pub fn main(a: &ResetArgs) -> anyhow::Result<()> {
    let config = crate::config::load(&a.config)?;
    let model = a.model.as_str();
    if !config.models.iter().any(|m| m.name == model) {
        let names: Vec<_> = config.models.iter().map(|m| m.name.as_str()).collect();
        return Err(CliError::Usage(format!(
            "no model {model:?} in {} (models: {})",
            config.file.display(),
            names.join(", ")
        ))
        .into());
    }
    let mut store = crate::window::Store::open(&config.state_dir)
        .with_context(|| format!("opening the state in {}", config.state_dir.display()))?;
    let now = std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).map_or(0, |d| d.as_millis() as i64);
    store.reset(model, now).context("writing the reset")?;
    println!("{model}: anytime sequences and alarms restart from the next prediction whose label_wait is over");
    Ok(())
}

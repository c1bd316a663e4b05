//! `riskbound check-config FILE [--web-config W]`: validate both as the daemon would, print the
//! resolved settings (exit 0) or every problem located (exit 2).

use super::cli::CheckConfigArgs;

pub fn main(a: &CheckConfigArgs) -> anyhow::Result<()> {
    let config = crate::config::load_with_web(&a.file, a.web_config.as_deref())?;
    print!("{}", config.describe());
    Ok(())
}

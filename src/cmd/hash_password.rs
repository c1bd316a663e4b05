//! `riskbound hash-password`: a bcrypt hash for `basic_auth_users`, from a password on stdin.

use anyhow::Context;

use super::cli::HashPasswordArgs;
use super::error::CliError;

pub fn main(a: &HashPasswordArgs) -> anyhow::Result<()> {
    let mut line = String::new();
    std::io::stdin().read_line(&mut line).context("reading the password")?;
    let password = line.trim_end_matches(['\n', '\r']);
    if password.is_empty() {
        return Err(CliError::Usage("no password on standard input".into()).into());
    }
    println!("{}", bcrypt::hash(password, a.cost).context("hashing")?);
    Ok(())
}

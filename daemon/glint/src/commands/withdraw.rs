//! `glint withdraw ID --reason TEXT`: an operator retracts an alert. The request goes to the daemon's
//! subscriber port with the operator token; the daemon journals a withdrawal alert through the same desk path
//! as every other alert and sends it to all subscribers. Withdrawing a flash withdraws its assessment too;
//! withdrawing an assessment leaves its flash standing (each withdrawal's reason says which). The command
//! prints one line per withdrawal: what it withdrew, its id and its reason.

use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::bail;
use glint_wire::pb::{self, subscriber_request};

use crate::client::operator_command;

/// Arguments of `glint withdraw`.
#[derive(Debug, clap::Args)]
pub(crate) struct WithdrawArgs {
    /// Id of the alert to withdraw, e.g. GL-ventisca-array-20261201T233112.123-42.
    id: String,
    /// Why, in words; copied into the withdrawal alert.
    #[arg(long)]
    reason: String,
    /// The daemon's subscriber address.
    #[arg(long, value_name = "HOST:PORT")]
    from: String,
    /// File holding the operator token.
    #[arg(long, value_name = "FILE")]
    token_file: PathBuf,
    /// Operator's name or initials, for the daemon's log (default: $USER).
    #[arg(long)]
    operator: Option<String>,
    /// Connect with TLS, trusting the CA certificates in this PEM file.
    #[arg(long, value_name = "FILE")]
    tls_ca: Option<PathBuf>,
}

/// `glint withdraw`.
pub(crate) fn run(args: WithdrawArgs) -> anyhow::Result<ExitCode> {
    if args.reason.trim().is_empty() {
        bail!("--reason must say why the alert is withdrawn");
    }
    let (alert_id, reason) = (args.id.clone(), args.reason.clone());
    let alerts = operator_command(
        &args.from,
        &args.token_file,
        args.tls_ca.as_deref(),
        args.operator.clone(),
        |token, operator| {
            subscriber_request::Body::Withdraw(pb::WithdrawRequest {
                token,
                alert_id,
                reason,
                operator,
            })
        },
    )?;
    if alerts.is_empty() {
        bail!("{} answered without a withdrawal", args.from);
    }
    for a in &alerts {
        println!(
            "withdrew {} with {} (seq {}): {}",
            a.withdrawn_id, a.id, a.seq, a.reason
        );
    }
    Ok(ExitCode::SUCCESS)
}

//! `glint test-alert`: an operator asks a running daemon for a TEST alert. The request goes to the
//! subscriber port with the operator token; the daemon issues the alert through the alert desk, so it is
//! journalled and reaches every sink (subscribers, email) like a real one, but says TEST and carries no
//! science. The command prints the alert's id.

use std::path::PathBuf;
use std::process::ExitCode;

use glint_wire::pb::{self, subscriber_request};

use anyhow::bail;

use crate::client::operator_command;

/// Arguments of `glint test-alert`.
#[derive(Debug, clap::Args)]
pub(crate) struct TestAlertArgs {
    /// The daemon's subscriber address.
    #[arg(long, value_name = "HOST:PORT")]
    from: String,
    /// File holding the operator token.
    #[arg(long, value_name = "FILE")]
    token_file: PathBuf,
    /// Operator's name or initials, for the daemon's log and the alert (default: $USER).
    #[arg(long)]
    operator: Option<String>,
    /// A note copied into the alert, e.g. "monthly check of the email path".
    #[arg(long, default_value = "")]
    note: String,
    /// Connect with TLS, trusting the CA certificates in this PEM file.
    #[arg(long, value_name = "FILE")]
    tls_ca: Option<PathBuf>,
}

/// `glint test-alert`.
pub(crate) fn run(args: TestAlertArgs) -> anyhow::Result<ExitCode> {
    let note = args.note.clone();
    let alerts = operator_command(
        &args.from,
        &args.token_file,
        args.tls_ca.as_deref(),
        args.operator.clone(),
        |token, operator| {
            subscriber_request::Body::TestAlert(pb::TestAlertRequest {
                token,
                operator,
                note,
            })
        },
    )?;
    let Some(alert) = alerts.first() else {
        bail!("{} answered without an alert", args.from);
    };
    println!("issued test alert {} (seq {})", alert.id, alert.seq);
    Ok(ExitCode::SUCCESS)
}

//! `glint feed`: plays a recording into a running daemon as a producer would (see [`crate::client::feed`]).

use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::{Context, bail};
use glint_wire::recording::RecordingReader;

use crate::client::feed::{FeedTarget, Speed, feed, print_report};
use crate::client::read_token;
use crate::tls::ClientTls;

/// Arguments of `glint feed`.
#[derive(Debug, clap::Args)]
pub(crate) struct FeedArgs {
    /// The recording to play (.glrec or .glrec.zst).
    file: PathBuf,
    /// The daemon's ingest address.
    #[arg(long, value_name = "HOST:PORT")]
    to: String,
    /// File holding the instrument's producer token.
    #[arg(long, value_name = "FILE")]
    token_file: PathBuf,
    /// Playback speed: a multiple of real time, or "max".
    #[arg(long, default_value = "1")]
    speed: Speed,
    /// Instrument id to announce (default: the one in the recording's Hello).
    #[arg(long)]
    instrument: Option<String>,
    /// Connect with TLS, trusting the CA certificates in this PEM file.
    #[arg(long, value_name = "FILE")]
    tls_ca: Option<PathBuf>,
    /// Producer name sent in the Hello.
    #[arg(long, default_value = "glint-feed")]
    producer: String,
    /// Send every frame, even those the daemon says it already took (its Welcome.last_seq); by default the
    /// feed resumes after them.
    #[arg(long)]
    from_start: bool,
}

/// `glint feed`.
pub(crate) fn run(args: FeedArgs) -> anyhow::Result<ExitCode> {
    let token = read_token(&args.token_file)?;
    let tls = args.tls_ca.as_deref().map(ClientTls::from_ca_file).transpose()?;
    let max_frame = 64 << 20;
    let mut reader = RecordingReader::open(&args.file, max_frame)?;
    let source = std::iter::from_fn(move || reader.read_frame().map_err(anyhow::Error::from).transpose());
    let target = FeedTarget {
        addr: args.to.clone(),
        token,
        instrument: args.instrument.clone(),
        producer: args.producer.clone(),
        tls,
        max_frame,
        resume: !args.from_start,
    };
    let rt = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .context("cannot start the runtime")?;
    let report = rt.block_on(feed(source, &target, args.speed))?;
    print_report(&args.file.display().to_string(), &report);
    if report.acked_seq == 0 && report.frames > 0 {
        bail!("the daemon acknowledged none of the {} frames", report.frames);
    }
    Ok(ExitCode::SUCCESS)
}

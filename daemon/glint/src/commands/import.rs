//! `glint import`: writes a FITS event list as a glint recording (the frames `replay` would make of it in
//! memory), named by the UTC time of its first photon when given a directory.

use std::path::{Path, PathBuf};
use std::process::ExitCode;

use anyhow::Context;
use glint_wire::pb::producer_frame::Body;
use glint_wire::recording::RecordingWriter;

use crate::config::config_or_exit;
use crate::fits::InputFrames;

/// Arguments of `glint import`.
#[derive(Debug, clap::Args)]
pub(crate) struct ImportArgs {
    /// FITS event list (an EVENTS table with TIME, RA, DEC, ENERGY).
    file: PathBuf,
    /// Recording to write (`.glrec` or `.glrec.zst`), or a directory: there the file is named by the
    /// instrument and the UTC time of its first photon.
    #[arg(short, long, default_value = ".")]
    out: PathBuf,
    /// Instrument the photons belong to; else the file's INSTRUME, else the configuration's only one.
    #[arg(long)]
    instrument: Option<String>,
    /// Configuration file (for the instrument's site); the embedded default when omitted.
    #[arg(long)]
    config: Option<PathBuf>,
}

/// Runs `glint import`.
pub(crate) fn run(args: &ImportArgs) -> anyhow::Result<ExitCode> {
    let cfg = config_or_exit(args.config.as_ref())?;
    let frames: Vec<_> = InputFrames::open(
        &args.file,
        &cfg,
        args.instrument.as_deref(),
        cfg.daemon.max_frame_bytes,
    )?
    .collect::<Result<_, _>>()?;
    let mut instrument = String::new();
    let mut first = None;
    let mut photons = 0usize;
    for f in &frames {
        match &f.body {
            Some(Body::Hello(h)) => instrument.clone_from(&h.instrument),
            Some(Body::Batch(b)) => {
                first = first.or(b.time_gps_ns.first().copied());
                photons += b.time_gps_ns.len();
            }
            _ => {}
        }
    }
    let first = first.with_context(|| format!("{}: the EVENTS table has no rows", args.file.display()))?;
    let path = if args.out.is_dir() {
        args.out
            .join(crate::timefmt::recording_name(&instrument, first, ".glrec.zst"))
    } else {
        args.out.clone()
    };
    write(&path, &frames)?;
    eprintln!(
        "{}: {photons} photons of {instrument} from {} written to {}",
        args.file.display(),
        crate::timefmt::gps_ns_to_utc(first),
        path.display()
    );
    Ok(ExitCode::SUCCESS)
}

fn write(path: &Path, frames: &[glint_wire::pb::ProducerFrame]) -> anyhow::Result<()> {
    let mut w = RecordingWriter::create(path).with_context(|| format!("creating {}", path.display()))?;
    for f in frames {
        w.write_frame(f)
            .with_context(|| format!("writing {}", path.display()))?;
    }
    w.finish()
        .with_context(|| format!("finishing {}", path.display()))?;
    Ok(())
}

//! `glint journal verify|list|show|export --state-dir DIR`: the alert journal read offline, without a
//! daemon and without changing a byte of it (no cut, no quarantine, no high-water update). `verify` checks
//! every CRC, the order, gaps, missing segments and the high-water file and exits 1 when anything is damaged;
//! the others print the intact alerts.

use std::path::{Path, PathBuf};
use std::process::ExitCode;

use anyhow::{Context, bail};
use glint_wire::pb;

use crate::alerts;
use crate::desk::journal::{self, OpenReport, Record};

/// Arguments of `glint journal`.
#[derive(Debug, clap::Args)]
pub(crate) struct JournalArgs {
    #[command(subcommand)]
    what: What,
}

#[derive(Debug, clap::Subcommand)]
enum What {
    /// Check every record and report damage, gaps and missing segments (exit 1 when damaged).
    Verify(Where),
    /// One line per alert: seq, id, kind, instrument, issued (UTC), sigma.
    List(Where),
    /// One alert, readable, by id or sequence number.
    Show {
        /// An alert id (GL-...) or a sequence number.
        alert: String,
        #[command(flatten)]
        at: Where,
    },
    /// Every alert as a JSON line.
    Export(Where),
}

#[derive(Debug, clap::Args)]
struct Where {
    /// The daemon's state directory (`daemon.state_dir`); its `journal/` is read.
    #[arg(long, value_name = "DIR")]
    state_dir: PathBuf,
}

impl Where {
    /// The journal directory: `DIR/journal`, or DIR itself when it holds the segments.
    fn journal_dir(&self) -> PathBuf {
        let j = self.state_dir.join("journal");
        if j.is_dir() { j } else { self.state_dir.clone() }
    }
}

/// Reads every intact alert, oldest first, with the report of what was found.
fn read_all(dir: &Path) -> anyhow::Result<(Vec<pb::Alert>, OpenReport)> {
    let mut out = Vec::new();
    let report = journal::verify(dir, &mut |r: &Record| out.push(r.alert.clone()))
        .with_context(|| format!("cannot read the journal in {}", dir.display()))?;
    if !report.is_clean() {
        eprintln!(
            "warning: the journal in {} is damaged; `glint journal verify` says how",
            dir.display()
        );
    }
    Ok((out, report))
}

/// `glint journal`.
pub(crate) fn run(a: &JournalArgs) -> anyhow::Result<ExitCode> {
    match &a.what {
        What::Verify(w) => verify(&w.journal_dir()),
        What::List(w) => {
            let (alerts, _) = read_all(&w.journal_dir())?;
            for a in &alerts {
                let sigma = a
                    .trigger
                    .as_ref()
                    .map_or_else(|| "-".to_string(), |t| format!("{:.2}", t.sigma));
                println!(
                    "{}\t{}\t{}\t{}\t{}\t{}",
                    a.seq,
                    a.id,
                    alerts::kind_name(a.kind),
                    a.instrument,
                    a.issued_utc,
                    sigma
                );
            }
            Ok(ExitCode::SUCCESS)
        }
        What::Show { alert, at } => {
            let (alerts, _) = read_all(&at.journal_dir())?;
            let seq = alert.parse::<u64>().ok();
            let found = alerts.iter().find(|a| Some(a.seq) == seq || a.id == *alert);
            match found {
                Some(a) => {
                    println!("{}", alerts::alert_summary(a));
                    Ok(ExitCode::SUCCESS)
                }
                None => bail!(
                    "no alert '{alert}' in the journal (it may be damaged, or older than the retention)"
                ),
            }
        }
        What::Export(w) => {
            let (alerts, _) = read_all(&w.journal_dir())?;
            for a in &alerts {
                println!("{}", alerts::alert_json(a));
            }
            Ok(ExitCode::SUCCESS)
        }
    }
}

fn verify(dir: &Path) -> anyhow::Result<ExitCode> {
    let report = journal::verify(dir, &mut |_| {})
        .with_context(|| format!("cannot read the journal in {}", dir.display()))?;
    println!(
        "journal {}: {} segment(s), {} intact record(s), seq {}-{}, next number {}",
        dir.display(),
        report.segments,
        report.records,
        report.first_seq,
        report.last_seq,
        report.next_seq
    );
    for d in &report.damaged {
        println!(
            "CORRUPT {} offset {}, {} byte(s): {} ({} affected){}",
            d.path.display(),
            d.offset,
            d.bytes,
            d.reason,
            d.seqs(),
            if d.before_seq.is_some() {
                "; the records after it are intact"
            } else {
                ""
            }
        );
    }
    if let Some(t) = &report.torn {
        println!(
            "TORN TAIL {} offset {}, {} byte(s): {} (cut, with a copy kept, at the next start)",
            t.path.display(),
            t.offset,
            t.bytes_cut,
            t.reason
        );
    }
    for g in &report.gaps {
        if g.lost {
            println!("LOST seq {}-{}: {}", g.from, g.to, g.reason);
        } else {
            println!("skipped seq {}-{} (not alerts): {}", g.from, g.to, g.reason);
        }
    }
    if let Some(p) = &report.high_water_problem {
        println!("HIGH-WATER {p}");
    }
    for (q, len) in journal::quarantined_files(dir) {
        println!("quarantined {} ({len} bytes)", q.display());
    }
    if report.is_clean() {
        println!("clean");
        Ok(ExitCode::SUCCESS)
    } else {
        println!(
            "DAMAGED: {} corrupt stretch(es), {} alert(s) lost{}",
            report.damaged.len(),
            report.lost_seqs(),
            if report.torn.is_some() {
                ", a torn tail"
            } else {
                ""
            }
        );
        // The same code as any other failure while running (`cli::EXIT_ERROR`).
        Ok(ExitCode::from(1))
    }
}

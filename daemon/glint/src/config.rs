//! The daemon's configuration: one TOML file (or the embedded default) with `GLINT_SECTION__KEY` environment
//! overrides, read raw through the `config` crate and then compiled into checked structs. Compilation never
//! stops at the first fault: every wrong type, bad value, unknown key and missing token file is reported at
//! once, each naming the file and the dotted key.

use std::collections::BTreeMap;
use std::fmt;
use std::net::SocketAddr;
use std::num::NonZeroUsize;
use std::path::{Path, PathBuf};
use std::time::Duration;

use glint_science::calibration::TrialsCalibration;
use glint_science::instrument::{InstrumentResponse, InstrumentSpec};
use serde::de::DeserializeOwned;
use subtle::ConstantTimeEq;
use toml::{Table, Value};

use crate::net::GateLimits;

/// The configuration used when no file is given: loopback addresses, a state directory under the system's
/// temporary directory, and the invented demo instrument.
pub(crate) const EMBEDDED_DEFAULT: &str = include_str!("../../../deploy/glint-default.toml");

/// Instrument blocks that ship with glint, addressable as `spec_file = "builtin:NAME"` so the embedded
/// default needs no file on disk.
const BUILTIN_INSTRUMENTS: &[(&str, &str)] = &[
    (
        "ventisca-array",
        include_str!("../../../deploy/instruments/ventisca-array.toml"),
    ),
    (
        "lumen-drift",
        include_str!("../../../deploy/instruments/lumen-drift.toml"),
    ),
    (
        "helado-array",
        include_str!("../../../deploy/instruments/helado-array.toml"),
    ),
];

/// Looks up an instrument block shipped with glint by name.
pub(crate) fn builtin_instrument(name: &str) -> Option<&'static str> {
    BUILTIN_INSTRUMENTS
        .iter()
        .find(|(n, _)| *n == name)
        .map(|(_, text)| *text)
}

/// One problem in a configuration, naming the key.
#[derive(Debug, Clone, PartialEq, Eq)]
pub(crate) struct Problem {
    /// Dotted key, e.g. `instrument[0].search.far_per_year`.
    pub(crate) key: String,
    /// What is wrong.
    pub(crate) message: String,
}

/// Every problem found in a configuration source.
#[derive(Debug, thiserror::Error)]
pub(crate) struct ConfigError {
    /// The file (or `<embedded default>`).
    pub(crate) source_name: String,
    /// All problems, in the order found.
    pub(crate) problems: Vec<Problem>,
}

impl fmt::Display for ConfigError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{} problem(s) in {}", self.problems.len(), self.source_name)?;
        for p in &self.problems {
            write!(f, "\n  {}: {}: {}", self.source_name, p.key, p.message)?;
        }
        Ok(())
    }
}

/// A secret read from the config or a file; never printed.
#[derive(Clone, PartialEq, Eq)]
pub(crate) struct Secret(String);

impl Secret {
    /// The secret's bytes, for constant-time comparison.
    pub(crate) fn expose(&self) -> &str {
        &self.0
    }
    /// Wraps a value (tests).
    #[cfg(test)]
    pub(crate) fn new(s: impl Into<String>) -> Self {
        Self(s.into())
    }
}

impl fmt::Debug for Secret {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("Secret(***)")
    }
}

/// How log lines are written.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum LogFormat {
    /// Human-readable lines (the default on a terminal).
    Text,
    /// One JSON object per line, for log collectors.
    Json,
}

/// `[daemon]`: process-wide settings.
#[derive(Debug, Clone)]
pub(crate) struct DaemonConfig {
    /// Holds the journal, acceptance maps, sink cursors and recordings.
    pub(crate) state_dir: PathBuf,
    /// Default tracing filter (RUST_LOG overrides).
    pub(crate) log_level: String,
    /// Text or JSON lines.
    pub(crate) log_format: LogFormat,
    /// Largest frame accepted on any socket, bytes.
    pub(crate) max_frame_bytes: usize,
    /// How long a graceful shutdown may take before the daemon exits anyway.
    pub(crate) shutdown_deadline: Duration,
    /// How often the engines' acceptance maps are saved.
    pub(crate) state_save_interval: Duration,
    /// Below this many free bytes on the state directory's file system the daemon warns.
    pub(crate) disk_warn_free_bytes: u64,
    /// Below this many free bytes it refuses new alerts and stops (and `glint run` refuses to start), before
    /// the journal could fail to write.
    pub(crate) disk_min_free_bytes: u64,
}

/// TLS material for a listener.
#[derive(Debug, Clone)]
pub(crate) struct TlsConfig {
    /// PEM certificate chain.
    pub(crate) cert: PathBuf,
    /// PEM private key.
    pub(crate) key: PathBuf,
}

/// `[ingest]`: the producer listener.
#[derive(Debug, Clone)]
pub(crate) struct IngestConfig {
    /// Address to listen on.
    pub(crate) listen: SocketAddr,
    /// TLS, when both paths are set.
    pub(crate) tls: Option<TlsConfig>,
    /// Capacity of each instrument's engine queue, in batches; when full the socket is read more slowly.
    pub(crate) queue_batches: NonZeroUsize,
    /// An `Ack` is sent after this many frames (and whenever the producer goes quiet).
    pub(crate) ack_every: NonZeroUsize,
    /// Record every ingested stream to rotating `.glrec.zst` files under `state_dir/recordings`.
    pub(crate) record: bool,
    /// Rotate a recording after this many bytes.
    pub(crate) record_rotate_bytes: u64,
    /// Rotate a recording after this much event time.
    pub(crate) record_rotate: Duration,
    /// Plain TCP on a non-loopback address was allowed explicitly (warned about at start).
    pub(crate) allow_plain_remote: bool,
    /// Bounds on connections that have not sent an accepted Hello yet.
    pub(crate) gate: GateLimits,
    /// TCP keepalive idle time: a producer whose host died is cut after about twice this.
    pub(crate) keepalive: Duration,
    /// A frame a producer has begun must be complete within this, or the connection is closed and the
    /// instrument released.
    pub(crate) frame_timeout: Duration,
    /// A frame whose times lie further than this ahead of the host clock (GPS) is refused.
    pub(crate) max_future: Duration,
    /// An instrument with no frame for this long (host clock) is silent: a warning, a metric, and a 503 from
    /// `/healthz` until its next frame.
    pub(crate) silent_after: Duration,
}

/// `[subscribers]`: the alert listener.
#[derive(Debug, Clone)]
pub(crate) struct SubscribersConfig {
    /// Address to listen on.
    pub(crate) listen: SocketAddr,
    /// TLS, when both paths are set.
    pub(crate) tls: Option<TlsConfig>,
    /// Tokens that may subscribe.
    pub(crate) tokens: Vec<Secret>,
    /// Token that may also withdraw alerts.
    pub(crate) operator_token: Option<Secret>,
    /// Heartbeat period while no alert flows.
    pub(crate) heartbeat: Duration,
    /// A subscriber whose socket stays unwritable this long is dropped.
    pub(crate) unwritable_timeout: Duration,
    /// Most authenticated subscribers connected at once.
    pub(crate) max_connections: NonZeroUsize,
    /// Plain TCP on a non-loopback address was allowed explicitly (warned about at start).
    pub(crate) allow_plain_remote: bool,
    /// Bounds on connections that have not sent an accepted request yet.
    pub(crate) gate: GateLimits,
    /// TCP keepalive idle time.
    pub(crate) keepalive: Duration,
}

/// How the email sink talks to its relay.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum EmailTls {
    /// Plain SMTP, then STARTTLS before anything else (refused if the relay does not offer it).
    StartTls,
    /// TLS from the first byte (SMTPS, usually port 465).
    Implicit,
    /// No TLS at all: a relay on this host or a trusted network only.
    None,
}

/// Quiet hours of a recipient, UTC minutes of the day; `start > end` wraps past midnight.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) struct QuietHours {
    /// First minute of the day (0..1440) that is quiet.
    pub(crate) start_min: u32,
    /// First minute that is no longer quiet.
    pub(crate) end_min: u32,
    /// Alerts at least this significant are sent even in quiet hours.
    pub(crate) min_sigma: f64,
}

impl QuietHours {
    /// Whether `minute` of the UTC day falls in the quiet hours.
    pub(crate) fn contains(&self, minute: u32) -> bool {
        if self.start_min <= self.end_min {
            (self.start_min..self.end_min).contains(&minute)
        } else {
            minute >= self.start_min || minute < self.end_min
        }
    }
}

/// `[[email.recipient]]`: one person or list that gets alerts by email.
#[derive(Debug, Clone)]
pub(crate) struct EmailRecipient {
    /// The address, as written (checked to parse).
    pub(crate) address: lettre::message::Mailbox,
    /// Kinds wanted (never heartbeats).
    pub(crate) kinds: Vec<glint_wire::pb::AlertKind>,
    /// Significance cut (withdrawals and tests always pass).
    pub(crate) min_sigma: f64,
    /// At most this many messages per `window`; past it, alerts are gathered into one digest.
    pub(crate) max_per_window: usize,
    /// The rate-limit window.
    pub(crate) window: Duration,
    /// Quiet hours, if any.
    pub(crate) quiet: Option<QuietHours>,
}

/// `[email]`: alerts by email through an SMTP relay.
#[derive(Debug, Clone)]
pub(crate) struct EmailConfig {
    /// Relay host name (also the name its TLS certificate must carry).
    pub(crate) relay_host: String,
    /// Relay port.
    pub(crate) relay_port: u16,
    /// Sender.
    pub(crate) from: lettre::message::Mailbox,
    /// TLS mode.
    pub(crate) tls: EmailTls,
    /// Extra CA certificates (PEM) trusted for the relay besides the built-in roots.
    pub(crate) tls_ca_file: Option<PathBuf>,
    /// AUTH user and password, when the relay needs them.
    pub(crate) auth: Option<(String, Secret)>,
    /// Time allowed for one SMTP exchange.
    pub(crate) timeout: Duration,
    /// Longest wait between two attempts at a transient failure.
    pub(crate) retry_max: Duration,
    /// The recipients.
    pub(crate) recipients: Vec<EmailRecipient>,
}

/// `[journal]`: the append-only alert journal.
#[derive(Debug, Clone)]
pub(crate) struct JournalConfig {
    /// Start a new segment after this many bytes.
    pub(crate) segment_bytes: u64,
    /// Segments older than this (by their newest record) are deleted.
    pub(crate) retention: Duration,
}

/// `[instrument.search]`: the trigger settings of one instrument.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct SearchConfig {
    /// Timescales of the ladder, seconds, increasing.
    pub(crate) ladder_s: Vec<f64>,
    /// Radius of the disc each photon seeds, degrees.
    pub(crate) search_radius_deg: f64,
    /// Target false-alarm rate of the whole search, per year.
    pub(crate) far_per_year: f64,
    /// Trailing window of the all-sky rate, seconds.
    pub(crate) rate_window_s: f64,
    /// Time constant of the acceptance map, seconds.
    pub(crate) acceptance_tau_s: f64,
    /// No trigger before the acceptance map holds this many photons (unless a saved map was loaded).
    pub(crate) warmup_photons: u64,
    /// Seed the acceptance map with the instrument's cos-power shape, so triggers can start after warm-up
    /// of the rate only.
    pub(crate) acceptance_prior: bool,
    /// How far photons may arrive out of order, seconds.
    pub(crate) reorder_tolerance_s: f64,
    /// A frame this far ahead of the stream is refused as a clock jump, seconds.
    pub(crate) max_clock_jump_s: f64,
}

/// `[instrument.assess]`: the assessment settings of one instrument.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct AssessSettings {
    /// Shortest persistence window, seconds.
    pub(crate) persistence_min_s: f64,
    /// The persistence window is at least this many times the timescale of the candidate's best trigger.
    pub(crate) persistence_timescale_factor: f64,
    /// Window before the flash checked for earlier emission, seconds.
    pub(crate) pre_window_s: f64,
    /// `persistent` when the excess after the flash exceeds this many sigma.
    pub(crate) post_sigma_max: f64,
    /// `persistent` when the excess before the flash exceeds this many sigma.
    pub(crate) pre_sigma_max: f64,
    /// `instrumental` when the all-sky count in the flash window exceeds its expectation by this many sigma.
    pub(crate) all_sky_sigma_max: f64,
    /// `instrumental` when more than this fraction of the flash photons share one timestamp.
    pub(crate) identical_fraction_max: f64,
    /// No longer read by any rule (kept so configurations naming it still load).
    pub(crate) spread_ratio_max: f64,
    /// `instrumental` when the flash window's photons are spread wider than the PSF at this significance.
    pub(crate) spread_sigma_max: f64,
    /// `persistent` (decaying shape) when a decaying light curve beats the evaporation template by more than
    /// this in 2 Delta ln L ...
    pub(crate) shape_log_ratio_min: f64,
    /// ... and the template's goodness-of-fit p-value is below this.
    pub(crate) shape_p_max: f64,
    /// `undecided` when dead time covers more than this fraction of the persistence window.
    pub(crate) max_dead_fraction: f64,
}

/// One `[[instrument]]`.
#[derive(Debug, Clone)]
pub(crate) struct InstrumentConfig {
    /// Instrument id producers name in their `Hello`.
    pub(crate) id: String,
    /// Producer token.
    pub(crate) token: Secret,
    /// The instrument block (site, response, background).
    pub(crate) spec: InstrumentSpec,
    /// The response built from the spec.
    pub(crate) response: InstrumentResponse,
    /// Trigger settings.
    pub(crate) search: SearchConfig,
    /// Assessment settings.
    pub(crate) assess: AssessSettings,
    /// The effective-trials calibration from `<state_dir>/calibration/<id>.toml`, when that file exists.
    pub(crate) trials: Option<TrialsCalibration>,
}

/// `[bus]`: the NATS JetStream bus the bus sink publishes to and `glint coincide` reads from.
#[derive(Debug, Clone)]
pub(crate) struct BusConfig {
    /// Server URL(s), comma-separated, e.g. `nats://127.0.0.1:4222`.
    pub(crate) url: String,
    /// NATS credentials file (JWT and nkey seed), when the server wants one.
    pub(crate) credentials_file: Option<PathBuf>,
    /// Subjects are `<subject_prefix>.<instrument>.<kind>`.
    pub(crate) subject_prefix: String,
    /// The JetStream stream that must hold the subjects; a publish acknowledged by another stream is an error.
    pub(crate) stream: String,
    /// A stream definition (nats-server's JSON stream configuration) to create the stream from when it does
    /// not exist yet.
    pub(crate) stream_file: Option<PathBuf>,
    /// How long to wait for the server's acknowledgement of one publish before retrying.
    pub(crate) ack_timeout: Duration,
    /// Longest wait between two reconnection attempts (the wait doubles from 100 ms up to this).
    pub(crate) max_backoff: Duration,
}

/// One `[[site]]` of a coincide configuration.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct SiteConfig {
    /// The instrument id its alerts carry.
    pub(crate) instrument: String,
    /// Geodetic latitude and longitude (WGS84), degrees, and height above the ellipsoid, metres.
    pub(crate) latitude_deg: f64,
    pub(crate) longitude_deg: f64,
    pub(crate) height_m: f64,
    /// How far the site's clock may be off true time, seconds.
    pub(crate) clock_tolerance_s: f64,
    /// Radius of the field of view about the zenith (a ground array's largest zenith angle), degrees.
    pub(crate) fov_radius_deg: f64,
}

/// The configuration of `glint coincide`: the bus, its own consumer and state, and the sites.
#[derive(Debug, Clone)]
pub(crate) struct CoincideConfig {
    /// Where it came from.
    pub(crate) source_name: String,
    /// `[bus]` (required here).
    pub(crate) bus: BusConfig,
    /// Instrument name of joint alerts and the middle token of their subject.
    pub(crate) name: String,
    /// Durable consumer name on the stream.
    pub(crate) consumer: String,
    /// Holds the candidates kept for matching across restarts.
    pub(crate) state_dir: PathBuf,
    /// Candidates older than this (event time, behind the newest one seen) are forgotten, seconds.
    pub(crate) horizon_s: f64,
    /// Log filter.
    pub(crate) log_level: String,
    /// The sites, by instrument id.
    pub(crate) sites: Vec<SiteConfig>,
}

/// The whole checked configuration.
#[derive(Debug, Clone)]
pub(crate) struct Config {
    /// Where it came from (a path, or `<embedded default>`).
    pub(crate) source_name: String,
    /// `[daemon]`.
    pub(crate) daemon: DaemonConfig,
    /// `[ingest]`.
    pub(crate) ingest: IngestConfig,
    /// `[subscribers]`.
    pub(crate) subscribers: SubscribersConfig,
    /// `[journal]`.
    pub(crate) journal: JournalConfig,
    /// `[metrics]`: the Prometheus text endpoint, if any.
    pub(crate) metrics_listen: Option<SocketAddr>,
    /// `[bus]`: the message bus sink, when `url` is set.
    pub(crate) bus: Option<BusConfig>,
    /// `[email]`, if present.
    pub(crate) email: Option<EmailConfig>,
    /// `[[instrument]]`, in file order.
    pub(crate) instruments: Vec<InstrumentConfig>,
    /// `GLINT_*` environment variables that name no configuration key, so were not used.
    pub(crate) ignored_env: Vec<String>,
    /// What compiles and would run but must not be deployed: the shipped placeholder tokens, token files
    /// readable by group or others. `check-config` refuses them (with [`Config::state_dir_problem`]);
    /// `run` logs them as warnings.
    pub(crate) deployment: Vec<Problem>,
}

impl Config {
    /// Reads and compiles a configuration file, applying `GLINT_*` environment overrides.
    pub(crate) fn load(path: &Path) -> Result<Self, ConfigError> {
        let name = path.display().to_string();
        let text = std::fs::read_to_string(path).map_err(|e| ConfigError {
            source_name: name.clone(),
            problems: vec![Problem {
                key: "(file)".into(),
                message: format!("cannot read: {e}"),
            }],
        })?;
        let base = path.parent().map(Path::to_path_buf).unwrap_or_default();
        Self::from_toml(&text, &name, &base, true)
    }

    /// Compiles the embedded default configuration, applying `GLINT_*` environment overrides.
    pub(crate) fn embedded_default() -> Result<Self, ConfigError> {
        Self::from_toml(EMBEDDED_DEFAULT, "<embedded default>", Path::new("."), true)
    }

    /// Compiles configuration text; `base_dir` resolves relative paths (token and spec files).
    pub(crate) fn from_toml(
        text: &str,
        source_name: &str,
        base_dir: &Path,
        with_env: bool,
    ) -> Result<Self, ConfigError> {
        let fail = |key: &str, message: String| ConfigError {
            source_name: source_name.to_string(),
            problems: vec![Problem {
                key: key.into(),
                message,
            }],
        };
        let mut env: BTreeMap<String, String> = if with_env {
            std::env::vars()
                .filter(|(k, _)| k.to_ascii_uppercase().starts_with("GLINT_"))
                .collect()
        } else {
            BTreeMap::new()
        };
        // Instrument keys live in an array of tables, which the environment source cannot index: those
        // variables are applied to the parsed tree here instead.
        let instrument_env: BTreeMap<String, String> = env
            .iter()
            .filter(|(k, _)| k.to_ascii_uppercase().starts_with(INSTRUMENT_ENV_PREFIX))
            .map(|(k, v)| (k.clone(), v.clone()))
            .collect();
        env.retain(|k, _| !instrument_env.contains_key(k));
        // Which configuration key each variable set, to name the variable in a problem with that key.
        let mut env_keys: Vec<(String, String)> = env.keys().map(|v| (env_key(v), v.clone())).collect();
        let compile = |env: &BTreeMap<String, String>| -> Result<(Option<Self>, Vec<Problem>), ConfigError> {
            let mut builder =
                config::Config::builder().add_source(config::File::from_str(text, config::FileFormat::Toml));
            if !env.is_empty() {
                builder = builder.add_source(
                    config::Environment::with_prefix("GLINT")
                        .prefix_separator("_")
                        .separator("__")
                        .try_parsing(true)
                        .list_separator(",")
                        .with_list_parse_key("subscribers.tokens")
                        .source(Some(env.clone().into_iter().collect())),
                );
            }
            let raw = builder.build().map_err(|e| fail("(syntax)", e.to_string()))?;
            let mut root: Table = raw
                .try_deserialize()
                .map_err(|e| fail("(syntax)", e.to_string()))?;
            let mut r = Reader {
                problems: Vec::new(),
                base_dir: base_dir.to_path_buf(),
                deployment: Vec::new(),
            };
            let mut r_problems = Vec::new();
            for (var, value) in &instrument_env {
                if let Err(message) = apply_instrument_env(&mut root, var, value) {
                    r_problems.push(Problem {
                        key: format!("{var} (environment)"),
                        message,
                    });
                }
            }
            r.problems.extend(r_problems);
            let cfg = r.compile(root).map(|c| Self {
                deployment: std::mem::take(&mut r.deployment),
                ..c
            });
            Ok((cfg, r.problems))
        };
        let (mut cfg, mut problems) = compile(&env)?;
        // A GLINT_* variable that names no key (GLINT_HOME, a typo) belongs to something else in the
        // environment: it is left out and listed, never a reason to refuse to start.
        let unknown: Vec<String> = problems
            .iter()
            .filter(|p| p.message == "unknown key")
            .map(|p| p.key.clone())
            .collect();
        let ignored: Vec<String> = env
            .keys()
            .filter(|var| {
                let key = env_key(var);
                unknown
                    .iter()
                    .any(|u| key == *u || key.starts_with(&format!("{u}.")))
            })
            .cloned()
            .collect();
        if !ignored.is_empty() {
            env.retain(|k, _| !ignored.contains(k));
            (cfg, problems) = compile(&env)?;
        }
        env_keys.retain(|(_, var)| !ignored.contains(var));
        for var in instrument_env.keys() {
            if let Some(key) = instrument_env_key(var, &text_instrument_ids(cfg.as_ref())) {
                env_keys.push((key, var.clone()));
            }
        }
        match cfg {
            Some(c) if problems.is_empty() => Ok(Self {
                source_name: source_name.to_string(),
                ignored_env: ignored,
                ..c
            }),
            _ => Err(ConfigError {
                source_name: source_name.to_string(),
                problems: problems.into_iter().map(|p| name_env_var(p, &env_keys)).collect(),
            }),
        }
    }

    /// What deserves a warning at start although the configuration is valid: plain listeners on
    /// non-loopback addresses, a metrics endpoint reachable from other hosts, ignored environment variables.
    pub(crate) fn startup_warnings(&self) -> Vec<String> {
        let mut w = Vec::new();
        for (key, listen, tls, allowed) in [
            (
                "ingest",
                self.ingest.listen,
                self.ingest.tls.is_some(),
                self.ingest.allow_plain_remote,
            ),
            (
                "subscribers",
                self.subscribers.listen,
                self.subscribers.tls.is_some(),
                self.subscribers.allow_plain_remote,
            ),
        ] {
            if !tls && allowed && !listen.ip().is_loopback() {
                w.push(format!(
                    "{key}.listen = {listen} is plain TCP on a non-loopback address (allow_plain_remote = true): \
                     tokens and data cross the network unencrypted"
                ));
            }
        }
        if let Some(m) = self.metrics_listen {
            if !m.ip().is_loopback() {
                w.push(format!(
                    "metrics.listen = {m} is not a loopback address: the metrics endpoint has no authentication \
                     and reveals instrument ids and rates to anyone who can reach it"
                ));
            }
        }
        for p in &self.deployment {
            w.push(format!("{}: {} (check-config refuses this)", p.key, p.message));
        }
        if !self.ignored_env.is_empty() {
            w.push(format!(
                "ignored environment variable(s) that name no configuration key: {}",
                self.ignored_env.join(", ")
            ));
        }
        w
    }

    /// What is wrong with `daemon.state_dir` for a deployment: missing, not a directory, or not writable by
    /// this user (tried with a temporary file, removed at once).
    pub(crate) fn state_dir_problem(&self) -> Option<Problem> {
        let dir = &self.daemon.state_dir;
        let message = match std::fs::metadata(dir) {
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => format!(
                "{} does not exist: create it, owned by the daemon's user (the service file's StateDirectory= does)",
                dir.display()
            ),
            Err(e) => format!("{}: {e}", dir.display()),
            Ok(m) if !m.is_dir() => format!("{} is not a directory", dir.display()),
            Ok(_) => {
                let probe = dir.join(format!(".glint-check-{}.tmp", std::process::id()));
                match std::fs::File::create(&probe) {
                    Ok(_) => {
                        let _ = std::fs::remove_file(&probe);
                        return None;
                    }
                    Err(e) => format!("{} is not writable by this user: {e}", dir.display()),
                }
            }
        };
        Some(Problem {
            key: "daemon.state_dir".into(),
            message,
        })
    }

    /// The instrument with this id.
    pub(crate) fn instrument(&self, id: &str) -> Option<&InstrumentConfig> {
        self.instruments.iter().find(|i| i.id == id)
    }
}

/// Whether configuration text is a `glint coincide` configuration (it has a `[coincide]` table).
pub(crate) fn is_coincide_config(text: &str) -> bool {
    text.parse::<Table>().is_ok_and(|t| t.contains_key("coincide"))
}

impl CoincideConfig {
    /// Reads and compiles a coincide configuration file (no environment overrides).
    pub(crate) fn load(path: &Path) -> Result<Self, ConfigError> {
        let name = path.display().to_string();
        let text = std::fs::read_to_string(path).map_err(|e| ConfigError {
            source_name: name.clone(),
            problems: vec![Problem {
                key: "(file)".into(),
                message: format!("cannot read: {e}"),
            }],
        })?;
        let base = path.parent().map(Path::to_path_buf).unwrap_or_default();
        Self::from_toml(&text, &name, &base)
    }

    /// Compiles coincide configuration text; `base_dir` resolves relative paths.
    pub(crate) fn from_toml(text: &str, source_name: &str, base_dir: &Path) -> Result<Self, ConfigError> {
        let root = raw_root(text, source_name, false)?;
        let mut r = Reader {
            problems: Vec::new(),
            base_dir: base_dir.to_path_buf(),
            deployment: Vec::new(),
        };
        let cfg = r.compile_coincide(root);
        match cfg {
            Some(c) if r.problems.is_empty() => Ok(Self {
                source_name: source_name.to_string(),
                ..c
            }),
            _ => Err(ConfigError {
                source_name: source_name.to_string(),
                problems: r.problems,
            }),
        }
    }

    /// The site of this instrument.
    pub(crate) fn site(&self, instrument: &str) -> Option<&SiteConfig> {
        self.sites.iter().find(|s| s.instrument == instrument)
    }
}

/// Reads configuration text (with `GLINT_*` overrides when asked) into a raw TOML table.
fn raw_root(text: &str, source_name: &str, with_env: bool) -> Result<Table, ConfigError> {
    let fail = |key: &str, message: String| ConfigError {
        source_name: source_name.to_string(),
        problems: vec![Problem {
            key: key.into(),
            message,
        }],
    };
    let mut builder =
        config::Config::builder().add_source(config::File::from_str(text, config::FileFormat::Toml));
    if with_env {
        builder = builder.add_source(
            config::Environment::with_prefix("GLINT")
                .prefix_separator("_")
                .separator("__")
                .try_parsing(true)
                .list_separator(",")
                .with_list_parse_key("subscribers.tokens"),
        );
    }
    let raw = builder.build().map_err(|e| fail("(syntax)", e.to_string()))?;
    raw.try_deserialize().map_err(|e| fail("(syntax)", e.to_string()))
}

/// Variables that set a key of one `[[instrument]]`: `GLINT_INSTRUMENT__<index or id>__<KEY>[__<KEY>...]`,
/// the id written with `_` for `-` (any case), e.g. `GLINT_INSTRUMENT__VENTISCA_ARRAY__TOKEN_FILE` or
/// `GLINT_INSTRUMENT__0__SEARCH__FAR_PER_YEAR`.
const INSTRUMENT_ENV_PREFIX: &str = "GLINT_INSTRUMENT__";

/// Which instrument a selector names: an index, or an id with `_` standing for `-` (any case).
fn instrument_index(selector: &str, ids: &[String]) -> Option<usize> {
    if let Ok(i) = selector.parse::<usize>() {
        return (i < ids.len()).then_some(i);
    }
    let norm = |s: &str| s.to_ascii_lowercase().replace('-', "_");
    ids.iter().position(|id| norm(id) == norm(selector))
}

/// The instrument ids of a parsed tree, in order (blank where an entry has none).
fn instrument_ids(root: &Table) -> Vec<String> {
    match root.get("instrument") {
        Some(Value::Array(a)) => a
            .iter()
            .map(|t| {
                t.get("id")
                    .and_then(|v| v.as_str())
                    .unwrap_or_default()
                    .to_string()
            })
            .collect(),
        _ => Vec::new(),
    }
}

/// The ids of a compiled configuration (for naming variables in problems).
fn text_instrument_ids(cfg: Option<&Config>) -> Vec<String> {
    cfg.map(|c| c.instruments.iter().map(|i| i.id.clone()).collect())
        .unwrap_or_default()
}

/// Splits an instrument variable into its selector and its key path (lower case).
fn split_instrument_var(var: &str) -> Option<(String, Vec<String>)> {
    let rest = var.get(INSTRUMENT_ENV_PREFIX.len()..)?;
    let mut parts = rest.split("__");
    let selector = parts.next().filter(|s| !s.is_empty())?.to_string();
    let path: Vec<String> = parts.map(str::to_ascii_lowercase).collect();
    (!path.is_empty() && path.iter().all(|p| !p.is_empty())).then_some((selector, path))
}

/// The dotted key an instrument variable sets, e.g. `instrument[0].token_file`.
fn instrument_env_key(var: &str, ids: &[String]) -> Option<String> {
    let (selector, path) = split_instrument_var(var)?;
    let i = selector
        .parse::<usize>()
        .ok()
        .or_else(|| instrument_index(&selector, ids))?;
    Some(format!("instrument[{i}].{}", path.join(".")))
}

/// Sets the key an instrument variable names in the parsed tree (a number or boolean when the value reads
/// as one, else text).
fn apply_instrument_env(root: &mut Table, var: &str, value: &str) -> Result<(), String> {
    let (selector, path) = split_instrument_var(var)
        .ok_or_else(|| "write it GLINT_INSTRUMENT__<index or id>__<KEY>".to_string())?;
    let ids = instrument_ids(root);
    let i = instrument_index(&selector, &ids).ok_or_else(|| {
        format!(
            "no instrument '{selector}' (by index or id; configured: {})",
            ids.join(", ")
        )
    })?;
    let Some(Value::Array(list)) = root.get_mut("instrument") else {
        return Err("the configuration has no [[instrument]]".into());
    };
    let Some(Value::Table(first)) = list.get_mut(i) else {
        return Err(format!("instrument[{i}] is not a table"));
    };
    let mut t: &mut Table = first;
    let (last, parents) = path.split_last().ok_or("no key")?;
    for p in parents {
        let entry = t.entry(p.clone()).or_insert_with(|| Value::Table(Table::new()));
        let Value::Table(next) = entry else {
            return Err(format!("instrument[{i}].{p} is not a table"));
        };
        t = next;
    }
    let parsed = value
        .parse::<i64>()
        .map(Value::Integer)
        .or_else(|_| value.parse::<f64>().map(Value::Float))
        .or_else(|_| value.parse::<bool>().map(Value::Boolean))
        .unwrap_or_else(|_| Value::String(value.to_string()));
    t.insert(last.clone(), parsed);
    Ok(())
}

/// A problem whose key an environment variable set names that variable, so it is not blamed on the file.
fn name_env_var(p: Problem, env_keys: &[(String, String)]) -> Problem {
    let hit = env_keys.iter().find(|(key, _)| {
        p.key == *key || p.key.starts_with(&format!("{key}.")) || p.key.starts_with(&format!("{key}["))
    });
    match hit {
        Some((_, var)) => Problem {
            key: format!("{} ({var}, environment)", p.key),
            message: p.message,
        },
        None => p,
    }
}

/// The dotted key a `GLINT_SECTION__KEY` variable stands for, as the `config` crate reads it.
fn env_key(var: &str) -> String {
    var.to_lowercase()
        .strip_prefix("glint_")
        .unwrap_or_default()
        .replace("__", ".")
}

/// Smallest size accepted for byte-count keys whose tiny values make no sense (frame limits, segments).
const MIN_SIZE_BYTES: i64 = 4096;

/// How the sample tokens under `deploy/tokens/` begin: never a real secret.
const PLACEHOLDER_TOKEN_PREFIX: &str = "change-me-";

/// Walks the raw tree, taking each known key out of its table so that what is left over is unknown.
struct Reader {
    problems: Vec<Problem>,
    base_dir: PathBuf,
    /// What would run but must not be deployed (placeholder tokens, token files others can read):
    /// `check-config` refuses it, `run` warns.
    deployment: Vec<Problem>,
}

/// One table being read; leftover keys are reported as unknown when it is finished.
struct Section {
    prefix: String,
    table: Table,
}

impl Section {
    fn key(&self, k: &str) -> String {
        if self.prefix.is_empty() {
            k.to_string()
        } else {
            format!("{}.{}", self.prefix, k)
        }
    }
}

impl Reader {
    fn problem(&mut self, key: impl Into<String>, message: impl Into<String>) {
        self.problems.push(Problem {
            key: key.into(),
            message: message.into(),
        });
    }

    fn section(&mut self, parent: &mut Section, name: &str) -> Section {
        let prefix = parent.key(name);
        match parent.table.remove(name) {
            None => Section {
                prefix,
                table: Table::new(),
            },
            Some(Value::Table(t)) => Section { prefix, table: t },
            Some(other) => {
                self.problem(&prefix, format!("expected a table, found {}", other.type_str()));
                Section {
                    prefix,
                    table: Table::new(),
                }
            }
        }
    }

    fn finish(&mut self, s: Section) {
        for k in s.table.keys() {
            self.problem(s.key(k), "unknown key");
        }
    }

    fn opt<T: DeserializeOwned>(&mut self, s: &mut Section, k: &str) -> Option<T> {
        let v = s.table.remove(k)?;
        let shown = v.type_str();
        match v.try_into::<T>() {
            Ok(t) => Some(t),
            Err(e) => {
                let msg = e.to_string().trim().replace('\n', " ");
                self.problem(s.key(k), format!("wrong type ({shown}): {msg}"));
                None
            }
        }
    }

    fn get<T: DeserializeOwned>(&mut self, s: &mut Section, k: &str, default: T) -> T {
        self.opt(s, k).unwrap_or(default)
    }

    fn required<T: DeserializeOwned>(&mut self, s: &mut Section, k: &str) -> Option<T> {
        let present = s.table.contains_key(k);
        let v = self.opt(s, k);
        if !present {
            self.problem(s.key(k), "missing (required)");
        }
        v
    }

    fn positive(&mut self, s: &Section, k: &str, v: f64) -> f64 {
        if !(v.is_finite() && v > 0.0) {
            self.problem(s.key(k), format!("{v} must be a finite number > 0"));
        }
        v
    }

    fn in_range(&mut self, s: &Section, k: &str, v: f64, lo: f64, hi: f64) -> f64 {
        if !(v.is_finite() && (lo..=hi).contains(&v)) {
            self.problem(s.key(k), format!("{v} is outside [{lo}, {hi}]"));
        }
        v
    }

    fn seconds(&mut self, s: &mut Section, k: &str, default: f64) -> Duration {
        let v: f64 = self.get(s, k, default);
        let v = self.positive(s, k, v);
        Duration::try_from_secs_f64(v).unwrap_or(Duration::from_secs_f64(default))
    }

    fn addr(&mut self, s: &mut Section, k: &str, default: &str) -> SocketAddr {
        let text: String = self.get(s, k, default.to_string());
        match text.parse() {
            Ok(a) => a,
            Err(e) => {
                self.problem(
                    s.key(k),
                    format!("'{text}' is not an address like 127.0.0.1:7601 ({e})"),
                );
                SocketAddr::from(([127, 0, 0, 1], 0))
            }
        }
    }

    fn nonzero(&mut self, s: &mut Section, k: &str, default: usize) -> NonZeroUsize {
        let v: i64 = self.get(s, k, default as i64);
        match usize::try_from(v).ok().and_then(NonZeroUsize::new) {
            Some(n) => n,
            None => {
                self.problem(s.key(k), format!("{v} must be a whole number >= 1"));
                NonZeroUsize::MIN
            }
        }
    }

    /// A byte count of at least [`MIN_SIZE_BYTES`] and at most `max`, refused (naming the key) otherwise.
    fn size(&mut self, s: &mut Section, k: &str, default: i64, max: i64) -> u64 {
        let v: i64 = self.get(s, k, default);
        if !(MIN_SIZE_BYTES..=max).contains(&v) {
            self.problem(
                s.key(k),
                format!("{v} bytes is outside [{MIN_SIZE_BYTES}, {max}]"),
            );
            return default as u64;
        }
        v as u64
    }

    /// A whole number in `[lo, hi]`.
    fn count(&mut self, s: &mut Section, k: &str, default: usize, lo: usize, hi: usize) -> usize {
        let v: i64 = self.get(s, k, default as i64);
        match usize::try_from(v) {
            Ok(n) if (lo..=hi).contains(&n) => n,
            _ => {
                self.problem(s.key(k), format!("{v} is outside [{lo}, {hi}]"));
                default
            }
        }
    }

    /// The unauthenticated-connection limits of a listener section.
    fn gate(&mut self, s: &mut Section) -> GateLimits {
        let max_pending = self.count(s, "max_unauthenticated", 64, 1, 65_536);
        let per_addr = self.count(s, "max_unauthenticated_per_address", 16, 1, 65_536);
        if per_addr > max_pending {
            self.problem(
                s.key("max_unauthenticated_per_address"),
                format!("{per_addr} is more than max_unauthenticated ({max_pending})"),
            );
        }
        let auth_timeout = self.seconds(s, "auth_timeout_s", 5.0);
        if auth_timeout > Duration::from_secs(300) {
            self.problem(s.key("auth_timeout_s"), "must be at most 300 seconds");
        }
        GateLimits {
            max_pending,
            max_pending_per_address: per_addr,
            auth_timeout,
        }
    }

    fn path(&self, p: &str) -> PathBuf {
        let p = PathBuf::from(p);
        if p.is_absolute() { p } else { self.base_dir.join(p) }
    }

    /// A secret given inline as `<k>` or in a file as `<k>_file` (exactly one of the two).
    fn secret(&mut self, s: &mut Section, k: &str, required: bool) -> Option<Secret> {
        let inline: Option<String> = self.opt(s, k);
        let file_key = format!("{k}_file");
        let file: Option<String> = self.opt(s, &file_key);
        match (inline, file) {
            (Some(_), Some(_)) => {
                self.problem(s.key(k), format!("give either {k} or {file_key}, not both"));
                None
            }
            (Some(t), None) => self.check_secret(s.key(k), t),
            (None, Some(f)) => {
                let path = self.path(&f);
                match std::fs::read_to_string(&path) {
                    Ok(t) => {
                        self.check_token_file_mode(s.key(&file_key), &path);
                        self.check_secret(s.key(&file_key), t.trim().to_string())
                    }
                    Err(e) => {
                        self.problem(
                            s.key(&file_key),
                            format!("cannot read token file {}: {e}", path.display()),
                        );
                        None
                    }
                }
            }
            (None, None) => {
                if required {
                    self.problem(s.key(k), format!("missing (give {k} or {file_key})"));
                }
                None
            }
        }
    }

    /// A token file the group or others may read is a deployment problem (its secret is not one).
    fn check_token_file_mode(&mut self, key: String, path: &Path) {
        use std::os::unix::fs::PermissionsExt as _;
        if let Ok(m) = std::fs::metadata(path) {
            let mode = m.permissions().mode() & 0o777;
            if mode & 0o077 != 0 {
                self.deployment.push(Problem {
                    key,
                    message: format!(
                        "token file {} is readable by group or others (mode {mode:o}): chmod 600 it",
                        path.display()
                    ),
                });
            }
        }
    }

    fn check_secret(&mut self, key: String, t: String) -> Option<Secret> {
        if t.starts_with(PLACEHOLDER_TOKEN_PREFIX) {
            self.deployment.push(Problem {
                key: key.clone(),
                message: "is the shipped placeholder token: make a secret of your own (e.g. `openssl rand -hex 24`)"
                    .into(),
            });
        }
        if t.len() < 8 {
            self.problem(key, "token must be at least 8 characters");
            None
        } else {
            Some(Secret(t))
        }
    }

    fn tls(&mut self, s: &mut Section) -> Option<TlsConfig> {
        let cert: Option<String> = self.opt(s, "tls_cert");
        let key: Option<String> = self.opt(s, "tls_key");
        match (cert.filter(|c| !c.is_empty()), key.filter(|k| !k.is_empty())) {
            (Some(c), Some(k)) => {
                let (cert, key) = (self.path(&c), self.path(&k));
                let mut readable = true;
                for (name, p) in [("tls_cert", &cert), ("tls_key", &key)] {
                    if !p.is_file() {
                        self.problem(s.key(name), format!("{} is not a readable file", p.display()));
                        readable = false;
                    }
                }
                let tls = TlsConfig { cert, key };
                // Loaded now, so check-config refuses what `run` would: a PEM file without a certificate or
                // key, or a pair that does not match.
                if readable {
                    if let Err(e) = crate::tls::acceptor(&tls) {
                        self.problem(s.key("tls_cert"), format!("{e:#}"));
                    }
                }
                Some(tls)
            }
            (None, None) => None,
            _ => {
                self.problem(s.key("tls_cert"), "tls_cert and tls_key must be given together");
                None
            }
        }
    }

    /// Plain TCP on a non-loopback address needs an explicit `allow_plain_remote = true`; returns that flag.
    fn plain_remote_check(&mut self, s: &mut Section, listen: SocketAddr, tls: &Option<TlsConfig>) -> bool {
        let allow: bool = self.get(s, "allow_plain_remote", false);
        if tls.is_none() && !listen.ip().is_loopback() && !allow {
            self.problem(
                s.key("listen"),
                format!("{listen} is not loopback and no TLS is configured; set tls_cert/tls_key or allow_plain_remote = true"),
            );
        }
        allow
    }

    /// Two listeners on one port (the same address, or either on every address) cannot both bind.
    fn port_clashes(&mut self, listeners: &[(&str, Option<SocketAddr>)]) {
        for (i, (ka, a)) in listeners.iter().enumerate() {
            for (kb, b) in &listeners[i + 1..] {
                let (Some(a), Some(b)) = (a, b) else { continue };
                let overlap = a.ip() == b.ip() || a.ip().is_unspecified() || b.ip().is_unspecified();
                if a.port() != 0 && a.port() == b.port() && overlap {
                    self.problem(
                        *kb,
                        format!("{b} clashes with {ka} = {a}: one port, two listeners"),
                    );
                }
            }
        }
    }

    fn compile(&mut self, root: Table) -> Option<Config> {
        let mut top = Section {
            prefix: String::new(),
            table: root,
        };

        let mut d = self.section(&mut top, "daemon");
        let state_dir: String = self.get(&mut d, "state_dir", "/var/lib/glint".to_string());
        let log_level: String = self.get(&mut d, "log_level", "info".to_string());
        if let Some(why) = crate::logging::level_problem(&log_level) {
            self.problem(d.key("log_level"), why);
        }
        let fmt_text: String = self.get(&mut d, "log_format", "text".to_string());
        let log_format = match fmt_text.as_str() {
            "text" => LogFormat::Text,
            "json" => LogFormat::Json,
            other => {
                self.problem(d.key("log_format"), format!("'{other}' is not one of text, json"));
                LogFormat::Text
            }
        };
        let max_frame_bytes = self.size(
            &mut d,
            "max_frame_bytes",
            glint_wire::framing::DEFAULT_MAX_FRAME_BYTES as i64,
            256 * 1024 * 1024,
        );
        let shutdown_deadline = self.seconds(&mut d, "shutdown_deadline_s", 10.0);
        let state_save_interval = self.seconds(&mut d, "state_save_interval_s", 300.0);
        let disk_warn: i64 = self.get(&mut d, "disk_warn_free_bytes", 1 << 30);
        let disk_min: i64 = self.get(&mut d, "disk_min_free_bytes", 64 << 20);
        if disk_min < 0 {
            self.problem(d.key("disk_min_free_bytes"), "must be at least 0");
        }
        if disk_warn < disk_min {
            self.problem(
                d.key("disk_warn_free_bytes"),
                format!("must be at least disk_min_free_bytes ({disk_min})"),
            );
        }
        let daemon = DaemonConfig {
            state_dir: self.path(&expand_tmp(&state_dir)),
            log_level,
            log_format,
            max_frame_bytes: max_frame_bytes as usize,
            shutdown_deadline,
            state_save_interval,
            disk_warn_free_bytes: disk_warn.max(0) as u64,
            disk_min_free_bytes: disk_min.max(0) as u64,
        };
        self.finish(d);

        let mut s = self.section(&mut top, "ingest");
        let listen = self.addr(&mut s, "listen", "127.0.0.1:7601");
        let tls = self.tls(&mut s);
        let allow_plain_remote = self.plain_remote_check(&mut s, listen, &tls);
        let ingest = IngestConfig {
            listen,
            tls,
            queue_batches: self.nonzero(&mut s, "queue_batches", 256),
            ack_every: self.nonzero(&mut s, "ack_every", 16),
            record: self.get(&mut s, "record", false),
            record_rotate_bytes: self.size(&mut s, "record_rotate_bytes", 256 << 20, i64::MAX),
            record_rotate: self.seconds(&mut s, "record_rotate_s", 3600.0),
            allow_plain_remote,
            gate: self.gate(&mut s),
            keepalive: self.seconds(&mut s, "keepalive_s", 15.0),
            frame_timeout: self.seconds(&mut s, "frame_timeout_s", 10.0),
            max_future: self.seconds(&mut s, "max_future_s", 300.0),
            silent_after: self.seconds(&mut s, "silent_after_s", 30.0),
        };
        self.finish(s);

        let mut s = self.section(&mut top, "subscribers");
        let listen = self.addr(&mut s, "listen", "127.0.0.1:7602");
        let tls = self.tls(&mut s);
        let allow_plain_remote = self.plain_remote_check(&mut s, listen, &tls);
        let mut tokens = Vec::new();
        let inline: Vec<String> = self.get(&mut s, "tokens", Vec::new());
        for (i, t) in inline.into_iter().enumerate() {
            tokens.extend(self.check_secret(s.key(&format!("tokens[{i}]")), t));
        }
        let files: Vec<String> = self.get(&mut s, "token_files", Vec::new());
        for (i, f) in files.into_iter().enumerate() {
            let p = self.path(&f);
            match std::fs::read_to_string(&p) {
                Ok(t) => {
                    self.check_token_file_mode(s.key(&format!("token_files[{i}]")), &p);
                    tokens.extend(self.check_secret(s.key(&format!("token_files[{i}]")), t.trim().into()))
                }
                Err(e) => self.problem(
                    s.key(&format!("token_files[{i}]")),
                    format!("cannot read token file {}: {e}", p.display()),
                ),
            }
        }
        let operator_token = self.secret(&mut s, "operator_token", false);
        let subscribers = SubscribersConfig {
            listen,
            tls,
            tokens,
            operator_token,
            heartbeat: self.seconds(&mut s, "heartbeat_s", 5.0),
            unwritable_timeout: self.seconds(&mut s, "unwritable_timeout_s", 30.0),
            max_connections: self.nonzero(&mut s, "max_connections", 256),
            allow_plain_remote,
            gate: self.gate(&mut s),
            keepalive: self.seconds(&mut s, "keepalive_s", 15.0),
        };
        self.finish(s);

        let mut s = self.section(&mut top, "journal");
        let journal = JournalConfig {
            segment_bytes: self.size(&mut s, "segment_bytes", 64 << 20, i64::MAX),
            retention: self.seconds(&mut s, "retention_days", 90.0) * 86_400,
        };
        self.finish(s);

        let mut s = self.section(&mut top, "metrics");
        let m: String = self.get(&mut s, "listen", String::new());
        let metrics_listen = if m.is_empty() {
            None
        } else {
            match m.parse::<SocketAddr>() {
                Ok(a) => Some(a),
                Err(e) => {
                    self.problem(s.key("listen"), format!("'{m}' is not an address ({e})"));
                    None
                }
            }
        };
        self.finish(s);
        self.port_clashes(&[
            ("ingest.listen", Some(ingest.listen)),
            ("subscribers.listen", Some(subscribers.listen)),
            ("metrics.listen", metrics_listen),
        ]);

        let email = match top.table.remove("email") {
            None => None,
            Some(Value::Table(t)) => self.email(Section {
                prefix: "email".into(),
                table: t,
            }),
            Some(other) => {
                self.problem("email", format!("expected a table, found {}", other.type_str()));
                None
            }
        };

        let mut s = self.section(&mut top, "bus");
        let bus = self.bus(&mut s, false);
        self.finish(s);

        let mut instruments = Vec::new();
        match top.table.remove("instrument") {
            Some(Value::Array(items)) => {
                for (i, item) in items.into_iter().enumerate() {
                    let prefix = format!("instrument[{i}]");
                    match item {
                        Value::Table(t) => {
                            if let Some(inst) = self.instrument(Section { prefix, table: t }) {
                                instruments.push(inst);
                            }
                        }
                        other => {
                            self.problem(prefix, format!("expected a table, found {}", other.type_str()))
                        }
                    }
                }
            }
            Some(other) => self.problem(
                "instrument",
                format!("expected [[instrument]] tables, found {}", other.type_str()),
            ),
            None => {}
        }
        if instruments.is_empty() && !self.problems.iter().any(|p| p.key.starts_with("instrument")) {
            self.problem("instrument", "at least one [[instrument]] is required");
        }
        for (i, inst) in instruments.iter_mut().enumerate() {
            let checked = load_calibration(&daemon.state_dir, &inst.id).and_then(|trials| match trials {
                Some(t) => t
                    .check(&inst.id, &inst.search.ladder_s, inst.search.search_radius_deg)
                    .map(|()| Some(t))
                    .map_err(|e| format!("{}: {e}", calibration_path(&daemon.state_dir, &inst.id).display())),
                None => Ok(None),
            });
            match checked {
                Ok(trials) => inst.trials = trials,
                Err(message) => self.problem(format!("instrument[{i}] calibration"), message),
            }
        }
        let mut seen = BTreeMap::new();
        for (i, inst) in instruments.iter().enumerate() {
            if let Some(j) = seen.insert(inst.id.clone(), i) {
                self.problem(
                    format!("instrument[{i}].id"),
                    format!("'{}' is already used by instrument[{j}]", inst.id),
                );
            }
        }
        self.finish(top);

        Some(Config {
            source_name: String::new(),
            daemon,
            ingest,
            subscribers,
            journal,
            metrics_listen,
            email,
            bus,
            instruments,
            ignored_env: Vec::new(),
            deployment: Vec::new(),
        })
    }

    /// A `[bus]` block; `None` when `url` is empty (and `required` is false).
    fn bus(&mut self, s: &mut Section, required: bool) -> Option<BusConfig> {
        let url: String = self.get(s, "url", String::new());
        let credentials: String = self.get(s, "credentials_file", String::new());
        let subject_prefix: String = self.get(s, "subject_prefix", "glint.alerts".to_string());
        let stream: String = self.get(s, "stream", "GLINT_ALERTS".to_string());
        let stream_file: String = self.get(s, "stream_file", String::new());
        let ack_timeout = self.seconds(s, "ack_timeout_s", 5.0);
        let max_backoff = self.seconds(s, "max_backoff_s", 5.0);
        if url.trim().is_empty() {
            if required {
                self.problem(
                    s.key("url"),
                    "missing (required): the NATS server URL, e.g. nats://127.0.0.1:4222",
                );
            }
            return None;
        }
        for u in url.split(',') {
            let u = u.trim();
            let scheme_ok = ["nats://", "tls://", "ws://", "wss://"]
                .iter()
                .any(|p| u.starts_with(p));
            if !scheme_ok || u.len() < 8 {
                self.problem(
                    s.key("url"),
                    format!("'{u}' is not a NATS URL like nats://127.0.0.1:4222"),
                );
            }
        }
        if let Err(e) = check_subject_prefix(&subject_prefix) {
            self.problem(s.key("subject_prefix"), e);
        }
        if stream.is_empty()
            || stream
                .chars()
                .any(|c| c.is_whitespace() || matches!(c, '.' | '*' | '>' | '/' | '\\'))
        {
            self.problem(
                s.key("stream"),
                format!("'{stream}' is not a stream name (non-empty, no spaces, '.', '*', '>', '/')"),
            );
        }
        let credentials_file = (!credentials.is_empty()).then(|| self.path(&credentials));
        if let Some(p) = &credentials_file {
            if !p.is_file() {
                self.problem(
                    s.key("credentials_file"),
                    format!("{} is not a readable file", p.display()),
                );
            }
        }
        let stream_file = (!stream_file.is_empty()).then(|| self.path(&stream_file));
        if let Some(p) = &stream_file {
            match std::fs::read_to_string(p)
                .map_err(|e| e.to_string())
                .and_then(|t| {
                    serde_json::from_str::<async_nats::jetstream::stream::Config>(&t)
                        .map_err(|e| e.to_string())
                }) {
                Ok(def) => {
                    if def.name != stream {
                        self.problem(
                            s.key("stream_file"),
                            format!("{} defines stream '{}', not '{stream}'", p.display(), def.name),
                        );
                    }
                    let wanted = format!("{subject_prefix}.>");
                    if !def.subjects.contains(&wanted) {
                        self.problem(
                            s.key("stream_file"),
                            format!("{}: the stream's subjects must include '{wanted}'", p.display()),
                        );
                    }
                }
                Err(e) => self.problem(
                    s.key("stream_file"),
                    format!("{} is not a stream definition: {e}", p.display()),
                ),
            }
        }
        Some(BusConfig {
            url,
            credentials_file,
            subject_prefix,
            stream,
            stream_file,
            ack_timeout,
            max_backoff,
        })
    }

    fn compile_coincide(&mut self, root: Table) -> Option<CoincideConfig> {
        let mut top = Section {
            prefix: String::new(),
            table: root,
        };
        let mut s = self.section(&mut top, "bus");
        let bus = self.bus(&mut s, true);
        self.finish(s);

        let mut s = self.section(&mut top, "coincide");
        let name: String = self.get(&mut s, "name", "coincide".to_string());
        if name.is_empty()
            || !name
                .chars()
                .all(|c| c.is_ascii_alphanumeric() || c == '-' || c == '_')
        {
            self.problem(
                s.key("name"),
                format!("'{name}' must be non-empty ASCII letters, digits, '-' or '_'"),
            );
        }
        let consumer: String = self.get(&mut s, "consumer", "glint-coincide".to_string());
        if consumer.is_empty()
            || consumer
                .chars()
                .any(|c| c.is_whitespace() || matches!(c, '.' | '*' | '>'))
        {
            self.problem(s.key("consumer"), format!("'{consumer}' is not a consumer name"));
        }
        let state_dir: String = self.get(&mut s, "state_dir", "/var/lib/glint-coincide".to_string());
        let horizon_s: f64 = self.get(&mut s, "horizon_s", 3600.0);
        self.in_range(&s, "horizon_s", horizon_s, 1.0, 30.0 * 86_400.0);
        let log_level: String = self.get(&mut s, "log_level", "info".to_string());
        if let Some(why) = crate::logging::level_problem(&log_level) {
            self.problem(s.key("log_level"), why);
        }
        self.finish(s);

        let mut sites = Vec::new();
        match top.table.remove("site") {
            Some(Value::Array(items)) => {
                for (i, item) in items.into_iter().enumerate() {
                    let prefix = format!("site[{i}]");
                    match item {
                        Value::Table(t) => {
                            let mut q = Section { prefix, table: t };
                            let instrument: Option<String> = self.required(&mut q, "instrument");
                            let lat: Option<f64> = self.required(&mut q, "latitude_deg");
                            let lon: Option<f64> = self.required(&mut q, "longitude_deg");
                            let height_m: f64 = self.get(&mut q, "height_m", 0.0);
                            let tol: f64 = self.get(&mut q, "clock_tolerance_s", 1e-6);
                            let fov: f64 = self.get(&mut q, "fov_radius_deg", 45.0);
                            if let Some(v) = lat {
                                self.in_range(&q, "latitude_deg", v, -90.0, 90.0);
                            }
                            if let Some(v) = lon {
                                self.in_range(&q, "longitude_deg", v, -180.0, 360.0);
                            }
                            self.in_range(&q, "height_m", height_m, -500.0, 100_000.0);
                            self.in_range(&q, "clock_tolerance_s", tol, 0.0, 60.0);
                            self.in_range(&q, "fov_radius_deg", fov, 0.1, 180.0);
                            self.finish(q);
                            if let (Some(instrument), Some(latitude_deg), Some(longitude_deg)) =
                                (instrument, lat, lon)
                            {
                                sites.push(SiteConfig {
                                    instrument,
                                    latitude_deg,
                                    longitude_deg,
                                    height_m,
                                    clock_tolerance_s: tol,
                                    fov_radius_deg: fov,
                                });
                            }
                        }
                        other => {
                            self.problem(prefix, format!("expected a table, found {}", other.type_str()))
                        }
                    }
                }
            }
            Some(other) => self.problem(
                "site",
                format!("expected [[site]] tables, found {}", other.type_str()),
            ),
            None => {}
        }
        if sites.len() < 2 && !self.problems.iter().any(|p| p.key.starts_with("site")) {
            self.problem(
                "site",
                "at least two [[site]] tables are needed to find coincidences",
            );
        }
        let mut seen = BTreeMap::new();
        for (i, site) in sites.iter().enumerate() {
            if let Some(j) = seen.insert(site.instrument.clone(), i) {
                self.problem(
                    format!("site[{i}].instrument"),
                    format!("'{}' is already used by site[{j}]", site.instrument),
                );
            }
        }
        self.finish(top);
        Some(CoincideConfig {
            source_name: String::new(),
            bus: bus?,
            name,
            consumer,
            state_dir: self.path(&expand_tmp(&state_dir)),
            horizon_s,
            log_level,
            sites,
        })
    }

    fn mailbox(&mut self, s: &Section, k: &str, text: &str) -> Option<lettre::message::Mailbox> {
        match text.parse::<lettre::message::Mailbox>() {
            Ok(m) => Some(m),
            Err(e) => {
                self.problem(
                    s.key(k),
                    format!("'{text}' is not an email address like \"Name <user@example.org>\" ({e})"),
                );
                None
            }
        }
    }

    fn email(&mut self, mut s: Section) -> Option<EmailConfig> {
        let relay: Option<String> = self.required(&mut s, "relay");
        let (relay_host, relay_port) = match relay.as_deref().map(|r| (r, r.rsplit_once(':'))) {
            Some((_, Some((h, p)))) if !h.is_empty() && p.parse::<u16>().is_ok_and(|p| p > 0) => {
                (h.trim_matches(['[', ']']).to_string(), p.parse().unwrap_or(25))
            }
            Some((r, _)) => {
                self.problem(
                    s.key("relay"),
                    format!("'{r}' is not HOST:PORT, e.g. smtp.example.org:587"),
                );
                (String::new(), 0)
            }
            None => (String::new(), 0),
        };
        let from_text: Option<String> = self.required(&mut s, "from");
        let from = from_text.and_then(|f| self.mailbox(&s, "from", &f));
        let tls_text: String = self.get(&mut s, "tls", "starttls".to_string());
        let tls = match tls_text.as_str() {
            "starttls" => EmailTls::StartTls,
            "implicit" => EmailTls::Implicit,
            "none" => EmailTls::None,
            other => {
                self.problem(
                    s.key("tls"),
                    format!("'{other}' is not one of starttls, implicit, none"),
                );
                EmailTls::StartTls
            }
        };
        let loopback = relay_host == "localhost"
            || relay_host
                .parse::<std::net::IpAddr>()
                .is_ok_and(|ip| ip.is_loopback());
        let allow_plain: bool = self.get(&mut s, "allow_plain_remote", false);
        if tls == EmailTls::None && !loopback && !relay_host.is_empty() && !allow_plain {
            self.problem(
                s.key("tls"),
                format!("\"none\" sends alerts and any password in clear to {relay_host}; use starttls or implicit, or set allow_plain_remote = true"),
            );
        }
        let ca: String = self.get(&mut s, "tls_ca_file", String::new());
        let tls_ca_file = (!ca.is_empty()).then(|| self.path(&ca));
        if let Some(p) = &tls_ca_file {
            if !p.is_file() {
                self.problem(
                    s.key("tls_ca_file"),
                    format!("{} is not a readable file", p.display()),
                );
            }
        }
        let user: String = self.get(&mut s, "username", String::new());
        let pw_file: String = self.get(&mut s, "password_file", String::new());
        let auth = match (user.is_empty(), pw_file.is_empty()) {
            (true, true) => None,
            (false, false) => {
                let p = self.path(&pw_file);
                match std::fs::read_to_string(&p) {
                    Ok(t) if !t.trim().is_empty() => {
                        Some((user, Secret(t.trim_end_matches(['\r', '\n']).to_string())))
                    }
                    Ok(_) => {
                        self.problem(s.key("password_file"), format!("{} is empty", p.display()));
                        None
                    }
                    Err(e) => {
                        self.problem(
                            s.key("password_file"),
                            format!("cannot read {}: {e}", p.display()),
                        );
                        None
                    }
                }
            }
            _ => {
                self.problem(
                    s.key("username"),
                    "username and password_file must be given together",
                );
                None
            }
        };
        if auth.is_some() && tls == EmailTls::None && !loopback {
            self.problem(
                s.key("password_file"),
                "a password is never sent without TLS to a remote relay",
            );
        }
        let timeout = self.seconds(&mut s, "timeout_s", 30.0);
        let retry_max = self.seconds(&mut s, "retry_max_s", 300.0);
        let mut recipients = Vec::new();
        match s.table.remove("recipient") {
            Some(Value::Array(items)) => {
                for (i, item) in items.into_iter().enumerate() {
                    let prefix = format!("email.recipient[{i}]");
                    match item {
                        Value::Table(t) => {
                            if let Some(r) = self.recipient(Section { prefix, table: t }) {
                                recipients.push(r);
                            }
                        }
                        other => {
                            self.problem(prefix, format!("expected a table, found {}", other.type_str()))
                        }
                    }
                }
            }
            Some(other) => self.problem(
                "email.recipient",
                format!("expected [[email.recipient]] tables, found {}", other.type_str()),
            ),
            None => self.problem("email.recipient", "at least one [[email.recipient]] is required"),
        }
        let mut seen = BTreeMap::new();
        for (i, r) in recipients.iter().enumerate() {
            let key = r.address.email.to_string().to_lowercase();
            if let Some(j) = seen.insert(key, i) {
                self.problem(
                    format!("email.recipient[{i}].address"),
                    format!("{} is already email.recipient[{j}]", r.address.email),
                );
            }
        }
        self.finish(s);
        Some(EmailConfig {
            relay_host,
            relay_port,
            from: from?,
            tls,
            tls_ca_file,
            auth,
            timeout,
            retry_max,
            recipients,
        })
    }

    fn recipient(&mut self, mut s: Section) -> Option<EmailRecipient> {
        use glint_wire::pb::AlertKind;
        let addr: Option<String> = self.required(&mut s, "address");
        let address = addr.and_then(|a| self.mailbox(&s, "address", &a));
        let names: Vec<String> = self.get(
            &mut s,
            "kinds",
            vec![
                "flash".into(),
                "assessment".into(),
                "withdrawal".into(),
                "test".into(),
            ],
        );
        let mut kinds = Vec::new();
        for n in &names {
            match crate::alerts::parse_kind(n) {
                Some(AlertKind::Heartbeat) | None => self.problem(
                    s.key("kinds"),
                    format!("'{n}' is not one of flash, assessment, withdrawal, test"),
                ),
                Some(k) => kinds.push(k),
            }
        }
        let min_sigma: f64 = self.get(&mut s, "min_sigma", 0.0);
        let min_sigma = self.in_range(&s, "min_sigma", min_sigma, 0.0, 1e6);
        let max_per_window = self.nonzero(&mut s, "max_per_window", 10).get();
        let window = self.seconds(&mut s, "window_s", 3600.0);
        let quiet_text: String = self.get(&mut s, "quiet_hours_utc", String::new());
        let quiet_sigma: f64 = self.get(&mut s, "quiet_min_sigma", 5.0);
        let quiet_sigma = self.in_range(&s, "quiet_min_sigma", quiet_sigma, 0.0, 1e6);
        let quiet = if quiet_text.is_empty() {
            None
        } else {
            match parse_quiet(&quiet_text) {
                Some((start_min, end_min)) => Some(QuietHours {
                    start_min,
                    end_min,
                    min_sigma: quiet_sigma,
                }),
                None => {
                    self.problem(
                        s.key("quiet_hours_utc"),
                        format!("'{quiet_text}' is not a span like \"22:00-06:30\" (UTC, 24-hour)"),
                    );
                    None
                }
            }
        };
        self.finish(s);
        Some(EmailRecipient {
            address: address?,
            kinds,
            min_sigma,
            max_per_window,
            window,
            quiet,
        })
    }

    fn instrument(&mut self, mut s: Section) -> Option<InstrumentConfig> {
        let id: Option<String> = self.required(&mut s, "id");
        if let Some(id) = &id {
            if id.is_empty()
                || !id
                    .chars()
                    .all(|c| c.is_ascii_alphanumeric() || c == '-' || c == '_')
            {
                self.problem(
                    s.key("id"),
                    format!("'{id}' must be non-empty ASCII letters, digits, '-' or '_'"),
                );
            }
        }
        let token = self.secret(&mut s, "token", true);
        let spec = self.instrument_spec(&mut s);

        let mut q = self.section(&mut s, "search");
        let ladder_s: Vec<f64> = self.get(
            &mut q,
            "ladder_s",
            vec![0.01, 0.03, 0.1, 0.3, 1.0, 3.0, 10.0, 30.0],
        );
        if ladder_s.is_empty() || ladder_s.len() > 32 {
            self.problem(q.key("ladder_s"), "needs 1 to 32 timescales");
        }
        if ladder_s
            .iter()
            .any(|t| !(t.is_finite() && *t >= 1e-4 && *t <= 3600.0))
        {
            self.problem(
                q.key("ladder_s"),
                "every timescale must lie in [0.0001, 3600] seconds",
            );
        }
        if ladder_s.windows(2).any(|w| w[1] <= w[0]) {
            self.problem(q.key("ladder_s"), "timescales must be strictly increasing");
        }
        let search_radius_deg: f64 = self.get(&mut q, "search_radius_deg", 0.5);
        self.in_range(&q, "search_radius_deg", search_radius_deg, 0.01, 10.0);
        let far_per_year: f64 = self.get(&mut q, "far_per_year", 1.0);
        self.positive(&q, "far_per_year", far_per_year);
        let rate_window_s: f64 = self.get(&mut q, "rate_window_s", 60.0);
        self.positive(&q, "rate_window_s", rate_window_s);
        let acceptance_tau_s: f64 = self.get(&mut q, "acceptance_tau_s", 6.0 * 3600.0);
        self.positive(&q, "acceptance_tau_s", acceptance_tau_s);
        let warmup: i64 = self.get(&mut q, "warmup_photons", 20_000);
        if warmup < 0 {
            self.problem(q.key("warmup_photons"), format!("{warmup} must be >= 0"));
        }
        let acceptance_prior: bool = self.get(&mut q, "acceptance_prior", true);
        let reorder_tolerance_s: f64 = self.get(&mut q, "reorder_tolerance_s", 0.02);
        self.in_range(&q, "reorder_tolerance_s", reorder_tolerance_s, 0.0, 60.0);
        let max_clock_jump_s: f64 = self.get(&mut q, "max_clock_jump_s", 3600.0);
        self.positive(&q, "max_clock_jump_s", max_clock_jump_s);
        let search = SearchConfig {
            ladder_s,
            search_radius_deg,
            far_per_year,
            rate_window_s,
            acceptance_tau_s,
            warmup_photons: warmup.max(0) as u64,
            acceptance_prior,
            reorder_tolerance_s,
            max_clock_jump_s,
        };
        self.finish(q);

        let mut a = self.section(&mut s, "assess");
        let mut num = |r: &mut Self, k: &str, default: f64, lo: f64, hi: f64| {
            let v: f64 = r.get(&mut a, k, default);
            r.in_range(&a, k, v, lo, hi)
        };
        let assess = AssessSettings {
            persistence_min_s: num(self, "persistence_min_s", 30.0, 0.1, 86_400.0),
            persistence_timescale_factor: num(self, "persistence_timescale_factor", 10.0, 1.0, 1000.0),
            pre_window_s: num(self, "pre_window_s", 120.0, 0.0, 3600.0),
            post_sigma_max: num(self, "post_sigma_max", 3.0, 0.0, 100.0),
            pre_sigma_max: num(self, "pre_sigma_max", 2.5, 0.0, 100.0),
            all_sky_sigma_max: num(self, "all_sky_sigma_max", 5.0, 0.0, 100.0),
            identical_fraction_max: num(self, "identical_fraction_max", 0.5, 0.0, 1.0),
            spread_ratio_max: num(self, "spread_ratio_max", 2.5, 1.0, 100.0),
            spread_sigma_max: num(self, "spread_sigma_max", 3.5, 0.0, 100.0),
            shape_log_ratio_min: num(self, "shape_log_ratio_min", 10.0, -1000.0, 1000.0),
            shape_p_max: num(self, "shape_p_max", 1.0, 0.0, 1.0),
            max_dead_fraction: num(self, "max_dead_fraction", 0.1, 0.0, 1.0),
        };
        self.finish(a);
        self.finish(s);

        let (id, token, spec) = (id?, token?, spec?);
        let response = match InstrumentResponse::from_spec(&spec.response) {
            Ok(r) => r,
            Err(e) => {
                self.problem(format!("instrument[{id}].response"), e.to_string());
                return None;
            }
        };
        Some(InstrumentConfig {
            id,
            token,
            spec,
            response,
            search,
            assess,
            trials: None,
        })
    }

    /// The instrument block: inline `site`/`response`/`background` tables, or `spec_file` naming a file (or
    /// `builtin:NAME`) that holds them.
    fn instrument_spec(&mut self, s: &mut Section) -> Option<InstrumentSpec> {
        let spec_file: Option<String> = self.opt(s, "spec_file");
        let inline: Vec<&str> = ["site", "response", "background"]
            .into_iter()
            .filter(|k| s.table.contains_key(*k))
            .collect();
        let (table, origin) = match spec_file {
            Some(f) => {
                if !inline.is_empty() {
                    self.problem(
                        s.key("spec_file"),
                        format!(
                            "give spec_file or inline tables ({}), not both",
                            inline.join(", ")
                        ),
                    );
                    return None;
                }
                let (text, origin) = if let Some(name) = f.strip_prefix("builtin:") {
                    match builtin_instrument(name) {
                        Some(t) => (t.to_string(), f.clone()),
                        None => {
                            let known: Vec<_> = BUILTIN_INSTRUMENTS.iter().map(|(n, _)| *n).collect();
                            self.problem(
                                s.key("spec_file"),
                                format!("no built-in instrument '{name}' (known: {})", known.join(", ")),
                            );
                            return None;
                        }
                    }
                } else {
                    let p = self.path(&f);
                    match std::fs::read_to_string(&p) {
                        Ok(t) => (t, p.display().to_string()),
                        Err(e) => {
                            self.problem(s.key("spec_file"), format!("cannot read {}: {e}", p.display()));
                            return None;
                        }
                    }
                };
                match text.parse::<Table>() {
                    Ok(t) => (t, origin),
                    Err(e) => {
                        self.problem(s.key("spec_file"), format!("{origin}: {}", e.to_string().trim()));
                        return None;
                    }
                }
            }
            None => {
                let mut t = Table::new();
                for k in ["site", "response", "background"] {
                    if let Some(v) = s.table.remove(k) {
                        t.insert(k.to_string(), v);
                    }
                }
                (t, String::new())
            }
        };
        let key = if origin.is_empty() {
            s.prefix.clone()
        } else {
            format!("{} ({origin})", s.prefix)
        };
        match Value::Table(table).try_into::<InstrumentSpec>() {
            Ok(spec) => {
                let mut probs = Vec::new();
                if spec.check(&key, &mut probs) {
                    Some(spec)
                } else {
                    for p in probs {
                        self.problem(p.key, p.message);
                    }
                    None
                }
            }
            Err(e) => {
                self.problem(key, e.to_string().trim().replace('\n', " "));
                None
            }
        }
    }
}

/// Where an instrument's effective-trials calibration lives: `<state_dir>/calibration/<id>.toml`.
pub(crate) fn calibration_path(state_dir: &Path, instrument: &str) -> PathBuf {
    state_dir.join("calibration").join(format!("{instrument}.toml"))
}

/// Reads an instrument's calibration: None when there is no file, an error naming the file when it cannot
/// be read or parsed. Whether it fits the search is checked with the engine's configuration.
pub(crate) fn load_calibration(
    state_dir: &Path,
    instrument: &str,
) -> Result<Option<TrialsCalibration>, String> {
    let path = calibration_path(state_dir, instrument);
    let text = match std::fs::read_to_string(&path) {
        Ok(t) => t,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(None),
        Err(e) => return Err(format!("cannot read {}: {e}", path.display())),
    };
    toml::from_str(&text)
        .map(Some)
        .map_err(|e| format!("{} is not a trials calibration: {e}", path.display()))
}

/// `$TMPDIR` in `state_dir` expands to the system's temporary directory, so the embedded default works for
/// any user.
/// `"HH:MM-HH:MM"` to minutes of the day; equal ends are refused (a span of nothing or everything).
fn parse_quiet(text: &str) -> Option<(u32, u32)> {
    let minute = |t: &str| -> Option<u32> {
        let (h, m) = t.trim().split_once(':')?;
        let (h, m): (u32, u32) = (h.parse().ok()?, m.parse().ok()?);
        (h < 24 && m < 60).then_some(h * 60 + m)
    };
    let (a, b) = text.split_once('-')?;
    let (a, b) = (minute(a)?, minute(b)?);
    (a != b).then_some((a, b))
}

fn expand_tmp(p: &str) -> String {
    p.replace("$TMPDIR", &std::env::temp_dir().display().to_string())
}

/// Loads the configuration named on the command line, or the embedded default. A configuration that does not
/// compile is printed with every problem and turned into exit code 2 by the caller.
pub(crate) fn load_config(path: Option<&PathBuf>) -> Result<Config, ConfigError> {
    match path {
        Some(p) => Config::load(p),
        None => Config::embedded_default(),
    }
}

/// Error type that carries the exit code for a configuration that does not compile.
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub(crate) struct BadConfig(pub(crate) ConfigError);

/// Loads the configuration or returns a `BadConfig` error (exit code 2).
pub(crate) fn config_or_exit(path: Option<&PathBuf>) -> anyhow::Result<Config> {
    load_config(path).map_err(|e| BadConfig(e).into())
}

/// Compares a token in constant time (for equal lengths; the length itself is not secret).
pub(crate) fn token_matches(given: &str, expected: &Secret) -> bool {
    given.as_bytes().ct_eq(expected.expose().as_bytes()).into()
}

/// A subject prefix: one or more dot-separated tokens without wildcards or whitespace.
pub(crate) fn check_subject_prefix(p: &str) -> Result<(), String> {
    let ok = !p.is_empty()
        && p.split('.')
            .all(|t| !t.is_empty() && !t.chars().any(|c| c.is_whitespace() || matches!(c, '*' | '>')));
    if ok {
        Ok(())
    } else {
        Err(format!(
            "'{p}' is not a subject prefix (dot-separated tokens, none empty, no spaces, '*' or '>')"
        ))
    }
}

#[cfg(test)]
mod tests {
    #[test]
    fn tokens_compare_exactly() {
        let t = Secret::new("demo-subscriber-token");
        assert!(token_matches("demo-subscriber-token", &t));
        assert!(!token_matches("demo-subscriber-tokeN", &t));
        assert!(!token_matches("demo-subscriber-token ", &t));
        assert!(!token_matches("", &t));
    }

    use super::*;

    #[test]
    fn embedded_default_compiles() {
        let c = Config::from_toml(EMBEDDED_DEFAULT, "<embedded default>", Path::new("."), false)
            .unwrap_or_else(|e| panic!("{e}"));
        assert_eq!(c.instruments.len(), 1);
        assert!(c.ingest.listen.ip().is_loopback());
        assert!(c.subscribers.listen.ip().is_loopback());
        assert_eq!(c.instruments[0].search.ladder_s.len(), 8);
    }

    #[test]
    fn bus_block_is_checked_and_the_shipped_files_compile() {
        let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("../../deploy");
        let shipped = std::fs::read_to_string(root.join("glint.toml")).unwrap();
        let on = shipped.replace(
            "url = \"\"",
            "url = \"nats://127.0.0.1:4222\"\nstream_file = \"nats/glint-alerts-stream.json\"",
        );
        let cfg = Config::from_toml(&on, "glint.toml", &root, false).unwrap();
        let bus = cfg.bus.expect("the bus is on");
        assert_eq!(
            (bus.subject_prefix.as_str(), bus.stream.as_str()),
            ("glint.alerts", "GLINT_ALERTS")
        );
        assert_eq!(bus.ack_timeout, Duration::from_secs(5));
        // Off by default.
        assert!(
            Config::from_toml(&shipped, "glint.toml", &root, false)
                .unwrap()
                .bus
                .is_none()
        );
        let c = CoincideConfig::load(&root.join("coincide.toml")).unwrap();
        assert_eq!(c.sites.len(), 2);
        assert!(is_coincide_config(
            &std::fs::read_to_string(root.join("coincide.toml")).unwrap()
        ));
        let bad = r#"
            [bus]
            url = "http://x"
            subject_prefix = "a..b"
            stream = "a.b"
            stream_file = "/nonexistent/stream.json"
            bogus = 1
        "#;
        let text = format!(
            "{bad}\n[[instrument]]\nid = \"a\"\ntoken = \"12345678\"\nspec_file = \"builtin:ventisca-array\"\n"
        );
        let e = Config::from_toml(&text, "bad.toml", Path::new("."), false).expect_err("must fail");
        let keys: Vec<&str> = e.problems.iter().map(|p| p.key.as_str()).collect();
        for k in [
            "bus.url",
            "bus.subject_prefix",
            "bus.stream",
            "bus.stream_file",
            "bus.bogus",
        ] {
            assert!(keys.contains(&k), "missing problem for {k}; got {keys:?}");
        }
        let e = CoincideConfig::from_toml("[coincide]\n", "c.toml", Path::new(".")).expect_err("must fail");
        let keys: Vec<&str> = e.problems.iter().map(|p| p.key.as_str()).collect();
        assert!(keys.contains(&"bus.url") && keys.contains(&"site"), "{keys:?}");
    }

    #[test]
    fn every_problem_is_reported_at_once() {
        let text = r#"
            [daemon]
            log_format = "xml"
            bogus = 1
            [ingest]
            listen = "not-an-address"
            queue_batches = "many"
            [[instrument]]
            id = "a b"
            token_file = "/nonexistent/glint-token"
            spec_file = "builtin:ventisca-array"
            [instrument.search]
            far_per_year = -1.0
            ladder_s = [1.0, 0.5]
        "#;
        let e = Config::from_toml(text, "broken.toml", Path::new("."), false).expect_err("must fail");
        let keys: Vec<&str> = e.problems.iter().map(|p| p.key.as_str()).collect();
        for k in [
            "daemon.log_format",
            "daemon.bogus",
            "ingest.listen",
            "ingest.queue_batches",
            "instrument[0].id",
            "instrument[0].token_file",
            "instrument[0].search.far_per_year",
            "instrument[0].search.ladder_s",
        ] {
            assert!(keys.contains(&k), "missing problem for {k}; got {keys:?}");
        }
        let shown = e.to_string();
        assert!(
            shown.contains("broken.toml: daemon.bogus: unknown key"),
            "{shown}"
        );
    }

    #[test]
    fn plain_remote_listener_needs_explicit_permission() {
        let text = EMBEDDED_DEFAULT.replace("listen = \"127.0.0.1:7601\"", "listen = \"0.0.0.0:7601\"");
        let e = Config::from_toml(&text, "x.toml", Path::new("."), false).expect_err("must fail");
        assert!(
            e.problems
                .iter()
                .any(|p| p.key == "ingest.listen" && p.message.contains("TLS")),
            "{e}"
        );
        let ok = text.replace("[ingest]", "[ingest]\nallow_plain_remote = true");
        Config::from_toml(&ok, "x.toml", Path::new("."), false).unwrap_or_else(|e| panic!("{e}"));
    }

    /// The reference configuration with its commented-out `[email]` block switched on.
    fn reference_with_email() -> String {
        include_str!("../../../deploy/glint.toml")
            .lines()
            .map(|l| match l.strip_prefix('#') {
                Some(rest) if rest.starts_with(|c: char| c.is_ascii_lowercase() || c == '[') => rest,
                _ => l,
            })
            .collect::<Vec<_>>()
            .join("\n")
    }

    fn deploy_dir() -> PathBuf {
        Path::new(env!("CARGO_MANIFEST_DIR")).join("../../deploy")
    }

    #[test]
    fn reference_email_block_compiles() {
        let cfg = Config::from_toml(&reference_with_email(), "ref", &deploy_dir(), false).unwrap();
        let e = cfg.email.unwrap();
        assert_eq!((e.relay_host.as_str(), e.relay_port), ("smtp.example.org", 587));
        assert_eq!(e.tls, EmailTls::StartTls);
        assert_eq!(e.recipients.len(), 1);
        let r = &e.recipients[0];
        assert_eq!(r.address.email.to_string(), "oncall@example.org");
        assert_eq!((r.max_per_window, r.window), (10, Duration::from_secs(3600)));
        let q = r.quiet.unwrap();
        assert_eq!((q.start_min, q.end_min, q.min_sigma), (22 * 60, 6 * 60, 5.0));
        assert!(q.contains(23 * 60) && q.contains(0) && !q.contains(6 * 60) && !q.contains(12 * 60));
    }

    #[test]
    fn email_problems_are_all_reported() {
        let text = reference_with_email()
            .replace("relay = \"smtp.example.org:587\"", "relay = \"smtp.example.org\"")
            .replace(
                "from = \"glint <glint@example.org>\"",
                "from = \"not an address\"",
            )
            .replace("# tls_ca_file", "tls_ca_file")
            .replace("# username", "username")
            .replace(
                "# password_file = \"/etc/glint/smtp.password\"",
                "password_file = \"/nowhere/pw\"",
            )
            .replace("min_sigma = 0.0", "min_sigma = 0.0\nmax_per_minute = 2")
            .replace("\"22:00-06:00\"", "\"25:00-06:00\"")
            .replace(
                "kinds = [\"flash\", \"assessment\", \"withdrawal\", \"test\"]",
                "kinds = [\"heartbeat\"]",
            );
        let err = Config::from_toml(&text, "ref", &deploy_dir(), false).unwrap_err();
        let keys: Vec<&str> = err.problems.iter().map(|p| p.key.as_str()).collect();
        for want in [
            "email.relay",
            "email.from",
            "email.tls_ca_file",
            "email.password_file",
            "email.recipient[0].max_per_minute",
            "email.recipient[0].quiet_hours_utc",
            "email.recipient[0].kinds",
        ] {
            assert!(keys.contains(&want), "{want} not reported: {err}");
        }
        // Plain SMTP to a remote relay needs saying so.
        let plain = reference_with_email().replace("tls = \"starttls\"", "tls = \"none\"");
        let err = Config::from_toml(&plain, "ref", &deploy_dir(), false).unwrap_err();
        assert_eq!(err.problems.len(), 1, "{err}");
        assert_eq!(err.problems[0].key, "email.tls");
        let allowed = plain.replace("allow_plain_remote = false", "allow_plain_remote = true");
        assert!(Config::from_toml(&allowed, "ref", &deploy_dir(), false).is_ok());
    }
}

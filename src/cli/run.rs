//! `spillway run SITE.yaml`: the banner, the site, then the daemon until SIGINT/SIGTERM.

use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::process::ExitCode;
use std::sync::Arc;

use spillway::config::{self, LoadError, Loaded};
use spillway::daemon::{self, banner, state_file};
use tracing::info;

use super::logging::{self, LogFormat};

/// Arguments of `run`.
#[derive(Debug, clap::Args)]
pub struct RunArgs {
    /// The site file (YAML).
    pub site: PathBuf,
    /// Where the counters (run time and energy today, obligation progress) are kept
    /// across restarts [default: <site>.state.json next to the site file].
    #[arg(long, value_name = "FILE")]
    pub state: Option<PathBuf>,
    /// Serve the status page and JSON API: `--http` alone binds 127.0.0.1:8080, a bare
    /// port binds that port on loopback, an address binds where it says.
    #[arg(long, value_name = "ADDR", num_args = 0..=1, default_missing_value = "127.0.0.1:8080", value_parser = parse_http)]
    pub http: Option<SocketAddr>,
    /// Append the site's PV and household power (without the managed loads), averaged
    /// per interval, to this CSV: the recording `spillway replay` reads, to try other
    /// rules on the site's own days. Created with its header if absent; appended to if
    /// it is this site's log.
    #[arg(long, value_name = "FILE")]
    pub replay_log: Option<PathBuf>,
    /// The interval each replay-log row averages (10s to 15min).
    #[arg(long, value_name = "DURATION", default_value = "1min", value_parser = super::parse_duration, requires = "replay_log")]
    pub replay_log_every: std::time::Duration,
}

/// `8080` → `127.0.0.1:8080`; `0.0.0.0:8080` as given.
pub fn parse_http(text: &str) -> Result<SocketAddr, String> {
    if let Ok(port) = text.parse::<u16>() {
        return Ok(SocketAddr::from(([127, 0, 0, 1], port)));
    }
    text.parse::<SocketAddr>().map_err(|_| format!("`{text}` is not a port or an address like 127.0.0.1:8080"))
}

/// Loads a site file or prints its located errors; `Err(code)` is the exit code.
pub fn load_site(path: &Path) -> Result<Loaded, ExitCode> {
    match config::load_file(path) {
        Ok(loaded) => {
            if !loaded.warnings.is_empty() {
                eprint!(
                    "{}",
                    spillway::diag::render(&loaded.source.path, &loaded.source.text, &loaded.warnings, super::color())
                );
            }
            Ok(loaded)
        }
        Err(e @ LoadError::Invalid { .. }) => {
            eprint!("{}", e.render(super::color()));
            eprintln!("{e}");
            Err(ExitCode::from(1))
        }
        // An unreadable file stops the command (2), as for every other command; a file
        // that reads but does not check is a checked problem (1).
        Err(e) => {
            eprintln!("error: {e}");
            Err(ExitCode::from(2))
        }
    }
}

/// Prints the start-up banner (human logs) or logs it as one event (JSON logs, so the
/// stream stays machine-readable).
pub fn print_banner(site: &spillway::config::model::Site, format: LogFormat) {
    match format {
        LogFormat::Human => {
            for line in banner::lines(site, env!("CARGO_PKG_VERSION")) {
                eprintln!("{line}");
            }
            eprintln!();
        }
        LogFormat::Json => info!(
            safety = %banner::notice(site).join(" "),
            site = %site.name,
            export = %spillway::status::export_policy(site),
            "spillway starting"
        ),
    }
}

pub fn run(args: RunArgs, format: LogFormat) -> anyhow::Result<ExitCode> {
    let loaded = match load_site(&args.site) {
        Ok(l) => l,
        Err(code) => return Ok(code),
    };
    // Held until the daemon has stopped: one controller per site.
    let _lock = match super::lock::lock_or_explain(&args.site, "run") {
        Ok(lock) => lock,
        Err(message) => {
            eprintln!("error: {message}");
            return Ok(ExitCode::from(2));
        }
    };
    logging::init(format, "info");
    print_banner(&loaded.site, format);
    let state = args.state.unwrap_or_else(|| state_file::default_path(&args.site));
    info!(site = %loaded.site.name, state = %state.display(), "site loaded");
    let replay_log =
        args.replay_log.map(|path| daemon::replay_log::ReplayLogOptions { path, every: args.replay_log_every });
    let options =
        daemon::Options { state_file: Some(state), http: args.http, replay_log, ..daemon::Options::default() };
    let summary = daemon::run(Arc::new(loaded.site), options, |_| {})?;
    info!(
        ticks = summary.ticks,
        switchings = summary.switchings,
        failsafe_entries = summary.failsafe_entries,
        export_over_limit_s = summary.export_over_limit_s.round(),
        import_kwh = (summary.import_wh / 10.0).round() / 100.0,
        export_kwh = (summary.export_wh / 10.0).round() / 100.0,
        exceptions = summary.exceptions,
        malformed = summary.malformed,
        "stopped"
    );
    if let Some(w) = summary.replay_log {
        info!(
            rows = w.rows,
            written_late = w.late,
            dropped = w.dropped,
            unwritten = w.unwritten,
            curtailed_rows = w.curtailed,
            "replay log closed"
        );
    }
    Ok(ExitCode::SUCCESS)
}

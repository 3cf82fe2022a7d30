//! The tracing subscriber of the binary: human-readable or JSON lines on stderr, the
//! level from `RUST_LOG` (tracing's `EnvFilter` syntax) or the verb's default.

use std::io::IsTerminal;

use clap::ValueEnum;
use tracing_subscriber::EnvFilter;

/// How log lines look.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum LogFormat {
    /// One readable line per event.
    Human,
    /// One JSON object per line (for journald, Loki and the like).
    Json,
}

/// The Modbus client library's own log: it warns about every undecodable byte of a
/// garbled RTU answer (a dozen lines a frame, unthrottled). The serial line reports
/// garbled answers itself, once a minute (`sources/modbus/serial.rs`), so the
/// library's target is off unless `RUST_LOG` names it (`RUST_LOG=info,tokio_modbus=debug`).
const QUIET: &str = "tokio_modbus=off";

/// The filter text: `wanted`, with the client library's target off unless it names it.
fn with_quiet_library(wanted: &str) -> String {
    if wanted.contains("tokio_modbus") { wanted.to_owned() } else { format!("{wanted},{QUIET}") }
}

/// Installs the subscriber; `default` applies when `RUST_LOG` is unset or invalid.
pub fn init(format: LogFormat, default: &str) {
    let filter = match std::env::var("RUST_LOG") {
        Ok(v) if !v.trim().is_empty() => EnvFilter::try_new(with_quiet_library(&v)).unwrap_or_else(|e| {
            eprintln!("warning: RUST_LOG={v:?} is not a valid filter ({e}); using {default:?}");
            EnvFilter::new(with_quiet_library(default))
        }),
        _ => EnvFilter::new(with_quiet_library(default)),
    };
    let builder = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_writer(std::io::stderr)
        .with_ansi(std::io::stderr().is_terminal() && std::env::var_os("NO_COLOR").is_none());
    // `try_init`: a second installation (tests calling the CLI twice) is harmless.
    let _ = match format {
        LogFormat::Human => builder.try_init(),
        LogFormat::Json => builder.json().flatten_event(true).with_current_span(false).try_init(),
    };
}

#[cfg(test)]
mod tests {
    use super::with_quiet_library;

    #[test]
    fn the_client_library_is_quiet_unless_asked_for() {
        assert_eq!(with_quiet_library("info"), "info,tokio_modbus=off");
        assert_eq!(with_quiet_library("spillway=debug"), "spillway=debug,tokio_modbus=off");
        assert_eq!(with_quiet_library("info,tokio_modbus=warn"), "info,tokio_modbus=warn");
    }
}

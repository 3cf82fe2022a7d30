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

/// Installs the subscriber; `default` applies when `RUST_LOG` is unset or invalid.
pub fn init(format: LogFormat, default: &str) {
    let filter = match std::env::var("RUST_LOG") {
        Ok(v) if !v.trim().is_empty() => EnvFilter::try_new(&v).unwrap_or_else(|e| {
            eprintln!("warning: RUST_LOG={v:?} is not a valid filter ({e}); using {default:?}");
            EnvFilter::new(default)
        }),
        _ => EnvFilter::new(default),
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

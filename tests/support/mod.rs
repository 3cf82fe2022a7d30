//! Test-support code shared by the adapter tests: a Modbus TCP test server, a small
//! MQTT broker, an RTU responder for a pseudo-terminal, and site helpers.
//!
//! This is test code, not a product part: it does just enough of each protocol to
//! drive the links over real loopback sockets and to inject faults.
#![allow(dead_code)]

pub mod broker;
pub mod modbus;
pub mod rtu;

use std::sync::Arc;
use std::time::Duration;

use spillway::config::model::Site;
use spillway::sources::SourceEvent;
use tokio::sync::mpsc;

/// Loads a site from YAML text, panicking with the rendered diagnostics.
pub fn site(yaml: &str) -> Arc<Site> {
    match spillway::config::load_str("test.yaml", yaml) {
        Ok(l) => Arc::new(l.site),
        Err(e) => panic!("{}", e.render(false)),
    }
}

/// Waits for the first event that `pick` accepts, skipping others; panics after
/// `limit` of (tokio) time.
pub async fn wait_for<T>(
    rx: &mut mpsc::Receiver<SourceEvent>,
    limit: Duration,
    mut pick: impl FnMut(&SourceEvent) -> Option<T>,
) -> T {
    let deadline = tokio::time::Instant::now() + limit;
    loop {
        match tokio::time::timeout_at(deadline, rx.recv()).await {
            Ok(Some(ev)) => {
                if let Some(t) = pick(&ev) {
                    return t;
                }
            }
            Ok(None) => panic!("event channel closed"),
            Err(_) => panic!("no matching event within {limit:?}"),
        }
    }
}

/// Collects every event that arrives within `d` (tokio time).
pub async fn drain_for(rx: &mut mpsc::Receiver<SourceEvent>, d: Duration) -> Vec<SourceEvent> {
    let deadline = tokio::time::Instant::now() + d;
    let mut out = Vec::new();
    while let Ok(Some(ev)) = tokio::time::timeout_at(deadline, rx.recv()).await {
        out.push(ev);
    }
    out
}

/// Waits (in tokio time, yielding to other tasks) until `cond` holds; panics after 5 s.
pub async fn until(what: &str, mut cond: impl FnMut() -> bool) {
    let deadline = tokio::time::Instant::now() + Duration::from_secs(5);
    while !cond() {
        assert!(tokio::time::Instant::now() < deadline, "never: {what}");
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
}

/// The log lines of code under test, kept for the test to read. Capture covers the
/// current thread (a `#[tokio::test]` runtime runs its tasks there) while the guard lives.
#[derive(Clone, Default)]
pub struct Logs(Arc<std::sync::Mutex<Vec<u8>>>);

impl Logs {
    /// Starts capturing every level, without colour.
    pub fn capture() -> (Logs, tracing::subscriber::DefaultGuard) {
        let logs = Logs::default();
        let writer = logs.clone();
        let subscriber = tracing_subscriber::fmt()
            .with_ansi(false)
            .with_max_level(tracing::Level::DEBUG)
            .with_writer(move || writer.clone())
            .finish();
        let guard = tracing::subscriber::set_default(subscriber);
        // A callsite another test reached first, with no subscriber of its own, may have
        // cached "never": ask every callsite again now that this one exists.
        tracing::callsite::rebuild_interest_cache();
        (logs, guard)
    }

    /// Everything logged so far.
    pub fn text(&self) -> String {
        String::from_utf8_lossy(&self.0.lock().unwrap()).into_owned()
    }
}

impl std::io::Write for Logs {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        self.0.lock().unwrap().extend_from_slice(buf);
        Ok(buf.len())
    }
    fn flush(&mut self) -> std::io::Result<()> {
        Ok(())
    }
}

//! The replay log: what the site's PV and household really did, averaged over an
//! interval (a minute by default) and appended to a CSV that `spillway replay` reads
//! back, so that rules can be tried offline against the site's own days before they
//! are trusted with its relays.
//!
//! ```text
//! time,pv_w,house_w[,pv_available_w]
//! 2026-06-02T09:14:30Z,2710,412
//! ```
//!
//! - `house_w` is the household without the managed loads (`status::house_power`), which
//!   is what a replay wants: it simulates the managed loads itself.
//! - A row is stamped at the mean time of the ticks it averages, in UTC to the second;
//!   ticks whose PV or house is unknown (a stale meter) are left out, and an interval
//!   with none gives no row: a gap, which a replay bridges and reports.
//! - The control task never waits on the disk (an SD card can stall for seconds, and
//!   the daemon's runtime has one thread): rows go over a channel to a thread of their
//!   own, which opens the file, appends and closes it for every row. A log moved aside
//!   while the daemon runs is started afresh, header first. A row that cannot be written
//!   (disk full, directory gone) is kept, up to a week of rows, and tried again with
//!   the next; the log says when writing fails and when it works again. A line left
//!   half-written by a failure stays on a line of its own, where a replay rejects it by
//!   its number, and the whole row follows it.

use std::collections::VecDeque;
use std::fs::{File, OpenOptions};
use std::io::{self, Read, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex, mpsc};
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

use chrono::{DateTime, SecondsFormat};
use tracing::{error, info, warn};

use crate::config::model::{Connection, Site};
use crate::status::ReplayLogStatus;
use crate::units::{Timestamp, format_duration};

/// How often a row is written unless `--replay-log-every` says otherwise.
pub const DEFAULT_EVERY: Duration = Duration::from_secs(60);
/// The shortest interval: shorter rows would not tell a replay more than the simulator's
/// own interpolation, and would fill a small card (50 bytes a row).
pub const MIN_EVERY: Duration = Duration::from_secs(10);
/// The longest: a replay reports every gap over 15 minutes.
pub const MAX_EVERY: Duration = Duration::from_secs(15 * 60);
/// Rows kept in memory while the file cannot be written: a week of minutes.
const MAX_PENDING: usize = 7 * 24 * 60;
/// How often a failure that goes on is logged again.
const REPEAT_WARNING: Duration = Duration::from_secs(3600);

/// Where and how often.
#[derive(Debug, Clone, PartialEq)]
pub struct ReplayLogOptions {
    /// The CSV file; created if absent, appended to if it is this site's log.
    pub path: PathBuf,
    /// The interval each row averages.
    pub every: Duration,
}

/// Why the log cannot be kept; checked before the daemon touches any device.
#[derive(Debug, thiserror::Error)]
pub enum ReplayLogError {
    /// The file cannot be created, read or appended to.
    #[error("cannot keep the replay log in {path}: {source}; give a file in a directory the daemon may write to")]
    File {
        /// The file.
        path: PathBuf,
        /// Why.
        #[source]
        source: io::Error,
    },
    /// The file holds something else.
    #[error(
        "{path} is not a replay log with this site's columns: its first line is `{found}` where this site writes `{expected}`; give another file, or move that one aside"
    )]
    Header {
        /// The file.
        path: PathBuf,
        /// Its first line.
        found: String,
        /// The header this site writes.
        expected: String,
    },
    /// An interval out of range.
    #[error("--replay-log-every must lie between {} and {}, not {}", format_duration(MIN_EVERY), format_duration(MAX_EVERY), format_duration(*.0))]
    Every(Duration),
    /// The site cannot tell its household apart.
    #[error("the replay log needs {0}")]
    Unsuited(&'static str),
}

/// The file's first line for this site: `pv_available_w` only where the site reads
/// what a curtailed inverter could give.
pub fn header(site: &Site) -> &'static str {
    if site.roles.pv_available.is_some() { "time,pv_w,house_w,pv_available_w" } else { "time,pv_w,house_w" }
}

/// Checks that the site can keep a log and that the file can take it: it is absent,
/// empty, or a log with this site's header. Creates nothing.
pub fn check(site: &Site, options: &ReplayLogOptions) -> Result<(), ReplayLogError> {
    if !(MIN_EVERY..=MAX_EVERY).contains(&options.every) {
        return Err(ReplayLogError::Every(options.every));
    }
    if matches!(site.connection, Connection::OffGrid(_)) {
        return Err(ReplayLogError::Unsuited(
            "a grid meter: off-grid, the PV reading is what the charge controller let through, not what the array could give, and a replay would take it for the array",
        ));
    }
    if site.roles.pv.is_none() || site.roles.grid.is_none() {
        return Err(ReplayLogError::Unsuited(
            "the `pv` and `grid` points: the household is PV + grid − the managed loads",
        ));
    }
    let file_error = |source| ReplayLogError::File { path: options.path.clone(), source };
    let mut file = match File::open(&options.path) {
        Ok(f) => f,
        Err(e) if e.kind() == io::ErrorKind::NotFound => {
            // The directory must exist and take a new file; try it without leaving one.
            let dir = options.path.parent().filter(|d| !d.as_os_str().is_empty()).unwrap_or(Path::new("."));
            let meta = std::fs::metadata(dir).map_err(file_error)?;
            if !meta.is_dir() {
                return Err(file_error(io::Error::other(format!("{} is not a directory", dir.display()))));
            }
            return Ok(());
        }
        Err(e) => return Err(file_error(e)),
    };
    let mut first = Vec::new();
    let mut byte = [0u8; 1];
    while first.len() < 256 && file.read(&mut byte).map_err(file_error)? == 1 && byte[0] != b'\n' {
        first.push(byte[0]);
    }
    let found = String::from_utf8_lossy(&first).trim_end_matches('\r').to_owned();
    if !found.is_empty() && found != header(site) {
        return Err(ReplayLogError::Header { path: options.path.clone(), found, expected: header(site).to_owned() });
    }
    // Appending is what the writer does; a read-only file says so now, not a minute in.
    OpenOptions::new().append(true).open(&options.path).map_err(file_error)?;
    Ok(())
}

/// What the writer did, for the daemon's last line.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct Written {
    /// Rows appended to the file.
    pub rows: u64,
    /// Of them, rows written only after a failed attempt.
    pub late: u64,
    /// Rows given up because more than a week of them waited (the oldest go first).
    pub dropped: u64,
    /// Rows still unwritten when the daemon stopped (the error was logged).
    pub unwritten: u64,
    /// Rows averaged over a time the inverter was held back on a site without a
    /// `pv_available` point: their `pv_w` is what the inverter was allowed to give.
    pub curtailed: u64,
}

/// What the writer thread shows the control task while it runs (for the status page).
#[derive(Debug, Default)]
struct Progress {
    rows_written: AtomicU64,
    rows_waiting: AtomicU64,
    /// The last write's error while writing fails.
    error: Mutex<Option<String>>,
}

impl Progress {
    fn set_error(&self, error: Option<String>) {
        if let Ok(mut e) = self.error.lock() {
            *e = error;
        }
    }
}

/// One interval's sums.
#[derive(Debug, Clone, Copy)]
struct Bucket {
    index: i64,
    ticks: u32,
    time_sum_ms: i128,
    pv_sum: f64,
    house_sum: f64,
    available_sum: f64,
    available_ticks: u32,
    curtailed: bool,
}

/// The control task's end: averages ticks into rows and hands them to the writer.
#[derive(Debug)]
pub(crate) struct ReplayLog {
    every_ms: i64,
    with_available: bool,
    bucket: Option<Bucket>,
    last_stamp_s: Option<i64>,
    curtailed: u64,
    rows: Option<mpsc::Sender<String>>,
    writer: Option<JoinHandle<Written>>,
    /// How long after a load switched the grid reading may not show it yet (the grid
    /// point's latency and one poll), and until when ticks are left out for that.
    settle_ms: i64,
    quiet_until: i64,
    file: String,
    progress: Arc<Progress>,
}

impl ReplayLog {
    /// Checks the file (see [`check`]) and starts the writer thread.
    pub(crate) fn start(site: &Site, options: &ReplayLogOptions) -> Result<ReplayLog, ReplayLogError> {
        check(site, options)?;
        let (tx, rx) = mpsc::channel::<String>();
        let path = options.path.clone();
        let head = header(site);
        let progress = Arc::new(Progress::default());
        let shown = Arc::clone(&progress);
        let writer = std::thread::Builder::new()
            .name("replay-log".to_owned())
            .spawn(move || write_rows(&path, &rx, MAX_PENDING, &shown, |rows| append(&path, head, rows)))
            .map_err(|source| ReplayLogError::File { path: options.path.clone(), source })?;
        if site.roles.pv_available.is_none() && site.inverter.is_some() {
            warn!(
                "the replay log's PV is what the inverter gave: while it is curtailed that is less than the array could give, and a replay will take it for the array; a `pv_available` point records the rest"
            );
        }
        info!(file = %options.path.display(), every = %format_duration(options.every), "replay log: PV and household power appended for `spillway replay`");
        Ok(ReplayLog {
            every_ms: i64::try_from(options.every.as_millis()).unwrap_or(i64::MAX),
            with_available: site.roles.pv_available.is_some(),
            bucket: None,
            last_stamp_s: None,
            curtailed: 0,
            rows: Some(tx),
            writer: Some(writer),
            settle_ms: site
                .roles
                .grid
                .and_then(|g| site.points.get(g.0))
                .map_or(0, |p| i64::try_from((p.latency + p.poll).as_millis()).unwrap_or(i64::MAX)),
            quiet_until: i64::MIN,
            file: options.path.display().to_string(),
            progress,
        })
    }

    /// How the writing goes, for the status document.
    pub(crate) fn status(&self) -> ReplayLogStatus {
        ReplayLogStatus {
            file: self.file.clone(),
            rows_written: self.progress.rows_written.load(Ordering::Relaxed),
            rows_waiting: self.progress.rows_waiting.load(Ordering::Relaxed),
            error: self.progress.error.lock().ok().and_then(|e| e.clone()),
        }
    }

    /// One tick: the PV and household power (`None` when unknown), what the array could
    /// give where the site reads it, whether the inverter was held back, and whether a
    /// load switched in this tick.
    ///
    /// The household is PV + grid − the managed loads, each load counted from its
    /// command; the grid reading shows a switching only a latency and a poll later. The
    /// ticks in between would put the load's whole power into the household's (or take
    /// it out), so they are left out of the interval's mean.
    pub(crate) fn sample(
        &mut self,
        now: Timestamp,
        pv: Option<f64>,
        house: Option<f64>,
        available: Option<f64>,
        curtailed: bool,
        switched: bool,
    ) {
        let index = now.0.div_euclid(self.every_ms);
        if self.bucket.is_some_and(|b| b.index != index) {
            self.close_bucket();
        }
        if switched {
            self.quiet_until = now.0.saturating_add(self.settle_ms);
        }
        if now.0 <= self.quiet_until {
            return;
        }
        let (Some(pv), Some(house)) = (pv, house) else { return };
        let b = self.bucket.get_or_insert(Bucket {
            index,
            ticks: 0,
            time_sum_ms: 0,
            pv_sum: 0.0,
            house_sum: 0.0,
            available_sum: 0.0,
            available_ticks: 0,
            curtailed: false,
        });
        b.ticks += 1;
        b.time_sum_ms += i128::from(now.0);
        b.pv_sum += pv;
        b.house_sum += house;
        if let Some(a) = available {
            b.available_sum += a;
            b.available_ticks += 1;
        }
        b.curtailed |= curtailed;
    }

    /// Turns the open interval into a row and sends it to the writer.
    fn close_bucket(&mut self) {
        let Some(b) = self.bucket.take() else { return };
        if b.ticks == 0 {
            return;
        }
        let n = f64::from(b.ticks);
        let mean_ms = i64::try_from(b.time_sum_ms / i128::from(b.ticks)).unwrap_or(i64::MAX);
        let stamp_s = (mean_ms + 500).div_euclid(1000);
        if self.last_stamp_s.is_some_and(|last| stamp_s <= last) {
            // Only a clock set back makes this: the row goes in as it is, and a replay
            // rejects it by its line number rather than take the times out of order.
            warn!(stamp_s, "replay log: a row's time is not after the previous row's (the clock went back)");
        }
        self.last_stamp_s = Some(stamp_s);
        let time = DateTime::from_timestamp(stamp_s, 0)
            .map_or_else(|| stamp_s.to_string(), |t| t.to_rfc3339_opts(SecondsFormat::Secs, true));
        let mut row = format!("{time},{:.0},{:.0}", b.pv_sum / n, b.house_sum / n);
        if self.with_available {
            row.push(',');
            if b.available_ticks > 0 {
                row.push_str(&format!("{:.0}", b.available_sum / f64::from(b.available_ticks)));
            }
        } else if b.curtailed {
            self.curtailed += 1;
        }
        if let Some(tx) = &self.rows {
            // The writer thread outlives the sender; a send fails only if it panicked.
            let _ = tx.send(row);
        }
    }

    /// Writes the last, partial interval and waits for the writer to finish. Blocking:
    /// call it from a blocking context (`spawn_blocking`) at shutdown.
    pub(crate) fn finish(mut self) -> Written {
        self.close_bucket();
        self.rows = None;
        let curtailed = self.curtailed;
        let mut written = match self.writer.take().map(JoinHandle::join) {
            Some(Ok(w)) => w,
            Some(Err(_)) => {
                error!("replay log: the writer thread panicked; rows since its last write are lost");
                Written::default()
            }
            None => Written::default(),
        };
        written.curtailed = curtailed;
        written
    }
}

/// The writer thread: appends every row it is sent, keeps what it cannot write (the
/// newest `max_pending`), tries again with the next row and once more at the end.
fn write_rows(
    path: &Path,
    rows: &mpsc::Receiver<String>,
    max_pending: usize,
    progress: &Progress,
    mut append: impl FnMut(&VecDeque<String>) -> io::Result<()>,
) -> Written {
    let mut pending: VecDeque<String> = VecDeque::new();
    let mut written = Written::default();
    let mut failing: Option<(Instant, u64)> = None;
    let mut attempt = |pending: &mut VecDeque<String>, written: &mut Written| match append(pending) {
        Ok(()) => {
            let n = pending.len() as u64;
            written.rows += n;
            if failing.take().is_some() {
                written.late += n - 1;
                progress.set_error(None);
                info!(file = %path.display(), rows = n, "replay log: writing again; the rows kept meanwhile are written");
            }
            pending.clear();
            progress.rows_written.store(written.rows, Ordering::Relaxed);
            progress.rows_waiting.store(0, Ordering::Relaxed);
        }
        Err(e) => match &mut failing {
            None => {
                failing = Some((Instant::now(), 1));
                progress.set_error(Some(e.to_string()));
                progress.rows_waiting.store(pending.len() as u64, Ordering::Relaxed);
                warn!(file = %path.display(), error = %e, "replay log: cannot write; rows are kept (up to a week of them) and tried again with the next");
            }
            Some((since, failures)) => {
                *failures += 1;
                progress.set_error(Some(e.to_string()));
                progress.rows_waiting.store(pending.len() as u64, Ordering::Relaxed);
                if since.elapsed() >= REPEAT_WARNING {
                    *since = Instant::now();
                    warn!(file = %path.display(), error = %e, waiting = pending.len(), "replay log: still cannot write");
                }
            }
        },
    };
    while let Ok(row) = rows.recv() {
        pending.push_back(row);
        if pending.len() > max_pending {
            pending.pop_front();
            written.dropped += 1;
        }
        attempt(&mut pending, &mut written);
    }
    if !pending.is_empty() {
        attempt(&mut pending, &mut written);
    }
    written.unwritten = pending.len() as u64;
    if written.unwritten > 0 {
        error!(file = %path.display(), rows = written.unwritten, "replay log: rows could not be written before the stop and are lost");
    }
    written
}

/// Appends `rows` in one write, the header first into an empty file, and a line break
/// first after a line a failed write left unfinished.
fn append(path: &Path, header: &str, rows: &VecDeque<String>) -> io::Result<()> {
    let mut file = OpenOptions::new().read(true).append(true).create(true).open(path)?;
    let len = file.metadata()?.len();
    let mut text = String::with_capacity(64 * (rows.len() + 1));
    if len == 0 {
        text.push_str(header);
        text.push('\n');
    } else {
        let mut last = [0u8; 1];
        file.seek(SeekFrom::Start(len - 1))?;
        file.read_exact(&mut last)?;
        if last[0] != b'\n' {
            text.push('\n');
        }
    }
    for row in rows {
        text.push_str(row);
        text.push('\n');
    }
    file.write_all(text.as_bytes())?;
    file.flush()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn site(extra_points: &str, connection: &str) -> Site {
        let text = format!(
            "
site: {{ name: T, timezone: UTC, {connection} }}
devices:
  m: {{ modbus_tcp: 127.0.0.1:1502, unit: 1 }}
points:
  grid: {{ device: m, register: 0, type: i16, unit: W }}
  pv: {{ device: m, register: 1, unit: W }}
{extra_points}"
        );
        crate::config::load_str("t.yaml", &text).map_err(|e| e.render(false)).unwrap().site
    }

    fn grid_site() -> Site {
        site("", "export: forbidden")
    }

    fn temp(name: &str) -> PathBuf {
        let dir = std::env::temp_dir().join(format!("spillway-replay-log-{}-{name}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        dir.join("site.csv")
    }

    fn options(path: &Path, every_s: u64) -> ReplayLogOptions {
        ReplayLogOptions { path: path.to_owned(), every: Duration::from_secs(every_s) }
    }

    /// 2026-06-21 09:00:00 UTC.
    const T0: i64 = 1_782_032_400_000;

    #[test]
    fn ticks_are_averaged_per_interval_and_unknown_ticks_leave_a_gap() {
        let path = temp("average");
        let _ = std::fs::remove_file(&path);
        let site = grid_site();
        let mut log = ReplayLog::start(&site, &options(&path, 10)).unwrap();
        // Ticks at 0.4 s past each second: 20 s of 1 kW rising by 10 W a second, a house
        // of 300 W (one tick unknown), then 40 s with the meter stale, then 5 s of 2 kW.
        for i in 0..20 {
            let house = if i == 3 { None } else { Some(300.0) };
            log.sample(Timestamp(T0 + i * 1000 + 400), Some(1000.0 + 10.0 * i as f64), house, None, false, false);
        }
        for i in 20..60 {
            log.sample(Timestamp(T0 + i * 1000 + 400), None, None, None, false, false);
        }
        for i in 60..65 {
            log.sample(Timestamp(T0 + i * 1000 + 400), Some(2000.0), Some(500.0), None, true, false);
        }
        let written = log.finish();
        let text = std::fs::read_to_string(&path).unwrap();
        // First interval: ticks 0–9 without 3: mean time 4.78 s → 09:00:05; PV mean
        // 1000 + 10 × 42/9 = 1046.7. Second: 10–19 → 09:00:15, 1145 W.
        assert_eq!(
            text,
            "time,pv_w,house_w\n\
             2026-06-21T09:00:05Z,1047,300\n\
             2026-06-21T09:00:15Z,1145,300\n\
             2026-06-21T09:01:02Z,2000,500\n"
        );
        assert_eq!(written, Written { rows: 3, late: 0, dropped: 0, unwritten: 0, curtailed: 1 });
        std::fs::remove_dir_all(path.parent().unwrap()).ok();
    }

    #[test]
    fn ticks_right_after_a_switching_are_left_out_until_the_meter_can_show_it() {
        let path = temp("switching");
        let _ = std::fs::remove_file(&path);
        let site = grid_site();
        let mut log = ReplayLog::start(&site, &options(&path, 10)).unwrap();
        // A 3 kW load comes on at tick 3: the engine counts it at once, the meter a poll
        // (1 s, the grid point's default) later, so the house reads 0 W for two ticks.
        for i in 0..10 {
            let house = if (3..5).contains(&i) { 0.0 } else { 300.0 };
            log.sample(Timestamp(T0 + i * 1000), Some(3500.0), Some(house), None, false, i == 3);
        }
        log.finish();
        let text = std::fs::read_to_string(&path).unwrap();
        assert!(text.ends_with(",3500,300\n"), "{text}");
        std::fs::remove_dir_all(path.parent().unwrap()).ok();
    }

    #[test]
    fn a_log_is_appended_to_with_its_header_once_and_an_unfinished_line_stays_alone() {
        let path = temp("append");
        std::fs::write(&path, "time,pv_w,house_w\n2026-06-21T08:59:55Z,990,300\n2026-06-21T09:0").unwrap();
        let site = grid_site();
        let mut log = ReplayLog::start(&site, &options(&path, 10)).unwrap();
        log.sample(Timestamp(T0 + 5000), Some(1000.0), Some(310.0), None, false, false);
        log.finish();
        let text = std::fs::read_to_string(&path).unwrap();
        assert_eq!(
            text,
            "time,pv_w,house_w\n2026-06-21T08:59:55Z,990,300\n2026-06-21T09:0\n2026-06-21T09:00:05Z,1000,310\n"
        );
        // And `spillway replay` reads it: the broken line rejected by its number, the
        // rest used.
        let rec = crate::offline::replay::Recorded::from_csv(&path, chrono_tz::UTC).unwrap();
        assert_eq!(rec.t_ms.len(), 2);
        assert_eq!(rec.notices.len(), 1, "{:?}", rec.notices);
        assert_eq!(rec.notices[0].line, 3);
        assert!(rec.notices[0].rejected);
        std::fs::remove_dir_all(path.parent().unwrap()).ok();
    }

    #[test]
    fn another_file_a_missing_directory_an_interval_out_of_range_and_an_off_grid_site_are_refused() {
        let path = temp("refuse");
        std::fs::write(&path, "time,power\n").unwrap();
        let grid = grid_site();
        let e = check(&grid, &options(&path, 60)).unwrap_err();
        assert!(matches!(e, ReplayLogError::Header { .. }), "{e}");
        assert!(e.to_string().contains("`time,power`") && e.to_string().contains("`time,pv_w,house_w`"), "{e}");
        // A site that reads the PV available writes that column too.
        let with_available = site("  pv_available: { device: m, register: 2, unit: W }\n", "export: forbidden");
        std::fs::write(&path, "time,pv_w,house_w\n").unwrap();
        assert!(matches!(check(&with_available, &options(&path, 60)), Err(ReplayLogError::Header { .. })));
        std::fs::write(&path, "").unwrap();
        check(&with_available, &options(&path, 60)).unwrap();

        let nowhere = path.parent().unwrap().join("no-such-dir").join("site.csv");
        let e = check(&grid, &options(&nowhere, 60)).unwrap_err();
        assert!(matches!(e, ReplayLogError::File { .. }), "{e}");
        assert!(e.to_string().contains("no-such-dir"), "{e}");

        for every in [5, 16 * 60] {
            assert!(matches!(check(&grid, &options(&path, every)), Err(ReplayLogError::Every(_))));
        }
        let cabin = Path::new(env!("CARGO_MANIFEST_DIR")).join("config/off-grid-cabin.yaml");
        let cabin = crate::config::load_file(&cabin).map_err(|e| e.render(false)).unwrap().site;
        let e = check(&cabin, &options(&path, 60)).unwrap_err();
        assert!(e.to_string().contains("off-grid"), "{e}");
        std::fs::remove_dir_all(path.parent().unwrap()).ok();
    }

    #[test]
    fn rows_that_cannot_be_written_are_kept_and_written_with_the_next() {
        let (tx, rx) = mpsc::channel();
        for i in 0..6 {
            tx.send(format!("row {i}")).unwrap();
        }
        drop(tx);
        // The disk fails for the first four attempts; at most four rows wait.
        let mut calls = 0;
        let mut file: Vec<String> = Vec::new();
        let progress = Progress::default();
        let written = write_rows(Path::new("test.csv"), &rx, 4, &progress, |rows| {
            calls += 1;
            if calls <= 4 {
                return Err(io::Error::other("disk full"));
            }
            file.extend(rows.iter().cloned());
            Ok(())
        });
        // Rows 0–3 fail and wait; row 4 pushes row 0 out (4 at most wait); with it all
        // four are written, three of them late; row 5 goes in on its own.
        assert_eq!(file, ["row 1", "row 2", "row 3", "row 4", "row 5"]);
        assert_eq!(written, Written { rows: 5, late: 3, dropped: 1, unwritten: 0, curtailed: 0 });
        assert_eq!(progress.rows_written.load(Ordering::Relaxed), 5);
        assert_eq!(progress.rows_waiting.load(Ordering::Relaxed), 0);
        assert_eq!(*progress.error.lock().unwrap(), None, "writing works again");
    }

    #[test]
    fn rows_still_unwritten_at_the_stop_are_counted() {
        let (tx, rx) = mpsc::channel();
        tx.send("row".to_owned()).unwrap();
        drop(tx);
        let progress = Progress::default();
        let written = write_rows(Path::new("test.csv"), &rx, 4, &progress, |_| Err(io::Error::other("disk full")));
        assert_eq!(written, Written { rows: 0, late: 0, dropped: 0, unwritten: 1, curtailed: 0 });
        assert_eq!(progress.rows_waiting.load(Ordering::Relaxed), 1);
        assert_eq!(progress.error.lock().unwrap().as_deref(), Some("disk full"));
    }
}

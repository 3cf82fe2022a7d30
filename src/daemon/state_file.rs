//! The state file: the engine's counters (run time and energy today, obligation
//! progress, site energy) written atomically so a restart mid-day loses nothing.
//!
//! Format (JSON, one document):
//! ```json
//! {"format": "spillway-state", "version": 1, "site": "Rosemead",
//!  "saved_at": "2026-06-21T11:02:03.000Z", "counters": { ...PersistedState... },
//!  "stopped_cleanly": false}
//! ```
//! Atomic write: the document goes to `<file>.tmp` in the same directory, is flushed
//! to disk (fsync), renamed over the file, and the directory is synced, so a power cut
//! leaves either the old file or the new one, never half of one.

use std::fs::{self, File};
use std::io::Write as _;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use crate::engine::PersistedState;
use crate::units::Timestamp;

/// The `format` field.
pub const FORMAT: &str = "spillway-state";
/// The `version` field this build writes and reads.
pub const VERSION: u32 = 1;

/// The document on disk.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct StateDocument {
    /// Always [`FORMAT`].
    pub format: String,
    /// Always [`VERSION`] for this build.
    pub version: u32,
    /// The site's name when it was written (informational; loads match by name).
    pub site: String,
    /// When it was written (RFC 3339, UTC).
    pub saved_at: String,
    /// The engine's counters.
    pub counters: PersistedState,
    /// Whether this was the last save of a controller stopping in order (SIGTERM,
    /// Ctrl-C). `false` in every other save, so a file left with `false` tells the next
    /// start that the controller was killed, crashed or lost its power; absent (`null`)
    /// in files written before it was kept.
    #[serde(default)]
    pub stopped_cleanly: Option<bool>,
}

/// Why the state file could not be read or written.
#[derive(Debug, thiserror::Error)]
pub enum StateFileError {
    /// Reading, writing, syncing or renaming failed.
    #[error("state file {path}: {source}")]
    Io {
        /// The file (or its temporary sibling).
        path: String,
        /// The operating-system error.
        #[source]
        source: std::io::Error,
    },
    /// The file cannot be written at start-up (checked once, so the daemon does not run
    /// for days believing it keeps its counters).
    #[error("state file {path} cannot be written ({source}): {advice}")]
    Unwritable {
        /// The file.
        path: String,
        /// What to do about it.
        advice: String,
        /// The operating-system error.
        #[source]
        source: std::io::Error,
    },
    /// The file is not a state document this build understands.
    #[error("state file {path} cannot be used: {detail}; it will be replaced at the next save")]
    Invalid {
        /// The file.
        path: String,
        /// What is wrong.
        detail: String,
    },
}

/// `<site stem>.state.json` next to the site file (`/etc/spillway/home.yaml` →
/// `/etc/spillway/home.state.json`).
pub fn default_path(site_file: &Path) -> PathBuf {
    let stem = site_file.file_stem().map_or_else(|| "site".into(), |s| s.to_string_lossy().into_owned());
    site_file.with_file_name(format!("{stem}.state.json"))
}

/// Reads the counters; `Ok(None)` when there is no file yet.
pub fn read(path: &Path) -> Result<Option<StateDocument>, StateFileError> {
    let text = match fs::read_to_string(path) {
        Ok(t) => t,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(None),
        Err(source) => return Err(StateFileError::Io { path: path.display().to_string(), source }),
    };
    let invalid = |detail: String| StateFileError::Invalid { path: path.display().to_string(), detail };
    let doc: StateDocument = serde_json::from_str(&text).map_err(|e| invalid(format!("not a state document ({e})")))?;
    if doc.format != FORMAT {
        return Err(invalid(format!("its format is \"{}\", not \"{FORMAT}\"", doc.format)));
    }
    if doc.version != VERSION {
        return Err(invalid(format!("it is version {}, this build reads version {VERSION}", doc.version)));
    }
    Ok(Some(doc))
}

/// Writes the counters once at start-up: a state file that cannot be written (its
/// directory missing, no permission, a read-only file system) is an error then, with
/// advice, rather than a warning at every save while the counters are silently lost.
pub fn write_at_start(
    path: &Path,
    site: &str,
    counters: &PersistedState,
    now: Timestamp,
) -> Result<(), StateFileError> {
    write(path, site, counters, now, false).map_err(|e| match e {
        StateFileError::Io { source, .. } => {
            let dir = path.parent().filter(|d| !d.as_os_str().is_empty()).unwrap_or(Path::new("."));
            let advice = if dir.is_dir() {
                format!("check the permissions of {} and of the file, or choose another path with --state", dir.display())
            } else {
                format!(
                    "its directory {} does not exist: create it (e.g. `install -d {}`) or choose another path with --state",
                    dir.display(),
                    dir.display()
                )
            };
            StateFileError::Unwritable { path: path.display().to_string(), advice, source }
        }
        other => other,
    })
}

/// Moves a state file this build cannot use out of the way (`home.state.json` →
/// `home.state.json.invalid`, or `.invalid.2`, `.invalid.3`… when that is taken, so an
/// earlier one is never replaced), so the next save does not overwrite what a person may
/// want to look at or restore by hand. Returns where it went.
pub fn set_aside(path: &Path) -> Result<PathBuf, StateFileError> {
    let base = path.file_name().map_or_else(|| "state.json".into(), |n| n.to_os_string());
    let candidate = |n: u32| {
        let mut name = base.clone();
        name.push(".invalid");
        if n > 1 {
            name.push(format!(".{n}"));
        }
        path.with_file_name(name)
    };
    let aside = (1..10_000).map(candidate).find(|p| !p.exists()).unwrap_or_else(|| candidate(10_000));
    fs::rename(path, &aside).map_err(|source| StateFileError::Io { path: path.display().to_string(), source })?;
    Ok(aside)
}

/// Writes the counters atomically (temporary file, fsync, rename, directory sync);
/// `stopping` on the last save of a controller that stops in order.
pub fn write(
    path: &Path,
    site: &str,
    counters: &PersistedState,
    now: Timestamp,
    stopping: bool,
) -> Result<(), StateFileError> {
    let doc = StateDocument {
        format: FORMAT.to_owned(),
        version: VERSION,
        site: site.to_owned(),
        saved_at: now.to_string(),
        counters: counters.clone(),
        stopped_cleanly: Some(stopping),
    };
    let io = |p: &Path| {
        let p = p.display().to_string();
        move |source| StateFileError::Io { path: p, source }
    };
    let mut body = serde_json::to_vec_pretty(&doc).map_err(|e| StateFileError::Invalid {
        path: path.display().to_string(),
        detail: format!("counters cannot be encoded ({e})"),
    })?;
    body.push(b'\n');
    let tmp = temp_path(path);
    {
        let mut f = File::create(&tmp).map_err(io(&tmp))?;
        f.write_all(&body).map_err(io(&tmp))?;
        f.sync_all().map_err(io(&tmp))?;
    }
    fs::rename(&tmp, path).map_err(io(path))?;
    // The rename is only durable once the directory entry is on disk too. Some
    // file systems refuse to sync a directory; the file itself is safe by then.
    if let Some(dir) = path.parent().filter(|d| !d.as_os_str().is_empty())
        && let Ok(d) = File::open(dir)
    {
        let _ = d.sync_all();
    }
    Ok(())
}

fn temp_path(path: &Path) -> PathBuf {
    let mut name = path.file_name().map_or_else(|| "state".into(), |n| n.to_os_string());
    name.push(".tmp");
    path.with_file_name(name)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::PersistedLoad;

    fn counters() -> PersistedState {
        PersistedState {
            day: 20_625,
            month: 24_318,
            import_today_wh: 812.5,
            loads: vec![PersistedLoad {
                name: "pool_pump".into(),
                runtime_today_s: 7200.0,
                energy_today_wh: 2200.0,
                last_cycle_ms: vec![None],
                judged_today: vec![true],
                met_today: vec![true],
                on: true,
                changed_ms: Some(1_782_000_000_000),
                starts_ms: vec![1_781_999_000_000, 1_782_000_000_000],
            }],
            ..PersistedState::default()
        }
    }

    #[test]
    fn counters_survive_a_write_and_a_read_and_an_unreadable_file_is_kept_aside() {
        let dir = std::env::temp_dir().join(format!("spillway-state-{}", std::process::id()));
        fs::create_dir_all(&dir).unwrap();
        let path = dir.join("home.state.json");
        assert_eq!(read(&path).unwrap(), None, "no file yet");
        write(&path, "Home", &counters(), Timestamp(1_782_000_000_000), false).unwrap();
        let doc = read(&path).unwrap().unwrap();
        assert_eq!(doc.counters, counters());
        assert_eq!((doc.format.as_str(), doc.version, doc.site.as_str()), (FORMAT, VERSION, "Home"));
        assert!(!temp_path(&path).exists());
        fs::write(&path, "{\"format\": \"other\"}").unwrap();
        assert!(matches!(read(&path), Err(StateFileError::Invalid { .. })));
        let aside = set_aside(&path).unwrap();
        assert_eq!(aside, dir.join("home.state.json.invalid"));
        assert_eq!(fs::read_to_string(&aside).unwrap(), "{\"format\": \"other\"}", "kept as it was");
        assert_eq!(read(&path).unwrap(), None, "the next start begins afresh");
        // A second bad file does not replace the first one set aside.
        fs::write(&path, "{\"format\": \"another\"}").unwrap();
        let second = set_aside(&path).unwrap();
        assert_eq!(second, dir.join("home.state.json.invalid.2"));
        assert_eq!(fs::read_to_string(&aside).unwrap(), "{\"format\": \"other\"}", "the first is still there");
        fs::remove_dir_all(&dir).unwrap();
    }

    /// A file written before the obligations' daily progress was kept still reads.
    #[test]
    fn a_file_without_the_daily_progress_of_obligations_still_reads() {
        let text = r#"{"day": 20625, "month": 24318, "import_today_wh": 0.0, "export_today_wh": 0.0,
            "import_month_wh": 0.0, "export_month_wh": 0.0, "diverted_today_wh": 0.0,
            "loads": [{"name": "tank", "runtime_today_s": 0.0, "energy_today_wh": 0.0, "last_cycle_ms": [null]}]}"#;
        let counters: PersistedState = serde_json::from_str(text).unwrap();
        assert!(counters.loads[0].met_today.is_empty() && counters.loads[0].judged_today.is_empty());
    }

    #[test]
    fn the_default_state_file_sits_next_to_the_site_file() {
        assert_eq!(default_path(Path::new("/etc/spillway/home.yaml")), Path::new("/etc/spillway/home.state.json"));
        assert_eq!(default_path(Path::new("site.yaml")), Path::new("site.state.json"));
    }
}

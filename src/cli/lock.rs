//! One controller per site: the commands that drive a site's hardware (`run`,
//! `step-test`, `failsafe-test`) hold an exclusive lock on its site file for as long as
//! they run. A second one on the same file — an installer's step test while the service
//! runs, a second `spillway run` started by hand — is refused before it connects to
//! anything: two controllers would fight over the relays and the inverter limit.
//! (`read` only reads, and `check`, `simulate` and the other offline commands touch no
//! hardware: they take no lock.)
//!
//! The lock is the operating system's advisory file lock (`flock` on Unix), which goes
//! with the process: a controller that dies leaves no stale lock behind.

use std::fs::{File, TryLockError};
use std::path::Path;

/// The held lock; released when dropped (or when the process ends).
#[derive(Debug)]
pub struct SiteLock {
    _file: File,
}

/// Why the site could not be locked.
#[derive(Debug)]
pub enum LockError {
    /// Another process holds it.
    Busy,
    /// The file could not be opened or locked for another reason.
    Io(std::io::Error),
}

/// Takes the site file's lock, or says that another Spillway command holds it. A file
/// system that cannot lock at all (some network file systems) is not a reason to refuse
/// a site: the caller warns and goes on.
pub fn lock_site(path: &Path) -> Result<SiteLock, LockError> {
    let file = File::open(path).map_err(LockError::Io)?;
    match file.try_lock() {
        Ok(()) => Ok(SiteLock { _file: file }),
        Err(TryLockError::WouldBlock) => Err(LockError::Busy),
        Err(TryLockError::Error(e)) => Err(LockError::Io(e)),
    }
}

/// Locks the site for a command that drives it: `Ok(Some(lock))` to hold, `Ok(None)`
/// where locking is not possible (warned about), `Err(message)` when another command
/// drives the site.
pub fn lock_or_explain(path: &Path, command: &str) -> Result<Option<SiteLock>, String> {
    match lock_site(path) {
        Ok(lock) => Ok(Some(lock)),
        Err(LockError::Busy) => Err(format!(
            "another Spillway command is driving this site ({} is locked by a `spillway run`, `step-test` or `failsafe-test`): stop it first (`systemctl stop spillway` for the service); two controllers would fight over the relays and the inverter limit, so `{command}` does not start",
            path.display()
        )),
        Err(LockError::Io(e)) => {
            eprintln!(
                "warning: cannot lock {} ({e}): nothing stops a second Spillway command from driving this site at the same time",
                path.display()
            );
            Ok(None)
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_second_lock_on_the_same_site_file_is_refused_until_the_first_is_released() {
        let dir = std::env::temp_dir().join(format!("spillway-lock-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let site = dir.join("site.yaml");
        std::fs::write(&site, "site: {}\n").unwrap();
        let first = lock_site(&site).unwrap();
        assert!(matches!(lock_site(&site), Err(LockError::Busy)));
        let message = lock_or_explain(&site, "step-test").unwrap_err();
        assert!(
            message.contains("systemctl stop spillway") && message.contains("`step-test` does not start"),
            "{message}"
        );
        drop(first);
        assert!(lock_site(&site).is_ok(), "released with its holder");
        let _ = std::fs::remove_dir_all(&dir);
    }
}

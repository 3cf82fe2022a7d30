//! The commissioning record: one Markdown file an installer leaves behind, to which
//! `step-test --record` and `failsafe-test --record` each append a section. A new file
//! starts with the site as Spillway reads it; every section names the SHA-256 of the
//! site file it ran on, so an inspector can see that all the tests ran on one version of
//! the file and compare it with the file on the controller (`sha256sum site.yaml`).

use std::fmt::Write as _;
use std::io::Write as _;
use std::path::Path;

use sha2::{Digest, Sha256};
use spillway::config::model::Site;

/// One test's part of the record.
pub struct Section<'a> {
    /// `Step test: water_heater`, `Fail-safe test`.
    pub title: String,
    /// The test's own output, as the terminal showed it.
    pub text: &'a str,
    pub passed: bool,
}

/// The SHA-256 of a file's bytes, in lowercase hex.
pub fn sha256_hex(bytes: &[u8]) -> String {
    Sha256::digest(bytes).iter().fold(String::with_capacity(64), |mut s, b| {
        let _ = write!(s, "{b:02x}");
        s
    })
}

/// Whether the record can be written: opens it for appending (creating an empty file,
/// which the first section then starts), so that a test is not run for nothing.
pub fn writable(path: &Path) -> std::io::Result<()> {
    std::fs::OpenOptions::new().create(true).append(true).open(path).map(drop)
}

/// Appends `section` to the record at `path`, starting the record first when the file is
/// new or empty. The site file is read again for its hash: what was tested is the file on
/// disk, the text the test loaded.
pub fn append(path: &Path, site: &Site, site_path: &Path, site_text: &str, section: &Section) -> std::io::Result<()> {
    let hash = sha256_hex(site_text.as_bytes());
    let existing = match std::fs::metadata(path) {
        Ok(m) => m.len(),
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => 0,
        Err(e) => return Err(e),
    };
    let mut out = String::new();
    if existing == 0 {
        out.push_str(&header(site, site_path, &hash));
    }
    out.push_str(&body(section, site_path, &hash, chrono::Utc::now()));
    let mut file = std::fs::OpenOptions::new().create(true).append(true).open(path)?;
    file.write_all(out.as_bytes())?;
    file.sync_all()
}

fn header(site: &Site, site_path: &Path, hash: &str) -> String {
    let mut out = String::new();
    let _ = writeln!(out, "# Commissioning record: {}\n", site.name);
    let _ = writeln!(out, "- site file: `{}`", site_path.display());
    let _ = writeln!(out, "- its SHA-256 when this record began: `{hash}`");
    let _ = writeln!(out, "- Spillway {}", env!("CARGO_PKG_VERSION"));
    let _ = writeln!(out, "- export: {}\n", spillway::status::export_policy(site));
    let _ = writeln!(out, "## The site as Spillway reads it\n");
    let _ = writeln!(out, "```text\n{}```\n", spillway::config::describe::describe(site));
    out
}

fn body(section: &Section, site_path: &Path, hash: &str, at: chrono::DateTime<chrono::Utc>) -> String {
    let mut out = String::new();
    let _ = writeln!(out, "## {} ({})\n", section.title, at.format("%Y-%m-%d %H:%M UTC"));
    let _ = writeln!(out, "- site file: `{}`, SHA-256 `{hash}`", site_path.display());
    let _ = writeln!(out, "- Spillway {}", env!("CARGO_PKG_VERSION"));
    let _ = writeln!(out, "- result: **{}**\n", if section.passed { "PASS" } else { "FAIL" });
    let text = section.text;
    let _ = writeln!(out, "```text\n{text}{}```\n", if text.ends_with('\n') { "" } else { "\n" });
    let _ = writeln!(out, "Tested by: ____________________  Date: __________  Signature: ____________________\n");
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sha256_matches_the_published_test_vectors() {
        // FIPS 180-2, Appendix B.1 ("abc") and the empty message (NIST's SHA examples).
        assert_eq!(sha256_hex(b"abc"), "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad");
        assert_eq!(sha256_hex(b""), "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855");
    }

    #[test]
    fn a_new_record_starts_with_the_site_and_later_tests_append() {
        let dir = std::env::temp_dir().join(format!("spillway-record-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let path = dir.join("commissioning.md");
        let _ = std::fs::remove_file(&path);
        let (site, text) = crate::cli::test_site("Quince Cottage");
        let step = Section { title: "Step test: water_heater".into(), text: "step +2980 W\n", passed: true };
        append(&path, &site, Path::new("site.yaml"), &text, &step).unwrap();
        let failsafe = Section { title: "Fail-safe test".into(), text: "result: FAIL", passed: false };
        append(&path, &site, Path::new("site.yaml"), &text, &failsafe).unwrap();
        let record = std::fs::read_to_string(&path).unwrap();
        assert_eq!(record.matches("# Commissioning record: Quince Cottage").count(), 1, "{record}");
        assert_eq!(record.matches("## The site as Spillway reads it").count(), 1);
        let step_at = record.find("## Step test: water_heater").unwrap();
        let failsafe_at = record.find("## Fail-safe test").unwrap();
        assert!(step_at < failsafe_at, "in the order they ran");
        assert!(record.contains("- result: **PASS**") && record.contains("- result: **FAIL**"));
        assert!(record.contains("```text\nresult: FAIL\n```"), "a text without its newline still closes: {record}");
        assert_eq!(record.matches(&sha256_hex(text.as_bytes())).count(), 3, "header and each section");
        assert_eq!(record.matches("Signature:").count(), 2);
        let _ = std::fs::remove_dir_all(&dir);
    }
}

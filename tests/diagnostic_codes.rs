//! Every diagnostic code the source can report has one row in the docs, and every row
//! names a code the source still uses: `C…` codes in `docs/site-file-codes.md`, `R…`
//! codes in `docs/rules.md`. Users search the docs for the code they were shown.

use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::path::{Path, PathBuf};

/// Each doc and the first letter of the codes it lists.
const DOCS: [(&str, char); 2] = [("docs/site-file-codes.md", 'C'), ("docs/rules.md", 'R')];

fn root() -> &'static Path {
    Path::new(env!("CARGO_MANIFEST_DIR"))
}

/// The `.rs` files under `dir`, in path order. Unit-test directories (`tests/`) and
/// files named `tests.rs` are left out; test modules inline in other files are read,
/// since they assert codes the code beside them reports.
fn source_files(dir: &Path, out: &mut Vec<PathBuf>) {
    let entries = std::fs::read_dir(dir).unwrap_or_else(|e| panic!("cannot read {}: {e}", dir.display()));
    let mut paths: Vec<PathBuf> = entries.map(|e| e.unwrap().path()).collect();
    paths.sort();
    for path in paths {
        let name = path.file_name().and_then(|n| n.to_str()).unwrap_or_default();
        if path.is_dir() {
            if name != "tests" {
                source_files(&path, out);
            }
        } else if name.ends_with(".rs") && name != "tests.rs" {
            out.push(path);
        }
    }
}

fn is_code(s: &str) -> bool {
    s.len() == 5 && matches!(s.as_bytes()[0], b'C' | b'R') && s[1..].bytes().all(|b| b.is_ascii_digit())
}

/// The codes written as string literals on a line: `"C0102"`, `"R0201"`.
fn literal_codes(line: &str) -> impl Iterator<Item = &str> {
    line.as_bytes()
        .windows(7)
        .enumerate()
        .filter(|(_, w)| w[0] == b'"' && w[6] == b'"')
        .map(move |(i, _)| &line[i + 1..i + 6])
        .filter(|s| is_code(s))
}

/// Every code used under `src/`, with the first place it appears (`src/config/load.rs:131`).
/// Comment lines are skipped: they mention codes without reporting them.
fn codes_in_source() -> BTreeMap<String, String> {
    let mut files = Vec::new();
    source_files(&root().join("src"), &mut files);
    let mut codes = BTreeMap::new();
    for file in files {
        let text = std::fs::read_to_string(&file).unwrap_or_else(|e| panic!("cannot read {}: {e}", file.display()));
        let shown = file.strip_prefix(root()).unwrap_or(&file).display().to_string();
        for (i, line) in text.lines().enumerate() {
            if line.trim_start().starts_with("//") {
                continue;
            }
            for code in literal_codes(line) {
                codes.entry(code.to_owned()).or_insert_with(|| format!("{shown}:{}", i + 1));
            }
        }
    }
    codes
}

/// The codes starting with `prefix` that have a table row in `doc` (`| C0101 | error | …`),
/// each with the line of its row.
fn rows(doc: &str, prefix: char) -> Vec<(String, usize)> {
    let path = root().join(doc);
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("cannot read {}: {e}", path.display()));
    text.lines()
        .enumerate()
        .filter_map(|(i, line)| {
            let cell = line.strip_prefix('|')?.split('|').next()?.trim();
            (is_code(cell) && cell.starts_with(prefix)).then(|| (cell.to_owned(), i + 1))
        })
        .collect()
}

#[test]
fn every_code_in_the_source_has_a_row_in_its_doc() {
    let used = codes_in_source();
    let mut problems = String::new();
    for (doc, prefix) in DOCS {
        let documented: Vec<String> = rows(doc, prefix).into_iter().map(|(code, _)| code).collect();
        let missing: Vec<(&String, &String)> =
            used.iter().filter(|(code, _)| code.starts_with(prefix) && !documented.contains(code)).collect();
        if missing.is_empty() {
            continue;
        }
        writeln!(
            problems,
            "{} code(s) used under src/ have no row in {doc}; add a row for each to {doc}:",
            missing.len()
        )
        .unwrap();
        for (code, at) in missing {
            writeln!(problems, "  {code}  (first used at {at})").unwrap();
        }
    }
    assert!(problems.is_empty(), "\n{problems}");
}

#[test]
fn every_row_in_the_docs_names_a_code_the_source_uses() {
    let used = codes_in_source();
    let mut problems = String::new();
    for (doc, prefix) in DOCS {
        let stale: Vec<(String, usize)> =
            rows(doc, prefix).into_iter().filter(|(code, _)| !used.contains_key(code)).collect();
        if stale.is_empty() {
            continue;
        }
        writeln!(
            problems,
            "{} row(s) of {doc} name codes nothing under src/ reports; remove them from {doc}, or correct the code in the row:",
            stale.len()
        )
        .unwrap();
        for (code, line) in stale {
            writeln!(problems, "  {code}  ({doc}:{line})").unwrap();
        }
    }
    assert!(problems.is_empty(), "\n{problems}");
}

#[test]
fn each_code_has_one_row() {
    let mut problems = String::new();
    for (doc, prefix) in DOCS {
        let mut lines: BTreeMap<String, Vec<usize>> = BTreeMap::new();
        for (code, line) in rows(doc, prefix) {
            lines.entry(code).or_default().push(line);
        }
        for (code, at) in lines.into_iter().filter(|(_, at)| at.len() > 1) {
            writeln!(problems, "{code} has {} rows in {doc} (lines {at:?}); keep one of them in {doc}", at.len())
                .unwrap();
        }
    }
    assert!(problems.is_empty(), "\n{problems}");
}

/// The scanner itself: a literal counts, a mention in prose or a longer literal does not.
#[test]
fn only_whole_string_literals_count_as_codes() {
    let found: Vec<&str> = literal_codes(r#"error("C0101", "msg") `C0102` "C01033" "R0201" "X0101" "C01a1""#).collect();
    assert_eq!(found, ["C0101", "R0201"]);
}

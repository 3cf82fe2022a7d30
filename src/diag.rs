//! Located diagnostics for configuration and rule errors, and their rendering.
//!
//! A [`Diagnostic`] names a file by path and points at byte ranges in it. The
//! config loader collects every diagnostic of a file before failing, so a user fixes
//! five mistakes in one go; [`render`] draws them with a caret under the offending
//! text (through `ariadne`), in colour for a terminal or plain for tests and logs.

use std::fmt::Write as _;
use std::ops::Range;

use ariadne::{Config, IndexType, Label, Report, ReportKind, Source};

/// How bad a diagnostic is.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub enum Severity {
    /// Worth a look; the file still loads.
    Warning,
    /// The file cannot be used until this is fixed.
    Error,
}

/// A labelled byte range in the diagnostic's file.
#[derive(Debug, Clone, PartialEq)]
pub struct LabelledSpan {
    /// Byte range into the file's text.
    pub span: Range<usize>,
    /// Text written beside the underline.
    pub message: String,
}

/// One located finding.
#[derive(Debug, Clone, PartialEq)]
pub struct Diagnostic {
    /// Error or warning.
    pub severity: Severity,
    /// A stable code (`C0102`, `R0201`), listed in the docs so users can search for it.
    pub code: &'static str,
    /// Lowercase fragment, no trailing period.
    pub message: String,
    /// The exact offending text.
    pub primary: LabelledSpan,
    /// Related places (`first defined here`).
    pub secondary: Vec<LabelledSpan>,
    /// Notes and help lines (`did you mean "tank_temp"?`).
    pub notes: Vec<String>,
}

impl Diagnostic {
    /// An error at `span` with the given code and message; the label repeats nothing.
    pub fn error(code: &'static str, message: impl Into<String>, span: Range<usize>) -> Self {
        Diagnostic {
            severity: Severity::Error,
            code,
            message: message.into(),
            primary: LabelledSpan { span, message: String::new() },
            secondary: Vec::new(),
            notes: Vec::new(),
        }
    }

    /// A warning at `span`.
    pub fn warning(code: &'static str, message: impl Into<String>, span: Range<usize>) -> Self {
        Diagnostic { severity: Severity::Warning, ..Diagnostic::error(code, message, span) }
    }

    /// Sets the text beside the primary underline.
    pub fn with_label(mut self, message: impl Into<String>) -> Self {
        self.primary.message = message.into();
        self
    }

    /// Adds a secondary labelled range.
    pub fn with_secondary(mut self, span: Range<usize>, message: impl Into<String>) -> Self {
        self.secondary.push(LabelledSpan { span, message: message.into() });
        self
    }

    /// Adds a note or help line.
    pub fn with_note(mut self, note: impl Into<String>) -> Self {
        self.notes.push(note.into());
        self
    }

    /// True for errors.
    pub fn is_error(&self) -> bool {
        self.severity == Severity::Error
    }
}

/// One-based line and column (in characters) of a byte offset, for plain-text messages.
pub fn line_col(text: &str, offset: usize) -> (usize, usize) {
    let offset = offset.min(text.len());
    let before = &text[..floor_char_boundary(text, offset)];
    let line = before.matches('\n').count() + 1;
    let column = before.rsplit('\n').next().map_or(0, |l| l.chars().count()) + 1;
    (line, column)
}

fn floor_char_boundary(text: &str, mut offset: usize) -> usize {
    while offset > 0 && !text.is_char_boundary(offset) {
        offset -= 1;
    }
    offset
}

/// Keeps a range inside the text and on character boundaries, so rendering never panics.
fn clamp_span(text: &str, span: &Range<usize>) -> Range<usize> {
    let start = floor_char_boundary(text, span.start.min(text.len()));
    let end = floor_char_boundary(text, span.end.min(text.len())).max(start);
    start..end
}

/// Renders diagnostics of one file: `error[C0102]: …`, then `--> path:line:col`, the
/// source line and a caret, then the notes. `color` is for terminals.
pub fn render(path: &str, text: &str, diagnostics: &[Diagnostic], color: bool) -> String {
    let mut out = Vec::new();
    let config = Config::default().with_color(color).with_index_type(IndexType::Byte).with_compact(false);
    for d in diagnostics {
        let kind = match d.severity {
            Severity::Error => ReportKind::Error,
            Severity::Warning => ReportKind::Warning,
        };
        let primary = clamp_span(text, &d.primary.span);
        let mut report =
            Report::build(kind, (path, primary.clone())).with_config(config).with_code(d.code).with_message(&d.message);
        // Labels in file order: ariadne starts a new snippet (headed by the primary's
        // location, wrongly for the other label) whenever a label lies above the last.
        // Labels on one line keep their given order (primary first), which ariadne draws
        // best; only the lines are put in file order.
        let line_of = |at: usize| text[..at.min(text.len())].bytes().filter(|&b| b == b'\n').count();
        let mut keys: Vec<(usize, usize)> = std::iter::once(line_of(primary.start))
            .chain(d.secondary.iter().map(|s| line_of(clamp_span(text, &s.span).start)))
            .enumerate()
            .map(|(i, line)| (line, i))
            .collect();
        let given = keys.clone();
        keys.sort_unstable();
        let order_of =
            |i: usize| i32::try_from(keys.iter().position(|k| *k == given[i]).unwrap_or(i)).unwrap_or(i32::MAX);
        let mut label = Label::new((path, primary.clone())).with_order(order_of(0));
        if !d.primary.message.is_empty() {
            label = label.with_message(&d.primary.message);
        }
        if color {
            label = label.with_color(match d.severity {
                Severity::Error => ariadne::Color::Red,
                Severity::Warning => ariadne::Color::Yellow,
            });
        }
        report = report.with_label(label);
        for (i, s) in d.secondary.iter().enumerate() {
            let span = clamp_span(text, &s.span);
            let mut label = Label::new((path, span)).with_message(&s.message).with_order(order_of(i + 1));
            if color {
                label = label.with_color(ariadne::Color::Blue);
            }
            report = report.with_label(label);
        }
        for note in &d.notes {
            report = report.with_note(note);
        }
        // Writing into a Vec cannot fail; a rendering failure still leaves the summary line.
        if report.finish().write((path, Source::from(text)), &mut out).is_err() {
            out.extend_from_slice(render_short(path, text, std::slice::from_ref(d)).as_bytes());
        }
    }
    String::from_utf8_lossy(&out).into_owned()
}

fn severity_word(s: Severity) -> &'static str {
    match s {
        Severity::Error => "error",
        Severity::Warning => "warning",
    }
}

/// A one-line summary per diagnostic (`site.yaml:12:9: error[C0301]: unknown unit "kw"`),
/// for logs and for machines.
pub fn render_short(path: &str, text: &str, diagnostics: &[Diagnostic]) -> String {
    let mut out = String::new();
    for d in diagnostics {
        let (line, col) = line_col(text, d.primary.span.start);
        let _ = writeln!(out, "{path}:{line}:{col}: {}[{}]: {}", severity_word(d.severity), d.code, d.message);
    }
    out
}

/// The closest candidate to a misspelt name, if one is close enough to suggest.
pub fn did_you_mean<'a>(name: &str, candidates: impl IntoIterator<Item = &'a str>) -> Option<&'a str> {
    let candidates: Vec<&'a str> = candidates.into_iter().collect();
    // A difference of case only ("kw" for "kW") is the likeliest slip of all.
    if let Some(c) = candidates.iter().find(|c| c.eq_ignore_ascii_case(name) && **c != name) {
        return Some(c);
    }
    candidates
        .into_iter()
        .map(|c| (strsim::jaro_winkler(name, c), c))
        .filter(|&(score, _)| score > 0.8)
        .max_by(|a, b| a.0.total_cmp(&b.0))
        .map(|(_, c)| c)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn renders_a_caret_under_the_offending_text_with_file_line_and_column() {
        let text = "loads:\n  - name: tank\n    rated: 3 kw\n";
        let start = text.find("3 kw").unwrap();
        let d = Diagnostic::error("C0301", "unknown unit \"kw\"", start..start + 4)
            .with_label("expected a power in W, kW or MW")
            .with_note("did you mean \"kW\"?");
        let out = render("site.yaml", text, &[d], false);
        assert!(out.contains("site.yaml:3:12"), "{out}");
        assert!(out.contains("[C0301]"), "{out}");
        assert!(out.contains("rated: 3 kw"), "{out}");
        assert!(out.contains("did you mean"), "{out}");
    }

    #[test]
    fn line_col_counts_characters_not_bytes() {
        assert_eq!(line_col("a: 58°C\nb: x", 10), (2, 2));
        assert_eq!(line_col("abc", 1), (1, 2));
    }

    #[test]
    fn suggests_close_names_only() {
        assert_eq!(did_you_mean("tank_tmp", ["tank_temp", "pool"]), Some("tank_temp"));
        assert_eq!(did_you_mean("xyz", ["tank_temp", "pool"]), None);
    }
}

//! Building [`RuleDiagnostic`]s tersely, and turning them into file diagnostics.

use std::ops::Range;

use crate::diag;
use crate::units;

use super::{RuleDiagnostic, Severity};

/// An error with a stable code, a message and its primary span.
pub(crate) fn error(code: &'static str, message: impl Into<String>, span: Range<usize>) -> RuleDiagnostic {
    RuleDiagnostic {
        severity: Severity::Error,
        code,
        message: message.into(),
        span,
        label: String::new(),
        secondary: Vec::new(),
        notes: Vec::new(),
    }
}

/// A warning with a stable code.
pub(crate) fn warning(code: &'static str, message: impl Into<String>, span: Range<usize>) -> RuleDiagnostic {
    RuleDiagnostic { severity: Severity::Warning, ..error(code, message, span) }
}

impl RuleDiagnostic {
    /// Sets the text beside the primary underline.
    pub(crate) fn label(mut self, label: impl Into<String>) -> Self {
        self.label = label.into();
        self
    }

    /// Adds a labelled secondary span.
    pub(crate) fn secondary(mut self, span: Range<usize>, label: impl Into<String>) -> Self {
        self.secondary.push((span, label.into()));
        self
    }

    /// Adds a note or a help line.
    pub(crate) fn note(mut self, note: impl Into<String>) -> Self {
        self.notes.push(note.into());
        self
    }

    /// True for errors.
    pub fn is_error(&self) -> bool {
        self.severity == Severity::Error
    }
}

/// Every unit symbol, comma-separated, for "known units" notes.
pub(crate) fn unit_list() -> String {
    units::unit_symbols().collect::<Vec<_>>().join(", ")
}

/// A rule diagnostic as a file diagnostic, its spans moved by `offset` bytes (where the
/// rule text starts inside the file).
pub fn to_diagnostic(d: &RuleDiagnostic, offset: usize) -> diag::Diagnostic {
    to_diagnostic_with(d, |i| i + offset)
}

/// As [`to_diagnostic`], with `map` giving the file offset of each byte of the rule text
/// (and of its end), as `config::yaml::map_text` makes for a multi-line rule.
pub fn to_diagnostic_mapped(d: &RuleDiagnostic, map: &[usize]) -> diag::Diagnostic {
    let last = map.last().copied().unwrap_or(0);
    to_diagnostic_with(d, |i| map.get(i).copied().unwrap_or(last))
}

fn to_diagnostic_with(d: &RuleDiagnostic, at: impl Fn(usize) -> usize) -> diag::Diagnostic {
    let shift = |r: &Range<usize>| {
        let (s, e) = (at(r.start), at(r.end));
        s..e.max(s)
    };
    let mut out = match d.severity {
        Severity::Error => diag::Diagnostic::error(d.code, d.message.clone(), shift(&d.span)),
        Severity::Warning => diag::Diagnostic::warning(d.code, d.message.clone(), shift(&d.span)),
    }
    .with_label(d.label.clone());
    for (span, label) in &d.secondary {
        out = out.with_secondary(shift(span), label.clone());
    }
    for note in &d.notes {
        out = out.with_note(note.clone());
    }
    out
}

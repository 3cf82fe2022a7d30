//! The site file as a YAML tree whose every key and value knows its byte span, and a
//! reader that walks it while collecting located diagnostics.
//!
//! Why a tree and not `#[derive(Deserialize)]` on the site structs: serde stops at the
//! first error and its "unknown field" message has no "did you mean"; a tree lets the
//! loader report *every* mistake of a file in one run, each pointing at its text.
//! The tree is the only type here that implements `Deserialize` (through
//! `serde-saphyr`, which reports line, column and byte offsets).

use std::fmt;
use std::ops::Range;

use serde::de::{Deserialize, Deserializer, MapAccess, SeqAccess, Visitor};
use serde_saphyr::Spanned;

use crate::diag::{Diagnostic, did_you_mean};

/// A YAML node with the byte range of its text in the file.
#[derive(Debug, Clone, PartialEq)]
pub struct Node {
    /// The value.
    pub value: Value,
    /// Byte range in the file (for collections: from their first byte).
    pub span: Range<usize>,
}

/// A YAML value.
#[derive(Debug, Clone, PartialEq)]
pub enum Value {
    /// `~`, `null` or nothing.
    Null,
    /// `true`/`false` (YAML also reads `on`/`off`/`yes`/`no` as booleans).
    Bool(bool),
    /// An integer.
    Int(i64),
    /// A float.
    Float(f64),
    /// Any other scalar.
    Str(String),
    /// A sequence.
    Seq(Vec<Node>),
    /// A mapping, in file order.
    Map(Vec<(Key, Node)>),
}

/// A mapping key with its span.
#[derive(Debug, Clone, PartialEq)]
pub struct Key {
    /// The key text.
    pub name: String,
    /// Byte range in the file.
    pub span: Range<usize>,
}

impl Value {
    /// What kind of value this is, for "expected …, found …" messages.
    pub fn kind(&self) -> &'static str {
        match self {
            Value::Null => "nothing",
            Value::Bool(_) => "a boolean",
            Value::Int(_) => "an integer",
            Value::Float(_) => "a number",
            Value::Str(_) => "text",
            Value::Seq(_) => "a list",
            Value::Map(_) => "a mapping",
        }
    }
}

impl Node {
    /// The scalar as text, whatever its YAML type (`3` → "3", `on` → "true").
    pub fn scalar_text(&self) -> Option<String> {
        match &self.value {
            Value::Str(s) => Some(s.clone()),
            Value::Int(i) => Some(i.to_string()),
            Value::Float(f) => Some(f.to_string()),
            Value::Bool(b) => Some(b.to_string()),
            Value::Null | Value::Seq(_) | Value::Map(_) => None,
        }
    }
}

fn span_of(loc: &serde_saphyr::Location) -> Range<usize> {
    let span = loc.span();
    let start = span.byte_offset().and_then(|o| usize::try_from(o).ok()).unwrap_or(0);
    let len = span.byte_len().and_then(|l| usize::try_from(l).ok()).unwrap_or(0);
    start..start + len
}

/// The raw deserialised value before spans are attached.
enum RawValue {
    Null,
    Bool(bool),
    Int(i64),
    Float(f64),
    Str(String),
    Seq(Vec<Spanned<RawValue>>),
    Map(Vec<(Spanned<String>, Spanned<RawValue>)>),
}

impl<'de> Deserialize<'de> for RawValue {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct V;
        impl<'de> Visitor<'de> for V {
            type Value = RawValue;
            fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
                f.write_str("any YAML value")
            }
            fn visit_unit<E>(self) -> Result<RawValue, E> {
                Ok(RawValue::Null)
            }
            fn visit_none<E>(self) -> Result<RawValue, E> {
                Ok(RawValue::Null)
            }
            fn visit_some<D: Deserializer<'de>>(self, d: D) -> Result<RawValue, D::Error> {
                RawValue::deserialize(d)
            }
            fn visit_bool<E>(self, v: bool) -> Result<RawValue, E> {
                Ok(RawValue::Bool(v))
            }
            fn visit_i64<E>(self, v: i64) -> Result<RawValue, E> {
                Ok(RawValue::Int(v))
            }
            fn visit_u64<E>(self, v: u64) -> Result<RawValue, E> {
                Ok(i64::try_from(v).map_or(RawValue::Float(v as f64), RawValue::Int))
            }
            fn visit_f64<E>(self, v: f64) -> Result<RawValue, E> {
                Ok(RawValue::Float(v))
            }
            fn visit_str<E>(self, v: &str) -> Result<RawValue, E> {
                Ok(RawValue::Str(v.to_owned()))
            }
            fn visit_string<E>(self, v: String) -> Result<RawValue, E> {
                Ok(RawValue::Str(v))
            }
            fn visit_seq<A: SeqAccess<'de>>(self, mut seq: A) -> Result<RawValue, A::Error> {
                let mut items = Vec::new();
                while let Some(item) = seq.next_element()? {
                    items.push(item);
                }
                Ok(RawValue::Seq(items))
            }
            fn visit_map<A: MapAccess<'de>>(self, mut map: A) -> Result<RawValue, A::Error> {
                let mut entries = Vec::new();
                while let Some(key) = map.next_key::<Spanned<String>>()? {
                    let value = map.next_value()?;
                    entries.push((key, value));
                }
                Ok(RawValue::Map(entries))
            }
        }
        d.deserialize_any(V)
    }
}

fn attach(raw: Spanned<RawValue>) -> Node {
    let span = span_of(&raw.referenced);
    let value = match raw.value {
        RawValue::Null => Value::Null,
        RawValue::Bool(b) => Value::Bool(b),
        RawValue::Int(i) => Value::Int(i),
        RawValue::Float(f) => Value::Float(f),
        RawValue::Str(s) => Value::Str(s),
        RawValue::Seq(items) => Value::Seq(items.into_iter().map(attach).collect()),
        RawValue::Map(entries) => Value::Map(
            entries
                .into_iter()
                .map(|(k, v)| (Key { span: span_of(&k.referenced), name: k.value }, attach(v)))
                .collect(),
        ),
    };
    Node { value, span }
}

/// Parses YAML text into a spanned tree, or a located syntax error.
pub fn parse(text: &str) -> Result<Node, Box<Diagnostic>> {
    match serde_saphyr::from_str::<Spanned<RawValue>>(text) {
        Ok(raw) => Ok(attach(raw)),
        Err(e) => {
            let span = e.location().map(|l| {
                let (line, col) = (l.line() as usize, l.column() as usize);
                let start = offset_of_line_col(text, line, col);
                start..(start + 1).min(text.len())
            });
            let (message, note) = plain_yaml_message(&first_line_of_error(&e.to_string()));
            Err(Box::new(
                Diagnostic::error("C0001", format!("the file is not valid YAML: {message}"), span.unwrap_or(0..0))
                    .with_label("here")
                    .with_note(note),
            ))
        }
    }
}

/// The parser's message in the site file's terms, with advice that fits it: the parser
/// speaks of its own options (`DuplicateKeyPolicy`, `from_str_multiple`, budgets), which
/// mean nothing to whoever edits the file.
fn plain_yaml_message(message: &str) -> (String, &'static str) {
    const LAYOUT: &str =
        "check indentation (spaces, not tabs) and quote text that contains `: ` or starts with `{`, `[`, `*` or `&`";
    let m = message.trim();
    if let Some(key) = m.strip_prefix("duplicate mapping key: ") {
        let key = key.split(',').next().unwrap_or(key).trim();
        return (format!("the key `{key}` is given twice in the same section"), "keep one of them");
    }
    if m.contains("from_str_multiple") || m.contains("multiple documents") {
        return (
            "more than one YAML document (a second `---`)".to_owned(),
            "a site file is one document: remove the `---` line and what follows, or merge it",
        );
    }
    if m.contains("budget breached") {
        let what = if m.contains("Depth") { "nested too deeply" } else { "too large (too many nodes or aliases)" };
        return (
            format!("the file is {what} to be a site file"),
            "a site file is a few hundred lines of plain sections; check for a runaway anchor/alias or a generated file",
        );
    }
    (m.to_owned(), LAYOUT)
}

/// serde-saphyr's message embeds its own snippet; keep only the message line.
fn first_line_of_error(message: &str) -> String {
    let line = message.lines().next().unwrap_or(message).trim();
    let line = line.strip_prefix("error: ").unwrap_or(line);
    // "line 2 column 2: illegal placement …" → drop the position, we render our own.
    match line.split_once(": ") {
        Some((pos, rest)) if pos.starts_with("line ") => rest.to_owned(),
        _ => line.to_owned(),
    }
}

fn offset_of_line_col(text: &str, line: usize, col: usize) -> usize {
    let mut offset = 0;
    for (i, l) in text.split_inclusive('\n').enumerate() {
        if i + 1 == line {
            return offset + l.char_indices().nth(col.saturating_sub(1)).map_or(l.len(), |(b, _)| b);
        }
        offset += l.len();
    }
    text.len()
}

/// Collects diagnostics while the loader walks the tree.
#[derive(Debug, Default)]
pub struct Diagnostics {
    /// Everything found so far, in file order of discovery.
    pub list: Vec<Diagnostic>,
}

impl Diagnostics {
    /// Records a diagnostic.
    pub fn push(&mut self, d: Diagnostic) {
        self.list.push(d);
    }
    /// Records an error.
    pub fn error(
        &mut self,
        code: &'static str,
        message: impl Into<String>,
        span: Range<usize>,
        label: impl Into<String>,
    ) {
        self.push(Diagnostic::error(code, message, span).with_label(label));
    }
    /// True if any error was recorded.
    pub fn has_errors(&self) -> bool {
        self.list.iter().any(Diagnostic::is_error)
    }
}

/// Walks one mapping: hands out values by key, remembers which keys were asked for,
/// and at the end reports every key nobody asked for, with a suggestion.
pub struct MapReader<'n> {
    span: Range<usize>,
    entries: &'n [(Key, Node)],
    used: Vec<bool>,
    known: Vec<&'static str>,
    what: String,
}

impl<'n> MapReader<'n> {
    /// Starts reading `node` as a mapping describing `what` (`load "tank"`). Reports
    /// and returns `None` if it is not a mapping.
    pub fn new(node: &'n Node, what: impl Into<String>, diags: &mut Diagnostics) -> Option<Self> {
        let what = what.into();
        match &node.value {
            Value::Map(entries) => {
                let mut used = vec![false; entries.len()];
                // Duplicate keys: YAML forbids them, but parsers differ; report them here.
                for (i, (k, _)) in entries.iter().enumerate() {
                    if let Some((first, _)) = entries[..i].iter().find(|(other, _)| other.name == k.name) {
                        diags.push(
                            Diagnostic::error(
                                "C0003",
                                format!("key \"{}\" appears twice in {what}", k.name),
                                k.span.clone(),
                            )
                            .with_label("second time")
                            .with_secondary(first.span.clone(), "first time"),
                        );
                        used[i] = true;
                    }
                }
                Some(MapReader { span: node.span.clone(), entries, used, known: Vec::new(), what })
            }
            Value::Null => {
                Some(MapReader { span: node.span.clone(), entries: &[], used: Vec::new(), known: Vec::new(), what })
            }
            other => {
                diags.error(
                    "C0002",
                    format!("{what} must be a mapping of keys to values, found {}", other.kind()),
                    node.span.clone(),
                    "expected `key: value` lines here",
                );
                None
            }
        }
    }

    /// The value of `key`, if present.
    pub fn get(&mut self, key: &'static str) -> Option<&'n Node> {
        self.known.push(key);
        let i = self.entries.iter().position(|(k, _)| k.name == key)?;
        self.used[i] = true;
        Some(&self.entries[i].1)
    }

    /// The key's own span, if present (for "this key" labels).
    pub fn key_span(&self, key: &str) -> Option<Range<usize>> {
        self.entries.iter().find(|(k, _)| k.name == key).map(|(k, _)| k.span.clone())
    }

    /// The value of `key`, reporting its absence.
    pub fn require(&mut self, key: &'static str, diags: &mut Diagnostics) -> Option<&'n Node> {
        let node = self.get(key);
        if node.is_none() {
            diags.error(
                "C0004",
                format!("{} is missing the key \"{key}\"", self.what),
                self.span.start..self.span.start,
                format!("add `{key}:` here"),
            );
        }
        node
    }

    /// Marks keys as known without reading them (handled by someone else).
    pub fn allow(&mut self, keys: &[&'static str]) {
        for key in keys {
            let _ = self.get(key);
        }
    }

    /// Whether the mapping has `key`.
    pub fn has(&self, key: &str) -> bool {
        self.entries.iter().any(|(k, _)| k.name == key)
    }

    /// The span of the whole mapping (its first byte).
    pub fn span(&self) -> Range<usize> {
        self.span.clone()
    }

    /// The entries of a mapping whose keys are names the user chose (devices, points),
    /// skipping duplicates (already reported).
    pub fn into_named_entries(self) -> impl Iterator<Item = &'n (Key, Node)> {
        let skip = self.used;
        self.entries.iter().enumerate().filter(move |(i, _)| !skip.get(*i).copied().unwrap_or(false)).map(|(_, e)| e)
    }

    /// Reports every key that was never asked for.
    pub fn finish(self, diags: &mut Diagnostics) {
        for ((key, _), used) in self.entries.iter().zip(&self.used) {
            if *used {
                continue;
            }
            let mut d =
                Diagnostic::error("C0005", format!("unknown key \"{}\" in {}", key.name, self.what), key.span.clone())
                    .with_label("not a key Spillway knows here");
            // `{ always: avg(export, 1min) <= 100W }`: in a flow mapping the comma ends the
            // value, and the rest reads as a key.
            let looks_like_rule = key.name.contains(')') || key.name.contains(['<', '>', '=']);
            match did_you_mean(&key.name, self.known.iter().copied()) {
                _ if looks_like_rule => {
                    d = d.with_note("this looks like the rest of a rule: inside `{ … }` a comma ends the value, so quote the whole rule, e.g. `start: \"avg(surplus, 3min) > 1kW\"`")
                }
                Some(s) => d = d.with_note(format!("did you mean \"{s}\"?")),
                None => {
                    let mut known = self.known.clone();
                    known.sort_unstable();
                    known.dedup();
                    d = d.with_note(format!("expected one of: {}", known.join(", ")));
                }
            }
            diags.push(d);
        }
    }
}

/// Byte range of `needle` inside the node's text, so a rule error can point at the
/// exact character even in quoted or block scalars. Falls back to the node's start.
pub fn locate_text(file: &str, node: &Node, needle: &str) -> usize {
    let from = node.span.start.min(file.len());
    // Quoted scalars include their quotes; block scalars start at their indicator.
    let window_end = (node.span.end.max(from) + needle.len() + 8).min(file.len());
    let window = &file[from..floor_boundary(file, window_end)];
    if let Some(i) = window.find(needle) {
        return from + i;
    }
    // Folded or escaped text: match its first line.
    let first_line = needle.lines().next().unwrap_or(needle);
    if !first_line.is_empty()
        && let Some(i) = file[from..].find(first_line)
    {
        return from + i;
    }
    from
}

/// Where each byte of `needle` (the text of `node`'s scalar) sits in `file`: one offset
/// per byte, and one for the end. A folded or multi-line scalar reads its line breaks as
/// spaces, so a plain offset would put carets on later lines in the wrong place; this
/// walks the file and skips the break and the indentation. Where the text cannot be
/// followed (escapes in a quoted string) the offsets are those of [`locate_text`].
pub fn map_text(file: &str, node: &Node, needle: &str) -> Vec<usize> {
    let start = locate_text(file, node, needle);
    let linear = || (0..=needle.len()).map(|i| start + i).collect::<Vec<_>>();
    if file[start..].starts_with(needle) {
        return linear();
    }
    let mut map = Vec::with_capacity(needle.len() + 1);
    let mut j = start;
    for ch in needle.chars() {
        let at = j;
        if ch.is_whitespace() {
            // A folded break: the file has a newline and indentation (or just spaces).
            while let Some(c) = file[j..].chars().next().filter(|c| c.is_whitespace()) {
                j += c.len_utf8();
            }
        } else if file[j..].starts_with(ch) {
            j += ch.len_utf8();
        } else {
            return linear();
        }
        map.extend(std::iter::repeat_n(at, ch.len_utf8()));
    }
    map.push(j);
    map
}

fn floor_boundary(text: &str, mut i: usize) -> usize {
    while i > 0 && !text.is_char_boundary(i) {
        i -= 1;
    }
    i
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The parser's own vocabulary (`DuplicateKeyPolicy`, `from_str_multiple`) does not
    /// reach the person editing the file.
    #[test]
    fn parser_errors_are_put_in_the_files_terms() {
        let e = parse("site:\n  name: A\n  name: B\n").unwrap_err();
        assert_eq!(e.message, "the file is not valid YAML: the key `name` is given twice in the same section");
        let e = parse("site: { name: A }\n---\nsite: { name: B }\n").unwrap_err();
        assert!(e.message.contains("more than one YAML document"), "{}", e.message);
        assert!(!e.message.contains("from_str_multiple"), "{}", e.message);
    }

    #[test]
    fn keys_and_values_carry_their_byte_spans() {
        let text = "site:\n  name: Test\nloads:\n  - rated: 3kW\n";
        let node = parse(text).unwrap();
        let Value::Map(top) = &node.value else { panic!() };
        assert_eq!(top[0].0.name, "site");
        assert_eq!(&text[top[0].0.span.clone()], "site");
        let Value::Seq(loads) = &top[1].1.value else { panic!() };
        let Value::Map(load) = &loads[0].value else { panic!() };
        assert_eq!(&text[load[0].1.span.clone()], "3kW");
    }

    #[test]
    fn syntax_errors_are_located() {
        let text = "a: [1, 2\nb: 3\n";
        let d = parse(text).unwrap_err();
        assert_eq!(d.code, "C0001");
        assert_eq!(crate::diag::line_col(text, d.primary.span.start).0, 2);
    }

    #[test]
    fn unknown_keys_get_a_suggestion() {
        let text = "name: x\nratd: 3kW\n";
        let node = parse(text).unwrap();
        let mut diags = Diagnostics::default();
        let mut m = MapReader::new(&node, "load \"x\"", &mut diags).unwrap();
        let _ = m.get("name");
        let _ = m.get("rated");
        m.finish(&mut diags);
        assert_eq!(diags.list.len(), 1);
        assert_eq!(diags.list[0].notes, vec!["did you mean \"rated\"?".to_owned()]);
        assert_eq!(&text[diags.list[0].primary.span.clone()], "ratd");
    }

    #[test]
    fn locates_rule_text_inside_quoted_and_block_scalars() {
        let text = "a: 'x > 1W'\nb: >\n  y < 2W\n";
        let node = parse(text).unwrap();
        let Value::Map(m) = &node.value else { panic!() };
        assert_eq!(locate_text(text, &m[0].1, "x > 1W"), 4);
        assert_eq!(&text[locate_text(text, &m[1].1, "y < 2W\n")..][..6], "y < 2W");
    }

    /// A rule folded over lines reads its breaks as spaces; each of its bytes still maps
    /// to its own place in the file, so a caret on the second line lands on its word.
    #[test]
    fn maps_a_folded_rule_back_onto_its_lines() {
        for text in
            ["start: >\n  surplus > 3kW\n  and tank_tmp < 60°C\n", "start: surplus > 3kW\n  and tank_tmp < 60°C\n"]
        {
            let node = parse(text).unwrap();
            let Value::Map(m) = &node.value else { panic!() };
            let Value::Str(rule) = &m[0].1.value else { panic!() };
            let map = map_text(text, &m[0].1, rule);
            assert_eq!(map.len(), rule.len() + 1);
            let at = rule.find("tank_tmp").unwrap();
            assert_eq!(&text[map[at]..map[at] + 8], "tank_tmp", "{text:?}");
        }
    }
}

//! Reading TOML with positions: an owned, spanned copy of the document, a byte-offset to line:column
//! map, and a [`TableReader`] that remembers which keys were read so that every other key can be
//! reported as unknown (with a "did you mean" hint).

use std::fmt;
use std::ops::Range;

use toml::de::{DeTable, DeValue};

use super::units::{self, Dimension};

/// A byte range in the scenario text.
pub type Span = Range<usize>;

/// A problem in a scenario, located in its file.
#[derive(Debug, Clone, PartialEq)]
pub struct ScenarioError {
    /// The file (or `<embedded default>`) the scenario came from.
    pub origin: String,
    /// 1-based line of the offending value (or of the table when a key is missing).
    pub line: usize,
    /// 1-based column, in characters.
    pub column: usize,
    /// Dotted path of the key, e.g. `stage.3.slew_rate`; empty for errors in the TOML syntax itself.
    pub key_path: String,
    pub message: String,
    /// How to fix it, when we can tell.
    pub hint: Option<String>,
}

impl ScenarioError {
    /// Attach (or replace) a hint.
    pub fn with_hint(mut self, hint: impl Into<String>) -> Self {
        self.hint = Some(hint.into());
        self
    }
}

impl fmt::Display for ScenarioError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}:{}:{}: ", self.origin, self.line, self.column)?;
        if !self.key_path.is_empty() {
            write!(f, "{}: ", self.key_path)?;
        }
        write!(f, "{}", self.message)?;
        if let Some(h) = &self.hint {
            write!(f, "\n  hint: {h}")?;
        }
        Ok(())
    }
}

impl std::error::Error for ScenarioError {}

impl From<ScenarioError> for crate::Error {
    fn from(e: ScenarioError) -> Self {
        crate::Error::BadInput(e.to_string())
    }
}

/// Maps byte offsets of a text to 1-based line and column, and builds located errors.
#[derive(Debug, Clone)]
pub struct SourceMap<'a> {
    origin: &'a str,
    text: &'a str,
    line_starts: Vec<usize>,
}

impl<'a> SourceMap<'a> {
    pub fn new(origin: &'a str, text: &'a str) -> Self {
        let mut line_starts = vec![0];
        line_starts.extend(text.match_indices('\n').map(|(i, _)| i + 1));
        SourceMap {
            origin,
            text,
            line_starts,
        }
    }

    pub fn origin(&self) -> &str {
        self.origin
    }

    /// 1-based (line, column) of a byte offset; the column counts characters. Offsets past the end or
    /// inside a character are clamped.
    pub fn position(&self, offset: usize) -> (usize, usize) {
        let mut offset = offset.min(self.text.len());
        while !self.text.is_char_boundary(offset) {
            offset -= 1;
        }
        let line = self.line_starts.partition_point(|&s| s <= offset).max(1) - 1;
        let start = self.line_starts[line];
        let column = self.text[start..offset].chars().count() + 1;
        (line + 1, column)
    }

    /// An error located at the start of `span`.
    pub fn error(&self, span: &Span, key_path: &str, message: impl Into<String>) -> ScenarioError {
        let (line, column) = self.position(span.start);
        ScenarioError {
            origin: self.origin.to_string(),
            line,
            column,
            key_path: key_path.to_string(),
            message: message.into(),
            hint: None,
        }
    }

    /// A "file:line:col: key: " prefix for warnings.
    pub fn locate(&self, span: &Span, key_path: &str) -> String {
        let (line, column) = self.position(span.start);
        format!("{}:{}:{}: {}", self.origin, line, column, key_path)
    }
}

/// A parsed TOML value with its span.
#[derive(Debug, Clone, PartialEq)]
pub struct Node {
    pub span: Span,
    pub value: Value,
}

/// An owned TOML value.
#[derive(Debug, Clone, PartialEq)]
pub enum Value {
    Str(String),
    Int(i128),
    Float(f64),
    Bool(bool),
    Datetime,
    Array(Vec<Node>),
    Table(Table),
}

impl Value {
    /// "a string", "an integer", ... for messages.
    pub fn type_name(&self) -> &'static str {
        match self {
            Value::Str(_) => "a string",
            Value::Int(_) => "an integer",
            Value::Float(_) => "a float",
            Value::Bool(_) => "a boolean",
            Value::Datetime => "a date-time",
            Value::Array(_) => "an array",
            Value::Table(_) => "a table",
        }
    }
}

/// One `key = value` of a table.
#[derive(Debug, Clone, PartialEq)]
pub struct Entry {
    pub key: String,
    pub key_span: Span,
    pub node: Node,
}

/// A table; entries in the order they appear in the text.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct Table {
    /// The table header (`[simulation]`), the inline table, or 0..0 for the document root.
    pub span: Span,
    pub entries: Vec<Entry>,
}

/// Parse a TOML document into an owned, spanned [`Table`]. Syntax errors carry the parser's position.
pub fn parse_document(map: &SourceMap<'_>) -> Result<Table, ScenarioError> {
    let doc = DeTable::parse(map.text).map_err(|e| {
        let span = e.span().unwrap_or(0..0);
        map.error(&span, "", format!("malformed TOML: {}", e.message()))
    })?;
    let span = doc.span();
    convert_table(map, doc.get_ref(), span)
}

fn convert_table(map: &SourceMap<'_>, t: &DeTable<'_>, span: Span) -> Result<Table, ScenarioError> {
    let mut entries = Vec::with_capacity(t.len());
    for (k, v) in t.iter() {
        entries.push(Entry {
            key: k.get_ref().to_string(),
            key_span: k.span(),
            node: convert_value(map, v.get_ref(), v.span(), k.get_ref())?,
        });
    }
    entries.sort_by_key(|e| (e.key_span.start, e.node.span.start));
    Ok(Table { span, entries })
}

fn convert_value(
    map: &SourceMap<'_>,
    v: &DeValue<'_>,
    span: Span,
    key: &str,
) -> Result<Node, ScenarioError> {
    let value = match v {
        DeValue::String(s) => Value::Str(s.to_string()),
        DeValue::Integer(i) => match i128::from_str_radix(i.as_str(), i.radix()) {
            Ok(n) => Value::Int(n),
            Err(_) => return Err(map.error(&span, key, "integer too large")),
        },
        DeValue::Float(f) => match f.as_str().parse::<f64>() {
            Ok(x) => Value::Float(x),
            Err(_) => return Err(map.error(&span, key, "unreadable number")),
        },
        DeValue::Boolean(b) => Value::Bool(*b),
        DeValue::Datetime(_) => Value::Datetime,
        DeValue::Array(a) => {
            let mut items = Vec::with_capacity(a.len());
            for item in a.iter() {
                items.push(convert_value(map, item.get_ref(), item.span(), key)?);
            }
            Value::Array(items)
        }
        DeValue::Table(t) => Value::Table(convert_table(map, t, span.clone())?),
    };
    Ok(Node { span, value })
}

/// A value and where it was written.
#[derive(Debug, Clone, PartialEq)]
pub struct At<T> {
    pub value: T,
    pub span: Span,
}

/// Edit distance (Levenshtein) between two strings, by characters.
pub fn edit_distance(a: &str, b: &str) -> usize {
    let b: Vec<char> = b.chars().collect();
    let mut prev: Vec<usize> = (0..=b.len()).collect();
    let mut cur = vec![0; b.len() + 1];
    for (i, ca) in a.chars().enumerate() {
        cur[0] = i + 1;
        for (j, cb) in b.iter().enumerate() {
            let sub = prev[j] + usize::from(ca != *cb);
            cur[j + 1] = sub.min(prev[j + 1] + 1).min(cur[j] + 1);
        }
        std::mem::swap(&mut prev, &mut cur);
    }
    prev[b.len()]
}

/// The candidate closest to `word`, if it is close enough to be a likely typo.
pub fn did_you_mean<'c>(word: &str, candidates: &[&'c str]) -> Option<&'c str> {
    let lower = word.to_lowercase();
    candidates
        .iter()
        .map(|c| (edit_distance(&lower, &c.to_lowercase()), *c))
        .filter(|(d, c)| *d <= (c.chars().count() / 3).max(2))
        .min_by_key(|(d, _)| *d)
        .map(|(_, c)| c)
}

/// Read the value of a node as a quantity of the given dimension (bare number in SI base units, or a
/// string with prefix and unit).
pub fn node_quantity(
    map: &SourceMap<'_>,
    node: &Node,
    path: &str,
    dim: Dimension,
) -> Result<f64, ScenarioError> {
    match &node.value {
        Value::Int(n) => Ok(convert_bare(*n as f64, dim)),
        Value::Float(x) if x.is_finite() => Ok(convert_bare(*x, dim)),
        Value::Float(_) => Err(map.error(&node.span, path, "must be a finite number")),
        Value::Str(s) => units::parse_quantity(s, dim).map_err(|e| {
            let err = map.error(&node.span, path, e.message);
            match e.hint {
                Some(h) => err.with_hint(h),
                None => err,
            }
        }),
        other => Err(map.error(
            &node.span,
            path,
            format!(
                "expected {}, found {}",
                dim.expectation(),
                other.type_name()
            ),
        )),
    }
}

/// A bare number in the dimension's default unit.
fn convert_bare(x: f64, dim: Dimension) -> f64 {
    match dim {
        Dimension::Angle => x.to_radians(),
        _ => x,
    }
}

/// Reads the keys of one table, remembering which were read.
pub struct TableReader<'a, 'm> {
    map: &'m SourceMap<'m>,
    table: &'a Table,
    path: String,
    used: Vec<bool>,
    asked: Vec<&'static str>,
}

impl<'a, 'm> TableReader<'a, 'm> {
    /// `path` is the dotted key path of the table (`""` for the root, `stage.3`).
    pub fn new(map: &'m SourceMap<'m>, table: &'a Table, path: impl Into<String>) -> Self {
        TableReader {
            map,
            table,
            path: path.into(),
            used: vec![false; table.entries.len()],
            asked: Vec::new(),
        }
    }

    pub fn map(&self) -> &'m SourceMap<'m> {
        self.map
    }

    /// The table's own span (its header).
    pub fn span(&self) -> Span {
        self.table.span.clone()
    }

    /// The table's key path.
    pub fn path(&self) -> &str {
        &self.path
    }

    /// Dotted path of a key of this table.
    pub fn path_of(&self, key: &str) -> String {
        if self.path.is_empty() {
            key.to_string()
        } else {
            format!("{}.{}", self.path, key)
        }
    }

    /// True when the key is present (does not mark it read).
    pub fn has(&self, key: &str) -> bool {
        self.table.entries.iter().any(|e| e.key == key)
    }

    /// Mark a key read and return its node.
    pub fn take(&mut self, key: &'static str) -> Option<&'a Node> {
        if !self.asked.contains(&key) {
            self.asked.push(key);
        }
        let i = self.table.entries.iter().position(|e| e.key == key)?;
        self.used[i] = true;
        Some(&self.table.entries[i].node)
    }

    /// An error at `span` about `key`.
    pub fn error(&self, span: &Span, key: &str, message: impl Into<String>) -> ScenarioError {
        self.map.error(span, &self.path_of(key), message)
    }

    /// An error at the table about a missing key. When the table holds an unread key that looks like a
    /// misspelling of it (`bitz` for `bits`), that key is named instead, at its own position.
    pub fn missing(&self, key: &str, what: &str) -> ScenarioError {
        let typo = self
            .table
            .entries
            .iter()
            .zip(&self.used)
            .filter(|(e, used)| !**used && e.key != key)
            .map(|(e, _)| (edit_distance(&e.key, key), e))
            .filter(|(d, e)| *d <= 2 && *d < e.key.len().max(key.len()))
            .min_by_key(|(d, _)| *d);
        if let Some((_, e)) = typo {
            return self
                .map
                .error(
                    &e.key_span,
                    &self.path_of(&e.key),
                    format!("unknown key `{}`", e.key),
                )
                .with_hint(format!("did you mean `{key}`? (`{key}` is required here)"));
        }
        let table = if self.path.is_empty() {
            "the top level".to_string()
        } else {
            format!("[{}]", self.path)
        };
        self.map
            .error(
                &self.table.span,
                &self.path_of(key),
                format!("missing key `{key}` in {table}"),
            )
            .with_hint(format!("add `{key} = {what}`"))
    }

    fn type_error(&self, node: &Node, key: &str, expected: &str) -> ScenarioError {
        self.error(
            &node.span,
            key,
            format!("expected {expected}, found {}", node.value.type_name()),
        )
    }

    /// An optional quantity.
    pub fn quantity(
        &mut self,
        key: &'static str,
        dim: Dimension,
    ) -> Result<Option<At<f64>>, ScenarioError> {
        let Some(node) = self.take(key) else {
            return Ok(None);
        };
        let value = node_quantity(self.map, node, &self.path_of(key), dim)?;
        Ok(Some(At {
            value,
            span: node.span.clone(),
        }))
    }

    /// A required quantity; `example` is shown in the hint when it is missing.
    pub fn req_quantity(
        &mut self,
        key: &'static str,
        dim: Dimension,
        example: &str,
    ) -> Result<At<f64>, ScenarioError> {
        self.quantity(key, dim)?
            .ok_or_else(|| self.missing(key, example))
    }

    /// An optional quantity that must be > 0.
    pub fn positive(
        &mut self,
        key: &'static str,
        dim: Dimension,
    ) -> Result<Option<At<f64>>, ScenarioError> {
        let q = self.quantity(key, dim)?;
        if let Some(q) = &q
            && q.value <= 0.0
        {
            return Err(self.error(
                &q.span,
                key,
                format!("must be greater than zero, found {}", show(q.value, dim)),
            ));
        }
        Ok(q)
    }

    /// A required quantity that must be > 0.
    pub fn req_positive(
        &mut self,
        key: &'static str,
        dim: Dimension,
        example: &str,
    ) -> Result<At<f64>, ScenarioError> {
        self.positive(key, dim)?
            .ok_or_else(|| self.missing(key, example))
    }

    /// An optional quantity that must be >= 0; 0 when absent.
    pub fn non_negative(
        &mut self,
        key: &'static str,
        dim: Dimension,
    ) -> Result<f64, ScenarioError> {
        match self.quantity(key, dim)? {
            None => Ok(0.0),
            Some(q) if q.value < 0.0 => Err(self.error(
                &q.span,
                key,
                format!("must not be negative, found {}", show(q.value, dim)),
            )),
            Some(q) => Ok(q.value),
        }
    }

    /// A plain number (integer or float), no units.
    pub fn number(&mut self, key: &'static str) -> Result<Option<At<f64>>, ScenarioError> {
        let Some(node) = self.take(key) else {
            return Ok(None);
        };
        let value = match &node.value {
            Value::Int(n) => *n as f64,
            Value::Float(x) if x.is_finite() => *x,
            Value::Float(_) => return Err(self.error(&node.span, key, "must be a finite number")),
            _ => return Err(self.type_error(node, key, "a number")),
        };
        Ok(Some(At {
            value,
            span: node.span.clone(),
        }))
    }

    /// An optional integer within `lo..=hi`.
    pub fn integer(
        &mut self,
        key: &'static str,
        lo: i128,
        hi: i128,
    ) -> Result<Option<At<i128>>, ScenarioError> {
        let Some(node) = self.take(key) else {
            return Ok(None);
        };
        let Value::Int(n) = node.value else {
            let mut e = self.type_error(node, key, "an integer");
            if let Value::Str(s) = &node.value
                && s.trim().parse::<i128>().is_ok()
            {
                e = e.with_hint(format!("write it without quotes: {key} = {}", s.trim()));
            }
            return Err(e);
        };
        if lo == 0 && n < 0 {
            return Err(self.error(&node.span, key, format!("must not be negative, found {n}")));
        }
        if n < lo || n > hi {
            let range = if hi == i128::MAX {
                format!("at least {lo}")
            } else {
                format!("from {lo} to {hi}")
            };
            return Err(self.error(&node.span, key, format!("must be {range}, found {n}")));
        }
        Ok(Some(At {
            value: n,
            span: node.span.clone(),
        }))
    }

    /// An optional string.
    pub fn string(&mut self, key: &'static str) -> Result<Option<At<&'a str>>, ScenarioError> {
        let Some(node) = self.take(key) else {
            return Ok(None);
        };
        match &node.value {
            Value::Str(s) => Ok(Some(At {
                value: s.as_str(),
                span: node.span.clone(),
            })),
            _ => Err(self.type_error(node, key, "a string")),
        }
    }

    /// An optional boolean.
    pub fn boolean(&mut self, key: &'static str) -> Result<Option<At<bool>>, ScenarioError> {
        let Some(node) = self.take(key) else {
            return Ok(None);
        };
        match node.value {
            Value::Bool(b) => Ok(Some(At {
                value: b,
                span: node.span.clone(),
            })),
            _ => Err(self.type_error(node, key, "true or false")),
        }
    }

    /// An optional choice among named options; an unknown name gets a "did you mean" hint.
    pub fn choice<T: Copy>(
        &mut self,
        key: &'static str,
        options: &[(&'static str, T)],
    ) -> Result<Option<At<T>>, ScenarioError> {
        let Some(s) = self.string(key)? else {
            return Ok(None);
        };
        if let Some((_, v)) = options.iter().find(|(n, _)| *n == s.value) {
            return Ok(Some(At {
                value: *v,
                span: s.span,
            }));
        }
        let names: Vec<&str> = options.iter().map(|(n, _)| *n).collect();
        Err(unknown_choice(
            self.map,
            &s.span,
            &self.path_of(key),
            key,
            s.value,
            &names,
        ))
    }

    /// An optional `[low, high]` pair of quantities with low < high.
    pub fn pair(
        &mut self,
        key: &'static str,
        dim: Dimension,
    ) -> Result<Option<At<(f64, f64)>>, ScenarioError> {
        let Some(node) = self.take(key) else {
            return Ok(None);
        };
        let example = format!("[\"-1 {0}\", \"1 {0}\"]", dim.base_unit());
        let Value::Array(items) = &node.value else {
            return Err(self
                .type_error(node, key, "an array of two values")
                .with_hint(format!("write {key} = {example}")));
        };
        if items.len() != 2 {
            return Err(self
                .error(
                    &node.span,
                    key,
                    format!("expected two values [low, high], found {}", items.len()),
                )
                .with_hint(format!("write {key} = {example}")));
        }
        let path = self.path_of(key);
        let lo = node_quantity(self.map, &items[0], &format!("{path}.1"), dim)?;
        let hi = node_quantity(self.map, &items[1], &format!("{path}.2"), dim)?;
        if lo >= hi {
            return Err(self
                .error(
                    &node.span,
                    key,
                    format!(
                        "the low end ({}) must be below the high end ({})",
                        show(lo, dim),
                        show(hi, dim)
                    ),
                )
                .with_hint("write [low, high]"));
        }
        Ok(Some(At {
            value: (lo, hi),
            span: node.span.clone(),
        }))
    }

    /// An optional sub-table.
    pub fn table(&mut self, key: &'static str) -> Result<Option<&'a Table>, ScenarioError> {
        let Some(node) = self.take(key) else {
            return Ok(None);
        };
        match &node.value {
            Value::Table(t) => Ok(Some(t)),
            _ => Err(self
                .type_error(node, key, "a table")
                .with_hint(format!("write a [{}] section", self.path_of(key)))),
        }
    }

    /// An optional array.
    pub fn array(&mut self, key: &'static str) -> Result<Option<At<&'a [Node]>>, ScenarioError> {
        let Some(node) = self.take(key) else {
            return Ok(None);
        };
        match &node.value {
            Value::Array(items) => Ok(Some(At {
                value: items.as_slice(),
                span: node.span.clone(),
            })),
            _ => Err(self.type_error(node, key, "an array")),
        }
    }

    /// Check that every key was read. `elsewhere` are keys that exist in this kind of table but do not
    /// apply in this case (e.g. `duty` for a sine source); `context` describes the case ("waveform \"sine\"").
    pub fn finish(self, elsewhere: &[&str], context: &str) -> Result<(), ScenarioError> {
        for (entry, used) in self.table.entries.iter().zip(&self.used) {
            if *used {
                continue;
            }
            let path = self.path_of(&entry.key);
            if elsewhere.contains(&entry.key.as_str()) {
                return Err(self
                    .map
                    .error(
                        &entry.key_span,
                        &path,
                        format!("`{}` does not apply to {context}", entry.key),
                    )
                    .with_hint(format!(
                        "remove it; keys for {context}: {}",
                        list(&self.asked)
                    )));
            }
            let mut candidates: Vec<&str> = self.asked.clone();
            candidates.extend_from_slice(elsewhere);
            let err = self.map.error(
                &entry.key_span,
                &path,
                format!("unknown key `{}`", entry.key),
            );
            return Err(match did_you_mean(&entry.key, &candidates) {
                Some(m) => err.with_hint(format!("did you mean `{m}`?")),
                None => err.with_hint(format!("keys for {context}: {}", list(&self.asked))),
            });
        }
        Ok(())
    }
}

/// Error for a name that is not one of `names`, with a "did you mean" hint.
pub fn unknown_choice(
    map: &SourceMap<'_>,
    span: &Span,
    path: &str,
    what: &str,
    found: &str,
    names: &[&str],
) -> ScenarioError {
    let all = names
        .iter()
        .map(|n| format!("\"{n}\""))
        .collect::<Vec<_>>()
        .join(", ");
    let err = map.error(span, path, format!("unknown {what} \"{found}\""));
    match did_you_mean(found, names) {
        Some(m) => err.with_hint(format!("did you mean \"{m}\"? (one of {all})")),
        None => err.with_hint(format!("use one of {all}")),
    }
}

fn list(keys: &[&str]) -> String {
    keys.iter()
        .map(|k| format!("`{k}`"))
        .collect::<Vec<_>>()
        .join(", ")
}

/// A value with its unit, for messages.
pub fn show(value: f64, dim: Dimension) -> String {
    match dim {
        Dimension::Ratio | Dimension::Gain => format!("{value}"),
        Dimension::Angle => format!("{} deg", value.to_degrees()),
        Dimension::Decibels => format!("{value} dB"),
        _ => units::format_si(value, dim.base_unit()),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn parse(text: &str) -> Result<Table, ScenarioError> {
        parse_document(&SourceMap::new("t.toml", text))
    }

    #[test]
    fn positions_are_one_based_lines_and_character_columns() {
        let m = SourceMap::new("f", "ab\nµx = 1\n");
        assert_eq!(m.position(0), (1, 1));
        assert_eq!(m.position(3), (2, 1));
        // 'µ' is two bytes; the 'x' after it is column 2.
        assert_eq!(m.position(5), (2, 2));
        // Inside a multi-byte character, past the end: clamped, no panic.
        assert_eq!(m.position(4), (2, 1));
        assert_eq!(m.position(999), (3, 1));
    }

    #[test]
    fn display_has_location_key_message_and_hint() {
        let m = SourceMap::new("bench.toml", "a = 1\nb = 2\n");
        let e = m
            .error(&(10..11), "stage.3.slew_rate", "must be positive")
            .with_hint("write \"13 V/us\"");
        assert_eq!(
            e.to_string(),
            "bench.toml:2:5: stage.3.slew_rate: must be positive\n  hint: write \"13 V/us\""
        );
        let as_crate: crate::Error = e.clone().into();
        assert!(matches!(as_crate, crate::Error::BadInput(ref s) if *s == e.to_string()));
    }

    #[test]
    fn malformed_toml_reports_the_parser_position() {
        let e = parse("a = 1\nb = \n").unwrap_err();
        assert_eq!((e.line, e.column), (2, 5));
        assert!(e.message.starts_with("malformed TOML"), "{}", e.message);
        let e = parse("a = 1\na = 2\n").unwrap_err();
        assert_eq!(e.line, 2);
        assert!(e.message.contains("duplicate key"));
    }

    #[test]
    fn entries_keep_source_order_and_spans() {
        let text = "zeta = 1\nalpha = \"x\"\n[t]\nk = 0x10\n";
        let t = parse(text).unwrap();
        let keys: Vec<&str> = t.entries.iter().map(|e| e.key.as_str()).collect();
        assert_eq!(keys, ["zeta", "alpha", "t"]);
        let Value::Table(sub) = &t.entries[2].node.value else {
            panic!()
        };
        assert_eq!(sub.entries[0].node.value, Value::Int(16));
        assert_eq!(&text[sub.span.clone()], "[t]");
    }

    #[test]
    fn unread_keys_are_unknown_with_a_suggestion() {
        let text = "[simulation]\nanalog_rate = 1\ndurration = 2\n";
        let t = parse(text).unwrap();
        let Value::Table(sim) = &t.entries[0].node.value else {
            panic!()
        };
        let m = SourceMap::new("t.toml", text);
        let mut r = TableReader::new(&m, sim, "simulation");
        r.quantity("analog_rate", Dimension::Frequency).unwrap();
        r.quantity("duration", Dimension::Time).unwrap();
        let e = r.finish(&[], "[simulation]").unwrap_err();
        assert_eq!(e.key_path, "simulation.durration");
        assert_eq!((e.line, e.column), (3, 1));
        assert_eq!(e.message, "unknown key `durration`");
        assert_eq!(e.hint.as_deref(), Some("did you mean `duration`?"));
    }

    #[test]
    fn edit_distance_matches_hand_counts() {
        // Hand-counted: one deletion; kitten/sitting is the classic 3.
        assert_eq!(edit_distance("buterworth", "butterworth"), 1);
        assert_eq!(edit_distance("kitten", "sitting"), 3);
        assert_eq!(edit_distance("", "abc"), 3);
        assert_eq!(
            did_you_mean("buterworth", &["butterworth", "bessel"]),
            Some("butterworth")
        );
        assert_eq!(did_you_mean("xyzzy", &["butterworth", "bessel"]), None);
    }
}

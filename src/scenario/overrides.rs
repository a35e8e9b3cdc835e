//! Changing values of a scenario by key path (`source.frequency`, `stage.3.slew_rate`, `simulation.seed`), for
//! sweeps and Monte-Carlo studies. The change is made on the TOML document, and the result goes through the
//! same checks as a file, so an override can never produce a scenario a file could not.

use std::path::Path;

use toml::{Table, Value};

use crate::error::{Error, Result};
use crate::scenario::{Scenario, parse_str};
use crate::stages::kind::KeyEdit;

pub use crate::scenario::keys::is_integer_key;

/// One change to a scenario document, for [`ScenarioText::with_edits`]. Paths are as for
/// [`ScenarioText::with`]; stage numbers count from 1 and refer to the document as it stands when the edit is
/// applied (edits apply in order, so a removed stage shifts the numbers of the stages after it).
#[derive(Debug, Clone, PartialEq)]
pub enum Edit {
    /// Set a number (SI base units; whole numbers for integer keys).
    Set(String, f64),
    /// Set a string value (a choice such as `input = "held"`, or a quantity string such as `"1 kHz"`).
    SetStr(String, String),
    /// Remove a key (the scenario's default then applies). Removing a key that is absent is not an error.
    Remove(String),
    /// Remove a whole `[[stage]]` by its number from 1.
    RemoveStage(usize),
}

impl Edit {
    /// A stage kind's own edit ([`KeyEdit`], relative to its table) made a path edit of stage `n` (from 1).
    pub fn of_stage(n: usize, e: &KeyEdit) -> Edit {
        let key = |k: &str| format!("stage.{n}.{k}");
        match e {
            KeyEdit::Set(k, v) => Edit::Set(key(k), *v),
            KeyEdit::SetStr(k, v) => Edit::SetStr(key(k), v.to_string()),
            KeyEdit::Remove(k) => Edit::Remove(key(k)),
            KeyEdit::RemoveStage => Edit::RemoveStage(n),
        }
    }
}

impl std::fmt::Display for Edit {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            Edit::Set(p, v) => write!(f, "{p}={v}"),
            Edit::SetStr(p, v) => write!(f, "{p}=\"{v}\""),
            Edit::Remove(p) => write!(f, "{p} removed"),
            Edit::RemoveStage(i) => write!(f, "stage.{i} removed"),
        }
    }
}

/// A scenario's text with the ability to re-check it with some values replaced.
#[derive(Debug, Clone)]
pub struct ScenarioText {
    pub text: String,
    pub origin: String,
    pub base_dir: std::path::PathBuf,
    doc: Table,
}

impl ScenarioText {
    /// Read a scenario file (checked once as it is).
    pub fn load(path: &Path) -> Result<ScenarioText> {
        let text = crate::text::read_user_text(path, "a scenario file (TOML)")?;
        let base_dir = match path.parent() {
            Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
            _ => std::path::PathBuf::from("."),
        };
        Self::new(text, path.display().to_string(), base_dir)
    }

    /// Wrap scenario text (checked once as it is).
    pub fn new(text: String, origin: String, base_dir: std::path::PathBuf) -> Result<ScenarioText> {
        parse_str(&text, &origin, &base_dir)?;
        let doc: Table = text
            .parse()
            .map_err(|e: toml::de::Error| Error::BadInput(format!("{origin}: {e}")))?;
        Ok(ScenarioText {
            text,
            origin,
            base_dir,
            doc,
        })
    }

    /// The scenario file at `path`, or the embedded default scenario when there is none.
    pub fn load_or_default(path: Option<&Path>) -> Result<ScenarioText> {
        match path {
            Some(p) => Self::load(p),
            None => Self::new(
                crate::DEFAULT_SCENARIO.to_string(),
                "<embedded default>".into(),
                std::path::PathBuf::from("."),
            ),
        }
    }

    /// The scenario as written.
    pub fn scenario(&self) -> Result<Scenario> {
        Ok(parse_str(&self.text, &self.origin, &self.base_dir)?)
    }

    /// The scenario with `overrides` (key path, value in SI base units) applied and checked.
    pub fn with(&self, overrides: &[(String, f64)]) -> Result<Scenario> {
        if overrides.is_empty() {
            return self.scenario();
        }
        let mut doc = self.doc.clone();
        for (path, value) in overrides {
            set(&mut doc, path, *value).map_err(|m| {
                Error::BadInput(format!("{}: cannot set `{path}`: {m}", self.origin))
            })?;
        }
        let text = toml::to_string(&doc).map_err(|e| Error::Run(e.to_string()))?;
        let described: Vec<String> = overrides.iter().map(|(p, v)| format!("{p}={v}")).collect();
        let origin = format!("{} (with {})", self.origin, described.join(", "));
        Ok(parse_str(&text, &origin, &self.base_dir)?)
    }

    /// The scenario with `edits` applied in order and checked like a file.
    pub fn with_edits(&self, edits: &[Edit]) -> Result<Scenario> {
        if edits.is_empty() {
            return self.scenario();
        }
        let mut doc = self.doc.clone();
        for e in edits {
            apply(&mut doc, e).map_err(|m| {
                Error::BadInput(format!("{}: cannot apply `{e}`: {m}", self.origin))
            })?;
        }
        let text = toml::to_string(&doc).map_err(|e| Error::Run(e.to_string()))?;
        let described: Vec<String> = edits.iter().map(|e| e.to_string()).collect();
        let origin = format!("{} (with {})", self.origin, described.join(", "));
        Ok(parse_str(&text, &origin, &self.base_dir)?)
    }

    /// For a scenario with `[[path]]` tables: the scenario with only its first path, as a plain chain of
    /// `[[stage]]` tables (so `stage.N` keys address that path's stages), and the path's name. None for a
    /// scenario without paths.
    pub fn first_path_only(&self) -> Result<Option<(ScenarioText, String)>> {
        self.path_only(None)
    }

    /// For a scenario with `[[path]]` tables: the scenario with only the path called `name` (the first when
    /// None), as a plain chain of `[[stage]]` tables (so `stage.N` keys address that path's stages), and the
    /// path's name. None for a scenario without paths; a name no path has is bad input that lists the names.
    pub fn path_only(&self, name: Option<&str>) -> Result<Option<(ScenarioText, String)>> {
        let Some(paths) = self.doc.get("path").and_then(Value::as_array) else {
            return Ok(None);
        };
        let named: Vec<(String, &Table)> = paths
            .iter()
            .enumerate()
            .filter_map(|(i, p)| {
                let t = p.as_table()?;
                let n = t.get("name").and_then(Value::as_str);
                Some((n.map_or_else(|| (i + 1).to_string(), str::to_string), t))
            })
            .collect();
        let chosen = match name {
            None => named.first(),
            Some(want) => {
                let found = named.iter().find(|(n, _)| n == want);
                if found.is_none() {
                    let names: Vec<String> =
                        named.iter().map(|(n, _)| format!("\"{n}\"")).collect();
                    return Err(Error::BadInput(format!(
                        "{}: no [[path]] is named \"{want}\"; the paths are {} (give one of them)",
                        self.origin,
                        names.join(", ")
                    )));
                }
                found
            }
        };
        let Some((name, table)) = chosen else {
            return Ok(None);
        };
        let mut doc = self.doc.clone();
        doc.remove("path");
        if let Some(stages) = table.get("stage") {
            doc.insert("stage".into(), stages.clone());
        }
        let text = toml::to_string(&doc).map_err(|e| Error::Run(e.to_string()))?;
        let origin = format!("{} (path \"{name}\")", self.origin);
        Ok(Some((
            ScenarioText::new(text, origin, self.base_dir.clone())?,
            name.clone(),
        )))
    }

    /// True when `path` is written in the scenario (whatever its type).
    pub fn contains(&self, path: &str) -> bool {
        lookup(&self.doc, path).is_ok()
    }

    /// The string written at `path`, if it is a string.
    pub fn get_str(&self, path: &str) -> Option<&str> {
        lookup(&self.doc, path).ok()?.as_str()
    }

    /// The current value (SI base units) at `path`, if it is written as a number or a quantity string.
    pub fn get(&self, path: &str) -> Option<f64> {
        let v = lookup(&self.doc, path).ok()?;
        match v {
            Value::Integer(i) => Some(*i as f64),
            Value::Float(f) => Some(*f),
            Value::String(s) => parse_any_quantity(s),
            _ => None,
        }
    }
}

/// Parse a quantity string whatever its dimension (for reading a current value).
fn parse_any_quantity(s: &str) -> Option<f64> {
    use crate::format::units::{Dimension, parse_quantity};
    [
        Dimension::Frequency,
        Dimension::Time,
        Dimension::Voltage,
        Dimension::SlewRate,
        Dimension::Ratio,
        Dimension::Gain,
        Dimension::Decibels,
    ]
    .into_iter()
    .find_map(|d| parse_quantity(s, d).ok())
}

fn split(path: &str) -> std::result::Result<(Vec<&str>, &str), String> {
    let parts: Vec<&str> = path.split('.').collect();
    if parts.len() < 2 || parts.iter().any(|p| p.is_empty()) {
        return Err("a key path looks like `source.frequency` or `stage.3.slew_rate`".into());
    }
    let (last, head) = parts.split_last().expect("two or more parts");
    Ok((head.to_vec(), last))
}

/// The table a path's last key lives in.
fn table_mut<'a>(doc: &'a mut Table, head: &[&str]) -> std::result::Result<&'a mut Table, String> {
    let mut t = doc;
    let mut i = 0;
    while i < head.len() {
        let name = head[i];
        if name == "stage" {
            let idx: usize = head.get(i + 1).and_then(|s| s.parse().ok()).ok_or(
                "`stage` is followed by the stage's number from 1, as in `stage.3.slew_rate`",
            )?;
            let arr = t
                .get_mut("stage")
                .and_then(Value::as_array_mut)
                .ok_or("the scenario has no [[stage]]")?;
            let n = arr.len();
            t = arr
                .get_mut(idx.wrapping_sub(1))
                .and_then(Value::as_table_mut)
                .ok_or(format!(
                    "there is no stage {idx} (stages are numbered 1 to {n})"
                ))?;
            i += 2;
        } else {
            t = t
                .entry(name.to_string())
                .or_insert_with(|| Value::Table(Table::new()))
                .as_table_mut()
                .ok_or(format!("`{name}` is not a table"))?;
            i += 1;
        }
    }
    Ok(t)
}

fn lookup<'a>(doc: &'a Table, path: &str) -> std::result::Result<&'a Value, String> {
    let (head, last) = split(path)?;
    let mut t = doc;
    let mut i = 0;
    while i < head.len() {
        if head[i] == "stage" {
            let idx: usize = head
                .get(i + 1)
                .and_then(|s| s.parse().ok())
                .ok_or("bad stage number")?;
            t = t
                .get("stage")
                .and_then(Value::as_array)
                .and_then(|a| a.get(idx.wrapping_sub(1)))
                .and_then(Value::as_table)
                .ok_or("no such stage")?;
            i += 2;
        } else {
            t = t
                .get(head[i])
                .and_then(Value::as_table)
                .ok_or("no such table")?;
            i += 1;
        }
    }
    t.get(last).ok_or_else(|| format!("no key `{last}`"))
}

fn set(doc: &mut Table, path: &str, value: f64) -> std::result::Result<(), String> {
    if !value.is_finite() {
        return Err("the value is not a finite number".into());
    }
    let (head, last) = split(path)?;
    let t = table_mut(doc, &head)?;
    let v = if is_integer_key(last) {
        if value.fract() != 0.0 && (value - value.round()).abs() > 1e-9 {
            return Err(format!("`{last}` takes a whole number"));
        }
        Value::Integer(value.round() as i64)
    } else {
        Value::Float(value)
    };
    t.insert(last.to_string(), v);
    Ok(())
}

fn apply(doc: &mut Table, edit: &Edit) -> std::result::Result<(), String> {
    match edit {
        Edit::Set(path, v) => set(doc, path, *v),
        Edit::SetStr(path, v) => {
            let (head, last) = split(path)?;
            table_mut(doc, &head)?.insert(last.to_string(), Value::String(v.clone()));
            Ok(())
        }
        Edit::Remove(path) => {
            let (head, last) = split(path)?;
            table_mut(doc, &head)?.remove(last);
            Ok(())
        }
        Edit::RemoveStage(idx) => {
            let arr = doc
                .get_mut("stage")
                .and_then(Value::as_array_mut)
                .ok_or("the scenario has no [[stage]]")?;
            let n = arr.len();
            if *idx == 0 || *idx > n {
                return Err(format!(
                    "there is no stage {idx} (stages are numbered 1 to {n})"
                ));
            }
            arr.remove(idx - 1);
            Ok(())
        }
    }
}

/// A candidate ablation: one non-ideality of one stage and the edits that make it ideal (the limit finder's
/// diagnosis and the static bench's missing-code causes).
#[derive(Debug, Clone, PartialEq)]
pub struct Candidate {
    /// Index of the stage in the chain (0-based).
    pub stage_index: usize,
    pub mechanism: String,
    pub stage: String,
    pub change: String,
    pub edits: Vec<Edit>,
}

/// The non-idealities present in the scenario, each with the edits that make it ideal (each stage kind lists its
/// own: [`crate::stages::kind::KindSpec::ablations`]).
pub fn candidates(sc: &Scenario) -> Vec<Candidate> {
    let mut out = Vec::new();
    for (i, st) in sc.stages.iter().enumerate() {
        let n = i + 1;
        for ab in st.kind.ablations() {
            let edits = ab.edits.iter().map(|e| Edit::of_stage(n, e)).collect();
            out.push(Candidate {
                stage_index: i,
                mechanism: ab.mechanism,
                stage: st.label.clone(),
                change: format!("{}: {}", st.label, ab.change),
                edits,
            });
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    fn demo() -> ScenarioText {
        ScenarioText::new(
            crate::DEFAULT_SCENARIO.to_string(),
            "demo".into(),
            std::path::PathBuf::from("."),
        )
        .unwrap()
    }

    #[test]
    fn overrides_reach_the_checked_scenario() {
        let t = demo();
        let sc = t
            .with(&[
                ("source.frequency".into(), 2000.0),
                ("simulation.seed".into(), 42.0),
                ("stage.6.order".into(), 2.0),
            ])
            .unwrap();
        assert_eq!(sc.source.waveform.fundamental_hz(), Some(2000.0));
        assert_eq!(sc.simulation.seed, 42);
        match &sc.stages[5].kind {
            crate::scenario::StageKind::Filter(f) => assert_eq!(f.order, 2),
            k => panic!("{k:?}"),
        }
    }

    #[test]
    fn current_values_are_read_in_si_units() {
        let t = demo();
        assert_eq!(t.get("source.frequency"), Some(1000.0));
        assert_eq!(t.get("stage.4.conversion_time"), Some(12e-6));
        assert_eq!(t.get("stage.1.slew_rate"), Some(13e6));
    }

    #[test]
    fn bad_paths_and_values_are_bad_input() {
        let t = demo();
        for (p, v) in [
            ("stage.9.gain", 1.0),
            ("frequency", 1.0),
            ("stage.6.order", 2.5),
            ("stage.6.order", 99.0),
        ] {
            let e = t.with(&[(p.into(), v)]).unwrap_err();
            assert!(e.is_bad_input(), "{p}: {e}");
        }
    }

    #[test]
    fn edits_set_strings_remove_keys_and_remove_stages() {
        let t = demo();
        // Stage 1 of the demo is an amplifier with a slew rate; stage 6 a filter.
        assert!(t.contains("stage.1.slew_rate"));
        let n = t.scenario().unwrap().stages.len();
        let sc = t
            .with_edits(&[
                Edit::Remove("stage.1.slew_rate".into()),
                Edit::SetStr("source.frequency".into(), "2 kHz".into()),
                Edit::Set("simulation.seed".into(), 9.0),
                Edit::RemoveStage(6),
            ])
            .unwrap();
        assert_eq!(sc.stages.len(), n - 1);
        assert_eq!(sc.simulation.seed, 9);
        assert_eq!(sc.source.waveform.fundamental_hz(), Some(2000.0));
        match &sc.stages[0].kind {
            crate::scenario::StageKind::Amplifier(a) => {
                assert_eq!(a.output.slew_rate_v_per_s, None)
            }
            k => panic!("{k:?}"),
        }
        assert!(
            !sc.stages
                .iter()
                .any(|s| s.label == t.scenario().unwrap().stages[5].label)
        );
    }

    #[test]
    fn bad_edits_are_bad_input() {
        let t = demo();
        for e in [
            Edit::RemoveStage(0),
            Edit::RemoveStage(99),
            Edit::SetStr("stage.4.input".into(), "floating".into()),
            Edit::Remove("frequency".into()),
        ] {
            let err = t.with_edits(std::slice::from_ref(&e)).unwrap_err();
            assert!(err.is_bad_input(), "{e}: {err}");
        }
    }

    #[test]
    fn integer_keys_are_known() {
        assert!(is_integer_key("bits"));
        assert!(!is_integer_key("frequency"));
    }
}

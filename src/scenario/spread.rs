//! `[spread]`: the key paths a Monte-Carlo study draws, checked against the scenario and the keys' lists.

use super::*;
use crate::format::reader::{Node, ScenarioError, SourceMap, Span, Table, TableReader, Value};
use crate::format::units::Dimension;
use crate::stages::registry::KIND_NAMES;

/// The keys of a section or stage kind that can be spread, with their dimension.
fn spreadable_keys(kind: &str) -> Vec<(&'static str, Dimension)> {
    crate::scenario::keys::params_of(kind)
        .iter()
        .filter(|p| p.spread)
        // A plain number is spread like a ratio: bare in its own unit, or `%` / `ppm` of the written value.
        .filter_map(|p| {
            let dim = match p.kind {
                crate::stages::kind::ParamKind::Number => Some(Dimension::Ratio),
                _ => p.dimension(),
            };
            Some((p.key, dim?))
        })
        .collect()
}

/// One `[spread]` entry before checking: its key path, where the key is written, its value.
struct SpreadEntry<'a> {
    path: String,
    key_span: Span,
    node: &'a Node,
}

/// True while a dotted path is still short of a whole key path (`stage.4` needs its key).
fn path_is_partial(path: &str) -> bool {
    let parts = path.split('.').count();
    parts
        < if path.split('.').next() == Some("stage") {
            3
        } else {
            2
        }
}

/// Entries of `[spread]`, with dotted keys (`stage.4.offset = ...` unquoted) joined back into paths.
fn flatten_spread<'a>(t: &'a Table, prefix: &str, out: &mut Vec<SpreadEntry<'a>>) {
    for e in &t.entries {
        let path = if prefix.is_empty() {
            e.key.clone()
        } else {
            format!("{prefix}.{}", e.key)
        };
        match &e.node.value {
            Value::Table(sub) if path_is_partial(&path) => flatten_spread(sub, &path, out),
            _ => out.push(SpreadEntry {
                path,
                key_span: e.key_span.clone(),
                node: &e.node,
            }),
        }
    }
}

fn table_entry<'a>(t: &'a Table, key: &str) -> Option<&'a Node> {
    t.entries.iter().find(|e| e.key == key).map(|e| &e.node)
}

/// The node a spread path points at in the scenario, and the dimension of its value.
fn spread_target<'a>(
    map: &SourceMap<'_>,
    root: &'a Table,
    e: &SpreadEntry<'_>,
    at: &str,
) -> Result<(&'a Node, Dimension), ScenarioError> {
    let err = |m: String| map.error(&e.key_span, at, m);
    let parts: Vec<&str> = e.path.split('.').collect();
    let (table, kind, key) = match parts.as_slice() {
        [section @ ("simulation" | "source" | "analysis"), key] => {
            let t = match table_entry(root, section).map(|n| &n.value) {
                Some(Value::Table(t)) => t,
                _ => {
                    return Err(err(format!("the scenario has no [{section}] table"))
                        .with_hint(format!("write the key in [{section}] first")));
                }
            };
            (t, *section, *key)
        }
        ["stage", n, key] => {
            let stages = match table_entry(root, "stage").map(|n| &n.value) {
                Some(Value::Array(a)) => a.as_slice(),
                _ => {
                    return Err(err("the scenario has no [[stage]]".into())
                        .with_hint("spread keys of stages that exist"));
                }
            };
            let idx: usize = n.parse().map_err(|_| {
                err(format!("`{n}` is not a stage number")).with_hint(
                    "stages are numbered from 1 in file order, as in \"stage.3.slew_rate\"",
                )
            })?;
            let Some(Value::Table(t)) = idx
                .checked_sub(1)
                .and_then(|i| stages.get(i))
                .map(|n| &n.value)
            else {
                return Err(err(format!(
                    "there is no stage {idx} (stages are numbered 1 to {})",
                    stages.len()
                ))
                .with_hint("count the [[stage]] sections from 1 in file order"));
            };
            let kind = match table_entry(t, "kind").map(|n| &n.value) {
                Some(Value::Str(k)) => KIND_NAMES
                    .iter()
                    .find(|s| **s == k.as_str())
                    .copied()
                    .unwrap_or("stage"),
                _ => "stage",
            };
            (t, kind, *key)
        }
        _ => {
            return Err(err(format!("`{}` is not a key path", e.path)).with_hint(
                "write \"simulation.KEY\", \"source.KEY\", \"analysis.KEY\" or \"stage.N.KEY\" (N from 1), \
                 e.g. \"stage.4.offset\" = \"2 mV\"",
            ));
        }
    };
    let what = if matches!(kind, "simulation" | "source" | "analysis") {
        format!("[{kind}]")
    } else {
        format!("a {kind} stage")
    };
    let spreadable = spreadable_keys(kind);
    let dim = spreadable
        .iter()
        .find(|(name, _)| *name == key)
        .map(|(_, d)| *d);
    let Some(dim) = dim else {
        if crate::scenario::overrides::is_integer_key(key) {
            return Err(
                err(format!("`{key}` takes a whole number and cannot be spread")).with_hint(
                    "spread continuous values; each Monte-Carlo run already draws its own seed",
                ),
            );
        }
        let keys: Vec<&str> = spreadable.iter().map(|(n, _)| *n).collect();
        let mut er = err(format!(
            "`{key}` is not a numeric key of {what} that can be spread"
        ));
        er = match crate::format::reader::did_you_mean(key, &keys) {
            Some(m) => er.with_hint(format!(
                "did you mean `{m}`? keys of {what}: {}",
                keys.join(", ")
            )),
            None => er.with_hint(format!(
                "keys of {what} that can be spread: {}",
                keys.join(", ")
            )),
        };
        return Err(er);
    };
    let Some(node) = table_entry(table, key) else {
        return Err(err(format!(
            "`{}` is not written in the scenario, so it has no nominal value to spread around",
            e.path
        ))
        .with_hint(format!("write `{key} = ...` in {what} (0 is allowed)")));
    };
    Ok((node, dim))
}

/// A spread amount: (value, relative). `%` and `ppm` are fractions of the nominal; anything else is in the
/// key's own unit.
fn spread_amount(
    map: &SourceMap<'_>,
    node: &Node,
    at: &str,
    dim: Dimension,
) -> Result<(f64, bool), ScenarioError> {
    let (v, relative) = match &node.value {
        Value::Str(s) if s.trim_end().ends_with('%') || s.trim_end().ends_with("ppm") => (
            crate::format::reader::node_quantity(map, node, at, Dimension::Ratio)?,
            true,
        ),
        Value::Str(s) if dim == Dimension::Gain && s.contains("dB") => {
            return Err(map
                .error(&node.span, at, "a gain's spread cannot be given in dB")
                .with_hint("give it relative (\"1%\") or in V/V (0.01)"));
        }
        Value::Str(_) | Value::Int(_) | Value::Float(_) => (
            crate::format::reader::node_quantity(map, node, at, dim).map_err(|e| {
                let h = format!(
                    "a spread is given like the key itself ({}), or relative to it (\"1%\")",
                    dim.expectation()
                );
                let joined = match &e.hint {
                    Some(old) => format!("{old}; {h}"),
                    None => h,
                };
                e.with_hint(joined)
            })?,
            false,
        ),
        other => {
            return Err(map
                .error(
                    &node.span,
                    at,
                    format!("expected a spread, found {}", other.type_name()),
                )
                .with_hint(SPREAD_FORMS));
        }
    };
    if !(v.is_finite() && v >= 0.0) {
        return Err(map
            .error(
                &node.span,
                at,
                format!("a spread must be zero or positive, found {v}"),
            )
            .with_hint(SPREAD_FORMS));
    }
    Ok((v, relative))
}

const SPREAD_FORMS: &str = "write \"2 mV\" (Gaussian sigma), \"1%\" (sigma relative to the nominal), \
                            { sigma = \"2 mV\" } or { uniform = \"5%\" } (uniform within +-5 %)";

/// `[spread]`: key paths that exist in the scenario and hold continuous values, with their amounts.
pub(super) fn spread(
    map: &SourceMap<'_>,
    t: &Table,
    root: &Table,
) -> Result<Vec<Spread>, ScenarioError> {
    let mut entries = Vec::new();
    flatten_spread(t, "", &mut entries);
    let mut out: Vec<Spread> = Vec::with_capacity(entries.len());
    for e in &entries {
        let at = format!("spread.\"{}\"", e.path);
        if out.iter().any(|s| s.path == e.path) {
            return Err(map
                .error(&e.key_span, &at, format!("`{}` is spread twice", e.path))
                .with_hint("keep one entry per key"));
        }
        let (target, dim) = spread_target(map, root, e, &at)?;
        let nominal = crate::format::reader::node_quantity(map, target, &e.path, dim)?;
        let (law, amount_node) = match &e.node.value {
            Value::Table(spec) => {
                let mut r = TableReader::new(map, spec, at.clone());
                let sigma = r.take("sigma");
                let uniform = r.take("uniform");
                r.finish(&[], "a spread")?;
                match (sigma, uniform) {
                    (Some(n), None) => (SpreadLaw::Gaussian, n),
                    (None, Some(n)) => (SpreadLaw::Uniform, n),
                    _ => {
                        return Err(map
                            .error(&e.node.span, &at, "give either `sigma` or `uniform`")
                            .with_hint(SPREAD_FORMS));
                    }
                }
            }
            _ => (SpreadLaw::Gaussian, e.node),
        };
        let (amount, relative) = spread_amount(map, amount_node, &at, dim)?;
        if relative && nominal == 0.0 && amount > 0.0 {
            return Err(map
                .error(
                    &amount_node.span,
                    &at,
                    format!(
                        "a relative spread of `{}`, whose nominal is 0, is always 0",
                        e.path
                    ),
                )
                .with_hint(
                    "give the spread in the key's unit, e.g. \"2 mV\" (a bare number for ratios)",
                ));
        }
        out.push(Spread {
            path: e.path.clone(),
            law,
            amount,
            relative,
            nominal,
        });
    }
    Ok(out)
}

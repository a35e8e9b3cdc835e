//! The `[[path]]` list: several named chains fed by the scenario's one source, each with its own
//! `[[path.stage]]` list read and checked as a `[[stage]]` list is.

use super::stage_list::stages;
use super::*;
use crate::format::reader::{At, Node, ScenarioError, SourceMap, TableReader, Value};

/// Most paths in one scenario (every pair is compared in the report).
pub const MAX_PATHS: usize = 8;

pub(super) fn paths(
    map: &SourceMap<'_>,
    nodes: &At<&[Node]>,
    sim: &Simulation,
) -> Result<Vec<NamedPath>, ScenarioError> {
    if nodes.value.is_empty() || nodes.value.len() > MAX_PATHS {
        return Err(map
            .error(
                &nodes.span,
                "path",
                format!(
                    "a scenario holds 1 to {MAX_PATHS} paths, found {}",
                    nodes.value.len()
                ),
            )
            .with_hint(
                "write each path as a [[path]] section with a name and its [[path.stage]] list",
            ));
    }
    let mut out: Vec<NamedPath> = Vec::with_capacity(nodes.value.len());
    for (i, node) in nodes.value.iter().enumerate() {
        let path = format!("path.{}", i + 1);
        let Value::Table(t) = &node.value else {
            return Err(map
                .error(
                    &node.span,
                    &path,
                    format!("expected a table, found {}", node.value.type_name()),
                )
                .with_hint("write each path as a [[path]] section"));
        };
        let mut r = TableReader::new(map, t, path.clone());
        let name = r.string("name")?;
        let description = r.string("description")?;
        let stage_nodes = r.array("stage")?;
        let missing = r.missing("name", "\"analog\"");
        r.finish(&[], "a [[path]]")?;
        let name = name.ok_or_else(|| {
            missing
                .with_hint("give every path a name, e.g. name = \"analog\" (it labels the report)")
        })?;
        let key = format!("{path}.name");
        let bad = name
            .value
            .chars()
            .find(|c| !(c.is_ascii_alphanumeric() || *c == '-' || *c == '_'));
        if name.value.is_empty() || bad.is_some() {
            return Err(map
                .error(
                    &name.span,
                    &key,
                    "a path name is letters, digits, - and _ only, and not empty",
                )
                .with_hint("for example name = \"digital-radio\""));
        }
        if let Some(j) = out.iter().position(|p| p.name == name.value) {
            return Err(map
                .error(
                    &name.span,
                    &key,
                    format!("path {} is already named \"{}\"", j + 1, name.value),
                )
                .with_hint("give every path its own name"));
        }
        let stages = match stage_nodes {
            None => Vec::new(),
            Some(nodes) => stages(map, &nodes, sim, &format!("{path}.stage"))?,
        };
        out.push(NamedPath {
            name: name.value.to_string(),
            description: description.map(|d| d.value.to_string()).unwrap_or_default(),
            stages,
        });
    }
    Ok(out)
}

//! The `[[stage]]` list: each table read by its kind, the chain's role grammar checked, and cross-stage defaults
//! resolved.

use super::*;
use crate::format::reader::{
    At, Node, ScenarioError, SourceMap, Span, Table, TableReader, Value, unknown_choice,
};
use crate::stages::kind::{ReadContext, Role, Upstream};
use crate::stages::registry::KIND_NAMES;

/// A stage as read, before cross-stage defaults are filled in.
struct ReadStage {
    label: String,
    kind_span: Span,
    kind: StageKind,
}

/// Read a stage list. `prefix` starts every key path in messages: `"stage"` for the scenario's `[[stage]]`
/// list, `"path.2.stage"` for the second `[[path]]`'s.
pub(super) fn stages(
    map: &SourceMap<'_>,
    nodes: &At<&[Node]>,
    sim: &Simulation,
    prefix: &str,
) -> Result<Vec<Stage>, ScenarioError> {
    let mut read = Vec::with_capacity(nodes.value.len());
    for (i, node) in nodes.value.iter().enumerate() {
        let path = format!("{prefix}.{}", i + 1);
        let Value::Table(t) = &node.value else {
            return Err(map
                .error(
                    &node.span,
                    &path,
                    format!("expected a table, found {}", node.value.type_name()),
                )
                .with_hint("write each stage as a [[stage]] section"));
        };
        read.push(stage(map, t, path, i + 1, sim)?);
    }
    check_order(map, &read, prefix)?;
    Ok(resolve(read))
}

fn stage(
    map: &SourceMap<'_>,
    t: &Table,
    path: String,
    index: usize,
    sim: &Simulation,
) -> Result<ReadStage, ScenarioError> {
    let mut r = TableReader::new(map, t, path);
    let label = r.string("name")?;
    let kind_at = r.string("kind")?.ok_or_else(|| {
        r.missing("kind", "\"filter\"")
            .with_hint(format!("add `kind = ...`, one of {}", quoted(KIND_NAMES)))
    })?;
    let kind_name = kind_at.value;
    let ctx = ReadContext {
        analog_rate_hz: sim.analog_rate_hz,
    };
    let Some(kind) = StageKind::read(kind_name, &mut r, &ctx) else {
        return Err(unknown_choice(
            map,
            &kind_at.span,
            &r.path_of("kind"),
            "stage kind",
            kind_name,
            KIND_NAMES,
        ));
    };
    let kind = kind?;
    r.finish(&[], &format!("a {kind_name} stage"))?;
    let label = match label {
        Some(l) if !l.value.trim().is_empty() => l.value.to_string(),
        _ => format!("stage.{index} {kind_name}"),
    };
    Ok(ReadStage {
        label,
        kind_span: kind_at.span,
        kind,
    })
}

fn quoted(names: &[&str]) -> String {
    names
        .iter()
        .map(|n| format!("\"{n}\""))
        .collect::<Vec<_>>()
        .join(", ")
}

/// The most converter groups (hops) a chain may put in series.
pub const MAX_HOPS: usize = 8;

/// Where a stage sits in the role grammar `analog* ([hold? quantizer code* reconstructor] analog*)*`, with up
/// to [`MAX_HOPS`] converter groups in series.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Place {
    /// Before the first converter group (or an analog-only chain).
    Before,
    /// Just after a hold; only a quantizer may follow.
    AfterHold,
    /// After the quantizer or a code stage: codes are digital; only code stages or a reconstructor may follow.
    Digital,
    /// After a reconstructor: analog again; analog stages or another hop (`[hold] ADC`) may follow.
    After,
}

/// The chain's grammar in words, for messages.
const GRAMMAR: &str = "a chain reads: analog stages, then converter groups [hold] ADC [links] DAC in series (up to \
                       8 hops), each followed by analog stages";

fn check_order(
    map: &SourceMap<'_>,
    stages: &[ReadStage],
    prefix: &str,
) -> Result<(), ScenarioError> {
    let mut place = Place::Before;
    let mut quantizer_index = None;
    let mut hops = 0usize;
    for (i, s) in stages.iter().enumerate() {
        let path = format!("{prefix}.{}.kind", i + 1);
        let err = |msg: String, hint: &str| {
            map.error(&s.kind_span, &path, msg)
                .with_hint(hint.to_string())
        };
        let kind = s.kind.kind_name();
        place = match (s.kind.role(), place) {
            (Role::Analog, Place::Before | Place::After) => place,
            (Role::Analog, Place::AfterHold) => {
                return Err(err(
                    format!("a {kind} cannot sit between a hold and the ADC it feeds"),
                    "the hold must come directly before the ADC; move the analog stage before the hold",
                ));
            }
            (Role::Analog, Place::Digital) => {
                return Err(err(
                    format!(
                        "a {kind} cannot sit between an ADC and its DAC: the signal there is digital codes"
                    ),
                    "move it before the ADC (e.g. an anti-alias filter) or after the DAC (e.g. a reconstruction filter)",
                ));
            }
            (Role::Hold, Place::Before | Place::After) => Place::AfterHold,
            (Role::Hold, _) => {
                return Err(err(
                    format!("a {kind} must come directly before an ADC"),
                    GRAMMAR,
                ));
            }
            (Role::Quantizer, Place::Before | Place::AfterHold | Place::After) => {
                if hops == MAX_HOPS {
                    return Err(err(
                        format!(
                            "a chain may put at most {MAX_HOPS} hops (ADC ... DAC groups) in series; this {kind} \
                             starts hop {}",
                            hops + 1
                        ),
                        "merge hops, or split the chain into several scenarios",
                    ));
                }
                hops += 1;
                quantizer_index = Some(i);
                Place::Digital
            }
            (Role::Quantizer, _) => {
                return Err(err(
                    format!(
                        "a {kind} cannot sit between an ADC and its DAC: the codes of one hop need their DAC \
                         before the next ADC"
                    ),
                    "add a DAC (kind = \"dac\") before this ADC to end the hop before it",
                ));
            }
            (Role::Code, Place::Digital) => Place::Digital,
            (Role::Code, _) => {
                return Err(err(
                    format!("a {kind} carries codes: it must sit between an ADC and its DAC"),
                    "move it after an ADC and before that ADC's DAC",
                ));
            }
            (Role::Reconstructor, Place::Digital) => Place::After,
            (Role::Reconstructor, Place::After) => {
                return Err(err(
                    format!("this {kind} follows a DAC without an ADC of its own"),
                    "each hop is [hold] ADC [links] DAC: add an ADC before this DAC, or remove it",
                ));
            }
            (Role::Reconstructor, _) => {
                return Err(err(
                    format!("a {kind} needs codes: put an ADC (e.g. a sar_adc) before it"),
                    GRAMMAR,
                ));
            }
        };
    }
    match place {
        Place::AfterHold => {
            let s = stages.last().map_or(0..0, |s| s.kind_span.clone());
            let kind = stages.last().map_or("hold", |s| s.kind.kind_name());
            Err(map
                .error(
                    &s,
                    &format!("{prefix}.{}.kind", stages.len()),
                    format!("a {kind} must come directly before an ADC"),
                )
                .with_hint("add an ADC stage (e.g. kind = \"sar_adc\") after it, or remove it"))
        }
        Place::Digital => {
            let i = quantizer_index.unwrap_or(0);
            let s = stages.get(i).map_or(0..0, |s| s.kind_span.clone());
            let kind = stages.get(i).map_or("ADC", |s| s.kind.kind_name());
            Err(map
                .error(
                    &s,
                    &format!("{prefix}.{}.kind", i + 1),
                    format!("a {kind} needs a DAC after it (links may sit between)"),
                )
                .with_hint("add a [[stage]] with kind = \"dac\" after the ADC (and any links)"))
        }
        Place::Before | Place::After => Ok(()),
    }
}

/// Fill in cross-stage defaults, each kind from what the stages before it resolved to (a link's and a DAC's
/// width, a DAC's range). Assumes the order has been checked.
fn resolve(read: Vec<ReadStage>) -> Vec<Stage> {
    let mut up = Upstream::default();
    read.into_iter()
        .map(|mut s| {
            s.kind.resolve(&mut up);
            Stage {
                label: s.label,
                kind: s.kind,
            }
        })
        .collect()
}

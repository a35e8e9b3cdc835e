//! The conformance kit: one call, [`check`], tells whether a stage kind keeps the promises every kind makes.
//!
//! - its example table ([`KindSpec::EXAMPLE`]) reads, and a test chain built around it in its role's place checks
//!   and runs;
//! - an analog runtime gives the same output by `tick` and by `process`, and `process` does not depend on how the
//!   input is cut into calls (to rounding);
//! - a reconstructor renders the same samples however the grid is cut into calls;
//! - on the test chain, the measured latency agrees with the budget the stages state (the report's own flag,
//!   more than 5 % of the budget and more than a tenth of a sample period apart, stays down);
//! - every ablation the kind offers to the limit finder re-reads and runs;
//! - every parameter is listed in the README's table of stage kinds, and nothing else is.
//!
//! [`KindSpec::EXAMPLE`]: crate::stages::kind::KindSpec::EXAMPLE

use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;

use crate::engine::pipeline::{build_context, run_lean};
use crate::measure::chain::measure_run;
use crate::scenario::overrides::{Edit, ScenarioText};
use crate::signal::stream::{CodeEvent, Timebase};
use crate::stages::kind::{Role, Runtime, Upstream};
use crate::stages::registry::{KIND_EXAMPLES, KIND_PARAMS};

/// The README, whose table of stage kinds documents every parameter.
const README: &str = include_str!("../../README.md");

fn example_of(name: &str) -> (Role, &'static str) {
    KIND_EXAMPLES
        .iter()
        .find(|(n, _, _)| *n == name)
        .map(|(_, r, e)| (*r, *e))
        .unwrap_or_else(|| panic!("`{name}` is not a registered kind"))
}

/// The first registered kind of a role, as a stage table.
fn first_of(role: Role) -> String {
    let (name, _, ex) = KIND_EXAMPLES
        .iter()
        .find(|(_, r, _)| *r == role)
        .unwrap_or_else(|| panic!("no kind plays {role:?}"));
    stage(name, ex)
}

fn stage(name: &str, body: &str) -> String {
    format!("[[stage]]\nkind = \"{name}\"\n{body}\n")
}

/// A scenario holding kind `name` in its role's place, and the stage's number (from 1) in it.
pub fn test_chain(name: &str) -> (String, usize) {
    let (role, ex) = example_of(name);
    let me = stage(name, ex);
    let (stages, index) = match role {
        Role::Analog => (me, 1),
        Role::Hold => (
            me + &first_of(Role::Quantizer) + &first_of(Role::Reconstructor),
            1,
        ),
        Role::Quantizer => (me + &first_of(Role::Reconstructor), 1),
        Role::Code => (
            first_of(Role::Quantizer) + &me + &first_of(Role::Reconstructor),
            2,
        ),
        Role::Reconstructor => (first_of(Role::Quantizer) + &me, 2),
    };
    let text = format!(
        "name = \"conformance-{name}\"\n\
         [simulation]\nanalog_rate = \"2 MHz\"\nduration = \"40 ms\"\nsettle = \"8 ms\"\nseed = 3\n\
         [source]\nwaveform = \"sine\"\nfrequency = \"1 kHz\"\namplitude = \"1 V\"\n\
         {stages}"
    );
    (text, index)
}

/// The keys the README's table of stage kinds lists for `name`: the backticked words of the row that starts
/// with the kind's name in backticks.
pub fn readme_keys(name: &str) -> Option<Vec<String>> {
    let start = README.find("### Stage kinds")?;
    let row = README[start..]
        .lines()
        .find(|l| l.starts_with(&format!("| `{name}` |")))?;
    let cells: Vec<&str> = row.split('|').collect();
    let keys = cells.get(3)?;
    Some(
        keys.split('`')
            .skip(1)
            .step_by(2)
            .map(str::to_string)
            .collect(),
    )
}

fn close(a: f64, b: f64, scale: f64) -> bool {
    (a - b).abs() <= 1e-9 * scale + 1e-12
}

/// Check every promise of kind `name`; panics with what failed.
pub fn check(name: &str) {
    let (text, index) = test_chain(name);
    let st = ScenarioText::new(text.clone(), format!("<{name} test chain>"), ".".into())
        .unwrap_or_else(|e| panic!("{name}: the test chain does not read: {e}\n{text}"));
    let sc = st.scenario().unwrap();
    let kind = &sc.stages[index - 1].kind;
    assert_eq!(kind.kind_name(), name);

    // Runtime properties, by role.
    let tb = Timebase::new(sc.simulation.analog_rate_hz);
    let mut up = Upstream::default();
    for s in &sc.stages[..index - 1] {
        s.kind.pass_on(&mut up);
    }
    let build = || {
        let mut ctx = build_context(3, index as u64, "x", Some(tb), up);
        kind.build(&mut ctx).unwrap()
    };
    match build() {
        Runtime::Analog(mut a) => {
            let mut rng = ChaCha8Rng::seed_from_u64(9);
            let x: Vec<f64> = (0..5000)
                .map(|i| (i as f64 * 0.003).sin() + 0.2 * (rng.random::<f64>() - 0.5))
                .collect();
            let ticked: Vec<f64> = x.iter().map(|v| a.tick(*v)).collect();
            let scale = ticked.iter().fold(1.0f64, |m, v| m.max(v.abs()));
            let Runtime::Analog(mut b) = build() else {
                unreachable!()
            };
            let mut whole = vec![0.0; x.len()];
            b.process(&x, &mut whole);
            let Runtime::Analog(mut c) = build() else {
                unreachable!()
            };
            let mut cut = vec![0.0; x.len()];
            let mut at = 0;
            for len in [1usize, 3, 64, 1000, 17, 8, 2048].iter().cycle() {
                if at == x.len() {
                    break;
                }
                let end = (at + len).min(x.len());
                c.process(&x[at..end], &mut cut[at..end]);
                at = end;
            }
            for i in 0..x.len() {
                assert!(
                    close(ticked[i], whole[i], scale),
                    "{name}: tick and process differ at sample {i}: {} against {}",
                    ticked[i],
                    whole[i]
                );
                assert!(
                    close(whole[i], cut[i], scale),
                    "{name}: process depends on how the input is cut, at sample {i}: {} against {}",
                    whole[i],
                    cut[i]
                );
            }
        }
        Runtime::Reconstructor(mut r) => {
            let events: Vec<CodeEvent> = (0..200)
                .map(|k| CodeEvent {
                    t_sample_s: k as f64 * 2.1e-5,
                    t_avail_s: k as f64 * 2.1e-5 + 3.3e-6,
                    code: ((k * 37) % 1000) as u32,
                })
                .collect();
            let n = 9000;
            let mut whole = vec![0.0; n];
            r.render(tb, 0, &events, &mut whole);
            let Runtime::Reconstructor(mut r2) = build() else {
                unreachable!()
            };
            let mut cut = vec![0.0; n];
            let (mut at, mut used) = (0usize, 0usize);
            for len in [7usize, 4096, 1, 333].iter().cycle() {
                if at == n {
                    break;
                }
                let end = (at + len).min(n);
                used += r2.render(tb, at as u64, &events[used..], &mut cut[at..end]);
                at = end;
            }
            assert_eq!(
                whole, cut,
                "{name}: rendering depends on how the grid is cut"
            );
        }
        Runtime::Hold | Runtime::Quantizer(_) | Runtime::Code(_) => {}
    }

    // The budget against the measured delay on the test chain.
    let run = run_lean(&sc).unwrap_or_else(|e| panic!("{name}: the test chain does not run: {e}"));
    let m = measure_run(&run.records()).unwrap();
    assert!(
        !m.latency.flagged,
        "{name}: measured latency {} s against a budget of {} s ({:?})",
        m.latency.measured_s, m.latency.budget_s, m.latency.budget
    );

    // Every ablation re-reads and runs.
    for ab in kind.ablations() {
        let edits: Vec<Edit> = ab.edits.iter().map(|e| Edit::of_stage(index, e)).collect();
        let changed = st.with_edits(&edits).unwrap_or_else(|e| {
            panic!("{name}: ablation `{}` does not re-read: {e}", ab.mechanism)
        });
        run_lean(&changed)
            .unwrap_or_else(|e| panic!("{name}: ablation `{}` does not run: {e}", ab.mechanism));
    }

    // Every parameter in the README's table, and no other.
    let params = KIND_PARAMS
        .iter()
        .find(|(n, _)| *n == name)
        .map(|(_, p)| *p)
        .unwrap();
    let mut documented = readme_keys(name)
        .unwrap_or_else(|| panic!("{name}: no row in the README's table of stage kinds"));
    let mut keys: Vec<String> = params.iter().map(|p| p.key.to_string()).collect();
    documented.sort();
    keys.sort();
    assert_eq!(
        documented, keys,
        "{name}: the README lists other keys than the kind reads"
    );
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::stages::registry::KIND_NAMES;

    #[test]
    fn every_registered_kind_conforms() {
        for name in KIND_NAMES {
            check(name);
        }
    }

    #[test]
    fn the_readme_documents_no_kind_that_is_not_registered() {
        let start = README
            .find("### Stage kinds")
            .expect("the README has a table of stage kinds");
        let section = &README[start..];
        let end = section[3..].find("\n#").map_or(section.len(), |i| i + 3);
        for row in section[..end].lines().filter(|l| l.starts_with("| `")) {
            let name = row.split('`').nth(1).unwrap();
            assert!(
                KIND_NAMES.contains(&name),
                "the README documents a kind `{name}` that is not registered"
            );
        }
    }
}

//! Locating one criterion's limit (the first coarse crossing, confirmed with longer runs, refined by bisection)
//! and the diagnosis there (one non-ideality removed at a time).

use super::{Ablation, Candidate, Criterion, CriterionResult, LimitPoint, Runner, metric};
use crate::format::units::format_si;

impl CriterionResult {
    /// A criterion with no limit found (or none to find).
    pub(super) fn unmet(
        criterion: Criterion,
        threshold: Option<f64>,
        note: String,
    ) -> CriterionResult {
        CriterionResult {
            criterion,
            frequency_hz: None,
            bracket_hz: None,
            threshold,
            value: None,
            mechanism: None,
            mechanism_stage: None,
            ablation: Vec::new(),
            ties: Vec::new(),
            note,
        }
    }
}

/// What locating and diagnosing one criterion reads.
pub(super) struct Search<'a> {
    pub(super) runner: &'a Runner<'a>,
    pub(super) coarse: &'a [LimitPoint],
    pub(super) first: &'a LimitPoint,
    pub(super) cands: &'a [Candidate],
    pub(super) fine_cycles: f64,
    pub(super) tolerance: f64,
    pub(super) to_hz: f64,
}

impl Search<'_> {
    fn fails(c: Criterion, thr: f64, p: &LimitPoint) -> bool {
        metric(c, p).is_some_and(|v| v < thr)
    }

    /// The lowest frequency where criterion `c` falls below `thr`: the first coarse crossing, confirmed with
    /// longer runs and refined by bisection; then the diagnosis there.
    pub(super) fn criterion(&self, c: Criterion, thr: f64) -> CriterionResult {
        let coarse = self.coarse;
        let runner = self.runner;
        let fine_cycles = self.fine_cycles;
        let Some(idx) = coarse
            .iter()
            .position(|p| p.error.is_none() && Self::fails(c, thr, p))
        else {
            return CriterionResult::unmet(
                c,
                Some(thr),
                format!("not reached below {}", format_si(self.to_hz, "Hz")),
            );
        };
        let mut note = String::new();
        let (mut lo, mut hi) = if idx == 0 {
            note = format!(
                "already met at the low end ({})",
                format_si(coarse[0].frequency_hz, "Hz")
            );
            (None, coarse[0].clone())
        } else {
            let lo = coarse[..idx]
                .iter()
                .rev()
                .find(|p| p.error.is_none())
                .cloned();
            (lo, runner.point(coarse[idx].requested_hz, fine_cycles, &[]))
        };
        // The fine run at the coarse failing frequency may pass; then walk up the coarse grid.
        if lo.is_some() && !Self::fails(c, thr, &hi) {
            let mut j = idx;
            let mut found = false;
            while j + 1 < coarse.len() {
                j += 1;
                let p = runner.point(coarse[j].requested_hz, fine_cycles, &[]);
                if Self::fails(c, thr, &p) {
                    lo = Some(coarse[j - 1].clone());
                    hi = p;
                    found = true;
                    break;
                }
            }
            if !found {
                return CriterionResult::unmet(
                    c,
                    Some(thr),
                    format!(
                        "not reached below {} (a coarse crossing did not repeat with longer runs)",
                        format_si(self.to_hz, "Hz")
                    ),
                );
            }
        }
        if let Some(mut l) = lo {
            while hi.requested_hz / l.requested_hz > 1.0 + self.tolerance {
                let mid = (hi.requested_hz * l.requested_hz).sqrt();
                let p = runner.point(mid, fine_cycles, &[]);
                if p.error.is_some() {
                    note = format!(
                        "bisection stopped: the run at {} failed",
                        format_si(mid, "Hz")
                    );
                    break;
                }
                if Self::fails(c, thr, &p) {
                    hi = p;
                } else {
                    l = p;
                }
            }
            lo = Some(l);
        }
        let bracket = lo.as_ref().map(|l| (l.frequency_hz, hi.frequency_hz));
        let (ablation, best, ties) = self.diagnose(c, &hi);
        let (mechanism, mechanism_stage) = match best {
            Some(i) => (
                Some(self.cands[i].mechanism.clone()),
                Some(self.cands[i].stage.clone()),
            ),
            None => {
                if !note.is_empty() {
                    note.push_str("; ");
                }
                note.push_str("no single ablation recovers the metric");
                (None, None)
            }
        };
        CriterionResult {
            criterion: c,
            frequency_hz: Some(hi.frequency_hz),
            bracket_hz: bracket,
            threshold: Some(thr),
            value: metric(c, &hi),
            mechanism,
            mechanism_stage,
            ablation,
            ties,
            note,
        }
    }

    /// Re-run the chain at the limit with one non-ideality removed at a time; the candidate that recovers the
    /// most (beyond what is significant for the criterion), if any.
    /// Also the other mechanisms tied with it (within the criterion's significance).
    fn diagnose(
        &self,
        c: Criterion,
        hi: &LimitPoint,
    ) -> (Vec<Ablation>, Option<usize>, Vec<String>) {
        let base_value = metric(c, hi);
        let reference = metric(c, self.first);
        let ablation: Vec<Ablation> = self
            .cands
            .iter()
            .map(|cand| {
                let p = self
                    .runner
                    .point(hi.requested_hz, self.fine_cycles, &cand.edits);
                let recovery = match (metric(c, &p), base_value, reference) {
                    (Some(a), Some(b), Some(r)) => Some(a.min(r.max(b)) - b),
                    _ => None,
                };
                Ablation {
                    change: cand.change.clone(),
                    mechanism: cand.mechanism.clone(),
                    enob_bits: p.enob_bits,
                    gain_db: p.gain_db,
                    fidelity_db: p.fidelity_db,
                    recovery,
                    error: p.error,
                }
            })
            .collect();
        let significant = match c {
            Criterion::Accuracy => 0.1,
            Criterion::Level => 0.1,
            _ => 0.5,
        };
        // The best recovery; among changes within `significant` of it, a single-parameter change is preferred
        // to a converter's compound sample-rate change (which also shortens its conversion).
        let top = ablation
            .iter()
            .filter_map(|a| a.recovery)
            .fold(f64::NEG_INFINITY, f64::max);
        let best = ablation
            .iter()
            .enumerate()
            .filter_map(|(i, a)| a.recovery.map(|r| (i, r)))
            .filter(|(_, r)| *r > significant && *r >= top - significant)
            .max_by(|(i, a), (j, b)| {
                let compound = |k: usize| self.cands[k].mechanism.ends_with(".sample_rate");
                compound(*j).cmp(&compound(*i)).then(a.total_cmp(b))
            })
            .map(|(i, _)| i);
        let ties = match best.and_then(|b| ablation[b].recovery.map(|r| (b, r))) {
            Some((b, rb)) => ablation
                .iter()
                .enumerate()
                .filter(|(i, a)| {
                    *i != b
                        && a.mechanism != ablation[b].mechanism
                        && a.recovery.is_some_and(|r| (r - rb).abs() <= significant)
                })
                .map(|(_, a)| a.mechanism.clone())
                .collect(),
            None => Vec::new(),
        };
        (ablation, best, ties)
    }
}

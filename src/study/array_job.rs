//! `--shard auto`: the shard K/N of a study taken from the task index (and count) that a batch scheduler sets
//! in each task of an array job, so one job file runs every shard.
//!
//! The variables, checked in this order (names from memory of each scheduler's documentation; the first whose
//! index variable is set is used):
//!
//! | scheduler | index | count |
//! |---|---|---|
//! | Slurm job array | `SLURM_ARRAY_TASK_ID` | `SLURM_ARRAY_TASK_COUNT`, else from `SLURM_ARRAY_TASK_MIN`/`_MAX` (and `_STEP`) |
//! | Grid Engine array job | `SGE_TASK_ID` | from `SGE_TASK_FIRST`/`SGE_TASK_LAST` (and `SGE_TASK_STEPSIZE`) |
//! | LSF job array | `LSB_JOBINDEX` (arrays `[1-N]`) | `LSB_JOBINDEX_END` |
//! | PBS Pro array job | `PBS_ARRAY_INDEX` (arrays `-J 1-N`) | none: give `--shard auto/N` |
//! | AWS Batch array job | `AWS_BATCH_JOB_ARRAY_INDEX` (from 0) | none: give `--shard auto/N` |
//! | Kubernetes indexed job | `JOB_COMPLETION_INDEX` (from 0) | none: give `--shard auto/N` (the job's `completions`) |
//!
//! `--shard auto/N` also checks a count the scheduler gives against N.

use crate::error::{Error, Result};
use crate::study::shard::Shard;

/// One scheduler's variables: the index variable, how the index counts, and where the count comes from.
struct Scheduler {
    name: &'static str,
    index: &'static str,
    /// The task index of the first task when the scheduler does not say (0 or 1).
    base: u64,
    /// Variables giving the first and last index (and the step), when the scheduler sets them.
    first: Option<&'static str>,
    last: Option<&'static str>,
    step: Option<&'static str>,
    /// A variable giving the number of tasks directly.
    count: Option<&'static str>,
}

const SCHEDULERS: &[Scheduler] = &[
    Scheduler {
        name: "Slurm",
        index: "SLURM_ARRAY_TASK_ID",
        base: 0,
        first: Some("SLURM_ARRAY_TASK_MIN"),
        last: Some("SLURM_ARRAY_TASK_MAX"),
        step: Some("SLURM_ARRAY_TASK_STEP"),
        count: Some("SLURM_ARRAY_TASK_COUNT"),
    },
    Scheduler {
        name: "Grid Engine",
        index: "SGE_TASK_ID",
        base: 1,
        first: Some("SGE_TASK_FIRST"),
        last: Some("SGE_TASK_LAST"),
        step: Some("SGE_TASK_STEPSIZE"),
        count: None,
    },
    Scheduler {
        name: "LSF",
        index: "LSB_JOBINDEX",
        base: 1,
        first: None,
        last: Some("LSB_JOBINDEX_END"),
        step: None,
        count: None,
    },
    Scheduler {
        name: "PBS",
        index: "PBS_ARRAY_INDEX",
        base: 1,
        first: None,
        last: None,
        step: None,
        count: None,
    },
    Scheduler {
        name: "AWS Batch",
        index: "AWS_BATCH_JOB_ARRAY_INDEX",
        base: 0,
        first: None,
        last: None,
        step: None,
        count: None,
    },
    Scheduler {
        name: "Kubernetes",
        index: "JOB_COMPLETION_INDEX",
        base: 0,
        first: None,
        last: None,
        step: None,
        count: None,
    },
];

/// The names of every index variable, for messages and the README.
pub fn index_variables() -> Vec<&'static str> {
    SCHEDULERS.iter().map(|s| s.index).collect()
}

/// True for `auto` and `auto/N`.
pub fn is_auto(text: &str) -> bool {
    let t = text.trim();
    t == "auto" || t.starts_with("auto/")
}

/// `--shard auto` or `auto/N` from the process environment.
pub fn from_env(text: &str) -> Result<Shard> {
    resolve(text, |name| std::env::var(name).ok())
}

/// `--shard auto` or `auto/N` with the variables read through `var` (the environment, or a table in tests).
pub fn resolve(text: &str, var: impl Fn(&str) -> Option<String>) -> Result<Shard> {
    let bad = |why: String| Error::BadInput(format!("--shard {}: {why}", text.trim()));
    let given_n = match text.trim().strip_prefix("auto/") {
        Some(n) => match n.trim().parse::<u64>() {
            Ok(n) if n > 0 => Some(n),
            _ => {
                return Err(bad(format!(
                    "`{n}` is not a positive whole number; write auto/N with N the number of tasks"
                )));
            }
        },
        None => None,
    };
    let num = |name: &str| -> Result<Option<u64>> {
        match var(name) {
            None => Ok(None),
            Some(v) if v.trim().is_empty() || v.trim() == "undefined" => Ok(None),
            Some(v) => v.trim().parse::<u64>().map(Some).map_err(|_| {
                bad(format!(
                    "{name}={v} is not a whole number (the scheduler's task index or count)"
                ))
            }),
        }
    };
    for s in SCHEDULERS {
        let Some(index) = num(s.index)? else {
            continue;
        };
        let first = match s.first {
            Some(f) => num(f)?,
            None => None,
        };
        let first = first.unwrap_or(s.base);
        let step = match s.step {
            Some(st) => num(st)?.filter(|&x| x > 0).unwrap_or(1),
            None => 1,
        };
        if index < first || (index - first) % step != 0 {
            return Err(bad(format!(
                "{} task index {}={index} is not one of the array's indices (from {first} in steps of \
                 {step}); for {} the array must start at {first}",
                s.name, s.index, s.name
            )));
        }
        let k = (index - first) / step + 1;
        let count = match s.count {
            Some(c) => num(c)?,
            None => None,
        };
        let count = match (count, s.last) {
            (Some(c), _) => Some(c),
            (None, Some(l)) => num(l)?.map(|last| (last.saturating_sub(first)) / step + 1),
            (None, None) => None,
        };
        let n = match (count, given_n) {
            (Some(c), Some(g)) if c != g => {
                return Err(bad(format!(
                    "the {} array has {c} tasks but auto/{g} says {g}; make them agree",
                    s.name
                )));
            }
            (Some(c), _) => c,
            (None, Some(g)) => g,
            (None, None) => {
                return Err(bad(format!(
                    "{} sets the task index ({}={index}) but not the number of tasks; write --shard auto/N \
                     with N the array's size",
                    s.name, s.index
                )));
            }
        };
        if k > n {
            return Err(bad(format!(
                "{} task {k} (from {}={index}) is beyond the {n} tasks of the array",
                s.name, s.index
            )));
        }
        return Ok(Shard { k, n });
    }
    Err(bad(format!(
        "no array-job task index is set (looked for {}); run it as a task of an array job, or give --shard K/N",
        index_variables().join(", ")
    )))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn with(vars: &[(&str, &str)], text: &str) -> Result<Shard> {
        resolve(text, |name| {
            vars.iter()
                .find(|(k, _)| *k == name)
                .map(|(_, v)| v.to_string())
        })
    }

    #[test]
    fn slurm_from_min_max_count_and_step() {
        // Slurm `--array=0-9`: ids 0..9, count 10 (variable names from memory of the sbatch manual).
        let v = [
            ("SLURM_ARRAY_TASK_ID", "3"),
            ("SLURM_ARRAY_TASK_MIN", "0"),
            ("SLURM_ARRAY_TASK_MAX", "9"),
            ("SLURM_ARRAY_TASK_COUNT", "10"),
        ];
        assert_eq!(with(&v, "auto").unwrap(), Shard { k: 4, n: 10 });
        // `--array=1-4` without COUNT: N from MIN and MAX.
        let v = [
            ("SLURM_ARRAY_TASK_ID", "4"),
            ("SLURM_ARRAY_TASK_MIN", "1"),
            ("SLURM_ARRAY_TASK_MAX", "4"),
        ];
        assert_eq!(with(&v, "auto").unwrap(), Shard { k: 4, n: 4 });
        // `--array=0-8:2`: ids 0, 2, 4, 6, 8.
        let v = [
            ("SLURM_ARRAY_TASK_ID", "6"),
            ("SLURM_ARRAY_TASK_MIN", "0"),
            ("SLURM_ARRAY_TASK_MAX", "8"),
            ("SLURM_ARRAY_TASK_STEP", "2"),
        ];
        assert_eq!(with(&v, "auto").unwrap(), Shard { k: 4, n: 5 });
        assert!(
            with(&v, "auto/4")
                .unwrap_err()
                .to_string()
                .contains("agree")
        );
    }

    #[test]
    fn grid_engine_lsf_pbs() {
        let v = [
            ("SGE_TASK_ID", "2"),
            ("SGE_TASK_FIRST", "1"),
            ("SGE_TASK_LAST", "3"),
        ];
        assert_eq!(with(&v, "auto").unwrap(), Shard { k: 2, n: 3 });
        // A Grid Engine job that is not an array job says "undefined".
        let v = [("SGE_TASK_ID", "undefined")];
        assert!(
            with(&v, "auto")
                .unwrap_err()
                .to_string()
                .contains("no array-job")
        );
        let v = [("LSB_JOBINDEX", "5"), ("LSB_JOBINDEX_END", "8")];
        assert_eq!(with(&v, "auto").unwrap(), Shard { k: 5, n: 8 });
        let v = [("PBS_ARRAY_INDEX", "2")];
        assert!(with(&v, "auto").unwrap_err().to_string().contains("auto/N"));
        assert_eq!(with(&v, "auto/6").unwrap(), Shard { k: 2, n: 6 });
    }

    #[test]
    fn zero_based_indices_need_a_count() {
        let v = [("AWS_BATCH_JOB_ARRAY_INDEX", "0")];
        assert_eq!(with(&v, "auto/3").unwrap(), Shard { k: 1, n: 3 });
        let v = [("JOB_COMPLETION_INDEX", "2")];
        assert_eq!(with(&v, "auto/3").unwrap(), Shard { k: 3, n: 3 });
        let e = with(&v, "auto/2").unwrap_err();
        assert!(e.is_bad_input() && e.to_string().contains("beyond"), "{e}");
    }

    #[test]
    fn clear_errors() {
        let e = with(&[], "auto").unwrap_err();
        assert!(e.is_bad_input());
        assert!(
            e.to_string().contains("SLURM_ARRAY_TASK_ID") && e.to_string().contains("--shard K/N")
        );
        assert!(
            with(&[], "auto/x")
                .unwrap_err()
                .to_string()
                .contains("auto/N")
        );
        assert!(with(&[], "auto/0").is_err());
        let v = [("SLURM_ARRAY_TASK_ID", "seven")];
        assert!(
            with(&v, "auto")
                .unwrap_err()
                .to_string()
                .contains("whole number")
        );
    }
}

//! Rows of a study on disk, shards of a study, and merging shards back into one study.
//!
//! Any study made of independent runs numbered `0..runs` (Monte-Carlo runs, sweep points) keeps its results as
//! a [`RowSet`] in `rows.json`: a header that identifies the study (`kind`, `study`), the shard that made the
//! rows, the column names and one row per finished run, keyed by its index (the first cell). A shard `K/N`
//! (1-based `K`) owns the runs with `index % N == K - 1`; `convchain merge` checks that the folders belong to
//! the same study (equal `kind`, `study` and `columns`) and together hold every index once, then writes the
//! study's outputs from the merged rows with the same code a single machine uses, so the files are
//! byte-identical to an unsharded run's.
//!
//! [`run_in_order`] is the run loop every such study shares: items in index order on a thread pool, stopping
//! cleanly (the finished rows kept) when a cancel flag is raised, e.g. by Ctrl-C.

use std::collections::BTreeMap;
use std::fmt;
use std::path::{Path, PathBuf};
use std::sync::Mutex;
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};

use serde::{Deserialize, Serialize};
use serde_json::Value;

use crate::error::{Error, Result};
use crate::report::{OutputDir, Producer};

/// File name of a study's rows in its folder.
pub const ROWS_FILE: &str = "rows.json";
/// Value of [`RowSet::format`] for this version of the file.
pub const ROWS_FORMAT: &str = "convchain-rows/1";

/// What a kind of study tells the row-file machinery about itself. Each study registers one (see
/// [`crate::study::STUDIES`]); this module knows none of them by name.
#[derive(Clone, Copy)]
pub struct StudyKind {
    /// [`RowSet::kind`] of its rows.
    pub kind: &'static str,
    /// The words for its items, singular and plural (a sweep's points, a Monte-Carlo study's runs).
    pub item: &'static str,
    pub items: &'static str,
    /// The options that must be the same on every shard, for messages.
    pub shard_options: &'static str,
    /// Write the study's outputs from its (merged) rows.
    pub write: fn(&OutputDir, &RowSet) -> Result<()>,
}

impl std::fmt::Debug for StudyKind {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("StudyKind")
            .field("kind", &self.kind)
            .finish()
    }
}

/// The note of a study cut short: `interrupted after M of N runs` (`points` for a sweep).
pub fn interrupted_note(study: &StudyKind, done: usize, of: usize) -> String {
    format!("interrupted after {done} of {of} {}", study.items)
}

/// Run `work(j)` for every `j` in `0..n` on the threads of `pool`, each thread taking the next `j` in increasing
/// order, and return the results in order of `j`. Once `cancel` is true no new item starts; the items in
/// progress finish, so the result holds the items `0..m` for some `m <= n` (every item when `cancel` stays
/// false). `bar`, when given, advances by one per finished item.
pub fn run_in_order<T: Send>(
    pool: &rayon::ThreadPool,
    n: usize,
    cancel: &AtomicBool,
    bar: Option<&indicatif::ProgressBar>,
    work: impl Fn(usize) -> T + Sync,
) -> Vec<T> {
    let slots: Vec<Mutex<Option<T>>> = (0..n).map(|_| Mutex::new(None)).collect();
    let next = AtomicUsize::new(0);
    pool.scope(|s| {
        for _ in 0..pool.current_num_threads() {
            s.spawn(|_| {
                loop {
                    if cancel.load(Ordering::SeqCst) {
                        break;
                    }
                    let j = next.fetch_add(1, Ordering::SeqCst);
                    if j >= n {
                        break;
                    }
                    let out = work(j);
                    *slots[j].lock().unwrap_or_else(|e| e.into_inner()) = Some(out);
                    if let Some(b) = bar {
                        b.inc(1);
                    }
                }
            });
        }
    });
    slots
        .into_iter()
        .filter_map(|m| m.into_inner().unwrap_or_else(|e| e.into_inner()))
        .collect()
}

/// A slice of a study's runs: the runs with `index % n == k - 1` (`k` from 1 to `n`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub struct Shard {
    pub k: u64,
    pub n: u64,
}

impl Shard {
    /// Every run.
    pub const WHOLE: Shard = Shard { k: 1, n: 1 };

    /// Parse `K/N` (1 <= K <= N), or `auto` / `auto/N` (K and N from a batch scheduler's array-job variables,
    /// see [`crate::study::array_job`]). Bad text is [`Error::BadInput`] with the expected form.
    pub fn parse(text: &str) -> Result<Shard> {
        if crate::study::array_job::is_auto(text) {
            return crate::study::array_job::from_env(text);
        }
        let bad = |why: &str| {
            Error::BadInput(format!(
                "--shard {text}: {why}; write K/N with 1 <= K <= N, e.g. --shard 2/3 for the second of three \
                 machines"
            ))
        };
        let (k, n) = text.split_once('/').ok_or_else(|| bad("no `/`"))?;
        let k: u64 = k
            .trim()
            .parse()
            .map_err(|_| bad("K is not a whole number"))?;
        let n: u64 = n
            .trim()
            .parse()
            .map_err(|_| bad("N is not a whole number"))?;
        if n == 0 || k == 0 || k > n {
            return Err(bad("K must be between 1 and N"));
        }
        Ok(Shard { k, n })
    }

    /// True when run `index` belongs to this shard.
    pub fn contains(&self, index: u64) -> bool {
        index % self.n == self.k - 1
    }

    /// How many of the runs `0..runs` belong to this shard.
    pub fn count(&self, runs: u64) -> u64 {
        let first = self.k - 1;
        if runs <= first {
            0
        } else {
            (runs - first).div_ceil(self.n)
        }
    }
}

impl Default for Shard {
    /// [`Shard::WHOLE`].
    fn default() -> Shard {
        Shard::WHOLE
    }
}

impl fmt::Display for Shard {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}/{}", self.k, self.n)
    }
}

/// The rows of a study (or of one shard of it), as kept in `rows.json`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct RowSet {
    /// Always [`ROWS_FORMAT`].
    pub format: String,
    /// What made the rows (`"montecarlo"`, `"sweep"`): chooses the writer of the study's other files.
    pub kind: String,
    /// Everything that identifies the study; must hold `runs`, the total number of runs. Shards merge only
    /// when their `study` values are equal.
    pub study: Value,
    /// The slice of runs this set was made for.
    pub shard: Shard,
    /// `Some("interrupted after M of N runs")` (`points` for a sweep) when the set was cut short.
    pub interrupted: Option<String>,
    /// Column names; the first is `index`.
    pub columns: Vec<String>,
    /// One row per finished run, sorted by index; `row[0]` is the run's index.
    pub rows: Vec<Vec<Value>>,
}

impl RowSet {
    /// Total number of runs of the study (`study.runs`).
    pub fn total_runs(&self) -> Option<u64> {
        self.study.get("runs").and_then(Value::as_u64)
    }

    /// Index of a row (its first cell).
    pub fn index_of(row: &[Value]) -> Option<u64> {
        row.first().and_then(Value::as_u64)
    }

    /// Serialized `rows.json` (pretty JSON with a final newline; identical for identical sets).
    pub fn to_json(&self) -> Result<Vec<u8>> {
        let mut v = serde_json::to_vec_pretty(self).map_err(|e| Error::Run(e.to_string()))?;
        v.push(b'\n');
        Ok(v)
    }

    /// Read `rows.json` from a study folder.
    pub fn read_dir(dir: &Path) -> Result<RowSet> {
        let path = dir.join(ROWS_FILE);
        let text = crate::text::read_user_text(&path, "a rows file written by convchain")?;
        let set: RowSet = serde_json::from_str(&text).map_err(|e| {
            Error::BadInput(format!(
                "{}: not a convchain rows file ({e}); give folders written by `convchain montecarlo` or \
                 `convchain sweep`",
                path.display()
            ))
        })?;
        if set.format != ROWS_FORMAT {
            return Err(Error::BadInput(format!(
                "{}: format `{}` is not `{ROWS_FORMAT}`; merge folders written by the same convchain version",
                path.display(),
                set.format
            )));
        }
        if set.columns.first().map(String::as_str) != Some("index") || set.total_runs().is_none() {
            return Err(Error::BadInput(format!(
                "{}: the header lacks `index` or `study.runs`",
                path.display()
            )));
        }
        set.check_rows(&path)?;
        Ok(set)
    }

    /// Check that the rows agree with the header: the shard is `K/N` with 1 <= K <= N; every row has one cell
    /// per column, an index below `study.runs` that belongs to the shard, indices rising; cells of the right
    /// type (`index` and `seed` whole numbers, `error` a string or null, every other cell a number or null);
    /// and, unless the set says it was interrupted, exactly the shard's rows.
    fn check_rows(&self, path: &Path) -> Result<()> {
        let bad = |why: String| {
            Error::BadInput(format!(
                "{}: {why}; the file was changed or damaged since convchain wrote it (re-run that shard)",
                path.display()
            ))
        };
        let runs = self.total_runs().unwrap_or(0);
        if self.shard.k == 0 || self.shard.k > self.shard.n {
            return Err(bad(format!(
                "the header's shard {}/{} is not K/N with 1 <= K <= N",
                self.shard.k, self.shard.n
            )));
        }
        let mut last: Option<u64> = None;
        for (r, row) in self.rows.iter().enumerate() {
            if row.len() != self.columns.len() {
                return Err(bad(format!(
                    "row {r} has {} cells for the header's {} columns",
                    row.len(),
                    self.columns.len()
                )));
            }
            for (cell, col) in row.iter().zip(&self.columns) {
                let fits = match col.as_str() {
                    "index" | "seed" => cell.is_u64(),
                    "error" => cell.is_string() || cell.is_null(),
                    _ => cell.is_number() || cell.is_null(),
                };
                if !fits {
                    return Err(bad(format!(
                        "row {r}, column `{}`: {} is not {}",
                        crate::text::clip(col),
                        short(Some(cell)),
                        match col.as_str() {
                            "index" | "seed" => "a whole number",
                            "error" => "a string or null",
                            _ => "a number or null",
                        }
                    )));
                }
            }
            let i = Self::index_of(row).unwrap_or(u64::MAX);
            if i >= runs || !self.shard.contains(i) {
                return Err(bad(format!(
                    "row {r} has index {i}, which is not a run of shard {} of a study of {runs}",
                    self.shard
                )));
            }
            if last.is_some_and(|l| i <= l) {
                return Err(bad(format!(
                    "row {r}: the indices do not rise ({i} after {})",
                    last.unwrap_or(0)
                )));
            }
            last = Some(i);
        }
        let expected = self.shard.count(runs);
        if self.interrupted.is_none() && self.rows.len() as u64 != expected {
            return Err(bad(format!(
                "the header says shard {} of {runs} (complete, not interrupted) but the file holds {} rows \
                 for its {expected}",
                self.shard,
                self.rows.len()
            )));
        }
        Ok(())
    }
}

/// The keys whose values differ between two study headers (for messages).
fn differing_keys(a: &Value, b: &Value) -> Vec<String> {
    match (a.as_object(), b.as_object()) {
        (Some(x), Some(y)) => {
            let mut keys: Vec<&String> = x.keys().chain(y.keys()).collect();
            keys.sort();
            keys.dedup();
            keys.into_iter()
                .filter(|k| x.get(*k) != y.get(*k))
                .cloned()
                .collect()
        }
        _ => vec!["study".into()],
    }
}

fn short(v: Option<&Value>) -> String {
    let s = v.map_or("nothing".to_string(), Value::to_string);
    if s.len() > 60 {
        format!("{}...", &s[..s.floor_char_boundary(57)])
    } else {
        s
    }
}

/// The registered study of kind `kind`.
fn study_of<'a>(kind: &str, studies: &'a [StudyKind]) -> Result<&'a StudyKind> {
    studies.iter().find(|s| s.kind == kind).ok_or_else(|| {
        Error::BadInput(format!(
            "merge: this convchain cannot write `{kind}` studies"
        ))
    })
}

/// Join the row sets of shards (each tagged with the folder it came from) into the whole study: same format,
/// kind, study header and columns; every index `0..runs` exactly once. Errors are [`Error::BadInput`] naming
/// the folders and the runs at fault.
pub fn merge(sets: Vec<(PathBuf, RowSet)>, studies: &[StudyKind]) -> Result<RowSet> {
    let Some((first_dir, first)) = sets.first() else {
        return Err(Error::BadInput(
            "merge: give at least one folder to merge".into(),
        ));
    };
    let study = study_of(&first.kind, studies)?;
    let (one, many) = (study.item, study.items);
    for (dir, s) in &sets[1..] {
        if s.kind != first.kind {
            return Err(Error::BadInput(format!(
                "merge: {} holds a `{}` study but {} a `{}` study; merge shards of one study",
                first_dir.display(),
                first.kind,
                dir.display(),
                s.kind
            )));
        }
        if s.study != first.study {
            let keys = differing_keys(&first.study, &s.study);
            let detail: Vec<String> = keys
                .iter()
                .map(|k| {
                    format!(
                        "{k}: {} against {}",
                        short(first.study.get(k)),
                        short(s.study.get(k))
                    )
                })
                .collect();
            let options = study.shard_options;
            return Err(Error::BadInput(format!(
                "merge: {} and {} are not shards of the same study ({}); run every shard from the same \
                 scenario file with the same options ({options})",
                first_dir.display(),
                dir.display(),
                detail.join("; ")
            )));
        }
        if s.columns != first.columns {
            return Err(Error::BadInput(format!(
                "merge: {} and {} have different columns",
                first_dir.display(),
                dir.display()
            )));
        }
    }
    let runs = first.total_runs().expect("checked when read");
    let mut by_index: BTreeMap<u64, (usize, Vec<Value>)> = BTreeMap::new();
    for (si, (dir, s)) in sets.iter().enumerate() {
        for row in &s.rows {
            let Some(i) = RowSet::index_of(row).filter(|i| *i < runs) else {
                return Err(Error::BadInput(format!(
                    "merge: {}: a row has no valid index (0 to {})",
                    dir.display(),
                    runs.saturating_sub(1)
                )));
            };
            if row.len() != first.columns.len() {
                return Err(Error::BadInput(format!(
                    "merge: {}: {one} {i} has {} cells for {} columns",
                    dir.display(),
                    row.len(),
                    first.columns.len()
                )));
            }
            if let Some((other, _)) = by_index.get(&i) {
                return Err(Error::BadInput(format!(
                    "merge: {one} {i} is in both {} and {}; give each shard once",
                    sets[*other].0.display(),
                    dir.display()
                )));
            }
            by_index.insert(i, (si, row.clone()));
        }
    }
    let missing: Vec<u64> = (0..runs).filter(|i| !by_index.contains_key(i)).collect();
    if !missing.is_empty() {
        let shown: Vec<String> = missing.iter().take(12).map(u64::to_string).collect();
        let more = if missing.len() > 12 { ", ..." } else { "" };
        let mut shards: Vec<String> = sets
            .iter()
            .map(|(d, s)| {
                let note = s
                    .interrupted
                    .as_ref()
                    .map(|m| format!(", {m}"))
                    .unwrap_or_default();
                format!("{} = shard {}{note}", d.display(), s.shard)
            })
            .collect();
        shards.sort();
        return Err(Error::BadInput(format!(
            "merge: {} of {runs} {many} are in no folder ({many} {}{more}); folders given: {}. Add the \
             missing shards, or re-run an interrupted one",
            missing.len(),
            shown.join(", "),
            shards.join("; ")
        )));
    }
    Ok(RowSet {
        format: ROWS_FORMAT.to_string(),
        kind: first.kind.clone(),
        study: first.study.clone(),
        shard: Shard::WHOLE,
        interrupted: None,
        columns: first.columns.clone(),
        rows: by_index.into_values().map(|(_, r)| r).collect(),
    })
}

/// Read the shard folders, merge them and write the study's outputs into `out` (a new or convchain-made
/// folder) with the writer of the study's kind. Returns the merged rows. `force`: replace another study the
/// folder holds.
pub fn merge_dirs(
    dirs: &[PathBuf],
    out: &Path,
    studies: &[StudyKind],
    force: bool,
) -> Result<RowSet> {
    let mut sets = Vec::with_capacity(dirs.len());
    for d in dirs {
        sets.push((d.clone(), RowSet::read_dir(d)?));
    }
    let merged = merge(sets, studies)?;
    let producer = study_producer(&merged.kind, &merged.study, Shard::WHOLE, force);
    OutputDir::check(out, &producer)?;
    let writer = study_of(&merged.kind, studies)?.write;
    let o = OutputDir::create(out, &producer)?;
    if let Err(e) = writer(&o, &merged) {
        o.abandon();
        return Err(e);
    }
    o.finish()?;
    Ok(merged)
}

/// Who writes a row-file study into a folder: its kind, and as its definition the study header of `rows.json`
/// without the scenario's fingerprint (editing the scenario and running the same study again replaces it;
/// other options, or another shard, make another study), with the shard.
pub fn study_producer(kind: &str, study: &Value, shard: Shard, force: bool) -> Producer {
    let mut definition = study.clone();
    if let Some(m) = definition.as_object_mut() {
        m.remove("scenario_hash");
        m.insert("shard".into(), Value::String(shard.to_string()));
    }
    let name = study.get("scenario").and_then(Value::as_str).unwrap_or("?");
    let mut describe = format!("a {kind} study of \"{}\"", crate::text::clip(name));
    if let Some(vary) = study.get("vary").and_then(Value::as_array) {
        let keys: Vec<&str> = vary
            .iter()
            .filter_map(|v| v.get("key").and_then(Value::as_str))
            .collect();
        let points = study.get("points").and_then(Value::as_u64).unwrap_or(0);
        let each = if keys.len() > 1 { " each" } else { "" };
        describe.push_str(&format!(
            " varying {} ({points} points{each})",
            keys.join(", ")
        ));
    } else if let Some(runs) = study.get("runs").and_then(Value::as_u64) {
        describe.push_str(&format!(" ({runs} runs"));
        if let Some(seed) = study.get("seed").and_then(Value::as_u64) {
            describe.push_str(&format!(", base seed {seed}"));
        }
        describe.push(')');
    }
    if shard != Shard::WHOLE {
        describe.push_str(&format!(", shard {shard}"));
    }
    Producer::study(kind, definition, describe, force)
}

/// FNV-1a, 64 bits, of some bytes, as `fnv1a64:<16 hex digits>`: a fingerprint of a scenario's text so that
/// shards of different scenarios are not merged by mistake (not a cryptographic hash).
pub fn fingerprint(bytes: &[u8]) -> String {
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    for b in bytes {
        h ^= u64::from(*b);
        h = h.wrapping_mul(0x0000_0100_0000_01b3);
    }
    format!("fnv1a64:{h:016x}")
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Two study kinds of the tests' own, shaped as the sweep and Monte-Carlo studies register theirs.
    const TEST_STUDIES: &[StudyKind] = &[
        StudyKind {
            kind: "sweep",
            item: "point",
            items: "points",
            shard_options: "--vary",
            write: |_, _| Ok(()),
        },
        StudyKind {
            kind: "montecarlo",
            item: "run",
            items: "runs",
            shard_options: "--runs",
            write: |_, _| Ok(()),
        },
        StudyKind {
            kind: "test",
            item: "run",
            items: "runs",
            shard_options: "--runs",
            write: |_, _| Ok(()),
        },
    ];
    use serde_json::json;

    fn set(shard: Shard, runs: u64) -> RowSet {
        RowSet {
            format: ROWS_FORMAT.into(),
            kind: "test".into(),
            study: json!({"runs": runs, "seed": 1}),
            shard,
            interrupted: None,
            columns: vec!["index".into(), "x".into()],
            rows: (0..runs)
                .filter(|i| shard.contains(*i))
                .map(|i| vec![json!(i), json!(i as f64 * 0.1)])
                .collect(),
        }
    }

    #[test]
    fn shards_partition_the_runs() {
        for n in 1..6u64 {
            for runs in 0..20u64 {
                let mut seen = vec![0; runs as usize];
                for k in 1..=n {
                    let s = Shard { k, n };
                    let owned: Vec<u64> = (0..runs).filter(|i| s.contains(*i)).collect();
                    assert_eq!(owned.len() as u64, s.count(runs));
                    for i in owned {
                        seen[i as usize] += 1;
                    }
                }
                assert!(seen.iter().all(|c| *c == 1));
            }
        }
    }

    #[test]
    fn shard_text_is_checked() {
        assert_eq!(Shard::parse("2/3").unwrap(), Shard { k: 2, n: 3 });
        for bad in ["0/3", "4/3", "3", "a/b", "1/0", ""] {
            assert!(Shard::parse(bad).unwrap_err().is_bad_input(), "{bad}");
        }
    }

    #[test]
    fn merged_shards_equal_the_whole_set() {
        let whole = set(Shard::WHOLE, 10);
        let parts: Vec<(PathBuf, RowSet)> = [3, 1, 2]
            .iter()
            .map(|k| {
                (
                    PathBuf::from(format!("s{k}")),
                    set(Shard { k: *k, n: 3 }, 10),
                )
            })
            .collect();
        let m = merge(parts, TEST_STUDIES).unwrap();
        assert_eq!(m, whole);
        assert_eq!(m.to_json().unwrap(), whole.to_json().unwrap());
    }

    #[test]
    fn merging_refuses_gaps_overlaps_and_foreign_studies() {
        let s = |k| (PathBuf::from(format!("s{k}")), set(Shard { k, n: 3 }, 10));
        let e = merge(vec![s(1), s(2)], TEST_STUDIES)
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("3 of 10 runs are in no folder") && e.contains("runs 2, 5, 8"),
            "{e}"
        );
        let e = merge(vec![s(1), s(2), s(3), s(2)], TEST_STUDIES)
            .unwrap_err()
            .to_string();
        assert!(e.contains("run 1 is in both s2 and s2"), "{e}");
        let mut other = s(3);
        other.1.study = json!({"runs": 10, "seed": 2});
        let e = merge(vec![s(1), s(2), other], TEST_STUDIES)
            .unwrap_err()
            .to_string();
        assert!(e.contains("seed: 1 against 2"), "{e}");
        assert!(merge(vec![], TEST_STUDIES).unwrap_err().is_bad_input());
    }

    #[test]
    fn merge_messages_say_points_for_sweeps_and_runs_otherwise() {
        let s = |kind: &str, k| {
            let mut set = set(Shard { k, n: 3 }, 10);
            set.kind = kind.into();
            (PathBuf::from(format!("s{k}")), set)
        };
        for (kind, one, many) in [("sweep", "point", "points"), ("montecarlo", "run", "runs")] {
            let e = merge(vec![s(kind, 1), s(kind, 2)], TEST_STUDIES)
                .unwrap_err()
                .to_string();
            assert!(
                e.contains(&format!("3 of 10 {many} are in no folder ({many} 2, 5, 8)")),
                "{e}"
            );
            let e = merge(
                vec![s(kind, 1), s(kind, 2), s(kind, 3), s(kind, 2)],
                TEST_STUDIES,
            )
            .unwrap_err()
            .to_string();
            assert!(e.contains(&format!("{one} 1 is in both s2 and s2")), "{e}");
            let mut short = s(kind, 3);
            short.1.rows[0].pop();
            let e = merge(vec![s(kind, 1), s(kind, 2), short], TEST_STUDIES)
                .unwrap_err()
                .to_string();
            assert!(e.contains(&format!("s3: {one} 2 has 1 cells")), "{e}");
            assert_eq!(
                interrupted_note(study_of(kind, TEST_STUDIES).unwrap(), 4, 10),
                format!("interrupted after 4 of 10 {many}")
            );
        }
    }

    fn pool(threads: usize) -> rayon::ThreadPool {
        rayon::ThreadPoolBuilder::new()
            .num_threads(threads)
            .build()
            .unwrap()
    }

    #[test]
    fn the_run_loop_returns_every_item_in_order_unless_stopped() {
        let never = AtomicBool::new(false);
        let all = run_in_order(&pool(2), 50, &never, None, |j| j * 10);
        assert_eq!(all, (0..50).map(|j| j * 10).collect::<Vec<_>>());
        // A flag raised before the loop starts: nothing runs.
        let raised = AtomicBool::new(true);
        let none = run_in_order(&pool(2), 50, &raised, None, |j| -> usize {
            panic!("item {j} ran")
        });
        assert!(none.is_empty());
    }

    #[test]
    fn a_stopped_run_loop_keeps_the_items_before_the_stop() {
        // One thread: the item that raises the flag finishes, and no later item starts.
        let cancel = AtomicBool::new(false);
        let got = run_in_order(&pool(1), 20, &cancel, None, |j| {
            if j == 4 {
                cancel.store(true, Ordering::SeqCst);
            }
            j
        });
        assert_eq!(got, vec![0, 1, 2, 3, 4]);
        // Two threads: the other thread may have started one more item, which finishes; no gap appears.
        for _ in 0..20 {
            let cancel = AtomicBool::new(false);
            let got = run_in_order(&pool(2), 200, &cancel, None, |j| {
                if j == 9 {
                    cancel.store(true, Ordering::SeqCst);
                }
                j
            });
            assert!((10..=11).contains(&got.len()), "{}", got.len());
            assert_eq!(got, (0..got.len()).collect::<Vec<_>>());
        }
    }

    #[test]
    fn rows_survive_a_round_trip_through_json_bit_for_bit() {
        // serde_json parses floats exactly only with its `float_roundtrip` feature; merge relies on it.
        use rand::{RngExt, SeedableRng};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(3);
        let mut s = set(Shard::WHOLE, 0);
        s.study = json!({"runs": 2000});
        s.rows = (0..2000u64)
            .map(|i| {
                let x: f64 = rng.random::<f64>() * 10f64.powi(rng.random_range(-12..12));
                vec![json!(i), json!(x)]
            })
            .collect();
        let back: RowSet = serde_json::from_slice(&s.to_json().unwrap()).unwrap();
        for (a, b) in s.rows.iter().zip(&back.rows) {
            assert_eq!(
                a[1].as_f64().unwrap().to_bits(),
                b[1].as_f64().unwrap().to_bits()
            );
        }
    }

    #[test]
    fn fingerprints_differ_for_different_text() {
        // FNV-1a offset basis and the value for "a": the FNV reference test vectors (from memory; rechecked
        // with a three-line Python loop).
        assert_eq!(fingerprint(b""), "fnv1a64:cbf29ce484222325");
        assert_eq!(fingerprint(b"a"), "fnv1a64:af63dc4c8601ec8c");
        assert_ne!(fingerprint(b"a"), fingerprint(b"b"));
    }
}

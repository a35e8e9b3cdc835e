//! A sweep's outputs: its rows (`rows.json`, the format shards merge), `sweep.csv`, `sweep.json` and the plots of
//! the main metrics against the varied key.

use std::path::Path;

use super::*;

fn num(x: f64) -> Value {
    serde_json::Number::from_f64(x).map_or(Value::Null, Value::Number)
}

fn opt_num(x: Option<f64>) -> Value {
    x.map_or(Value::Null, num)
}

impl SweepResult {
    /// Points in the whole grid (all shards).
    pub fn total_points(&self) -> u64 {
        self.axes.iter().map(|a| a.len() as u64).product()
    }

    /// The study header of `rows.json`: what must match for shards to merge (`runs` is the number of points
    /// of the whole grid; `vary` holds FROM and TO in the key's base unit).
    pub fn study_header(&self) -> Value {
        study_header(
            &self.scenario,
            &self.scenario_hash,
            &self.spec,
            self.total_points(),
        )
    }

    /// The rows as a [`RowSet`] of kind [`KIND`]: `index`, then the cells of [`Self::columns`].
    pub fn to_rows(&self) -> RowSet {
        let mut columns = vec!["index".to_string()];
        columns.extend(self.columns());
        let rows = self
            .rows
            .iter()
            .map(|r| {
                let mut row = vec![json!(r.index)];
                row.extend(r.values.iter().map(|v| num(*v)));
                row.push(opt_num(r.frequency_requested_hz));
                row.push(opt_num(r.frequency_used_hz));
                row.extend(r.metrics.iter().map(|m| opt_num(*m)));
                row.push(r.error.clone().map_or(Value::Null, Value::String));
                row
            })
            .collect();
        RowSet {
            format: ROWS_FORMAT.into(),
            kind: KIND.into(),
            study: self.study_header(),
            shard: self.shard,
            interrupted: self.interrupted.clone(),
            columns,
            rows,
        }
    }

    /// The sweep a [`RowSet`] of kind [`KIND`] holds (the inverse of [`Self::to_rows`]). A header or row
    /// that does not fit is [`Error::BadInput`].
    pub fn from_rows(set: &RowSet) -> Result<SweepResult> {
        let bad = |why: String| Error::BadInput(format!("rows of a sweep: {why}"));
        if set.kind != KIND {
            return Err(bad(format!("kind `{}` is not `{KIND}`", set.kind)));
        }
        let h = &set.study;
        let text = |k: &str| {
            h.get(k)
                .and_then(Value::as_str)
                .map(str::to_string)
                .ok_or_else(|| bad(format!("the header lacks `{k}`")))
        };
        let vary = h
            .get("vary")
            .and_then(Value::as_array)
            .filter(|a| !a.is_empty())
            .ok_or_else(|| bad("the header lacks `vary`".into()))?
            .iter()
            .map(|v| {
                Some(Vary {
                    key: v.get("key")?.as_str()?.to_string(),
                    from: v.get("from")?.as_f64()?,
                    to: v.get("to")?.as_f64()?,
                })
            })
            .collect::<Option<Vec<Vary>>>()
            .ok_or_else(|| bad("a `vary` entry lacks key, from or to".into()))?;
        let spec = SweepSpec {
            vary,
            points: h
                .get("points")
                .and_then(Value::as_u64)
                .ok_or_else(|| bad("the header lacks `points`".into()))?
                as usize,
            log: h
                .get("log")
                .and_then(Value::as_bool)
                .ok_or_else(|| bad("the header lacks `log`".into()))?,
            audio_band_hz: match h.get("audio_band_hz") {
                None => None,
                Some(b) => Some(
                    b.as_array()
                        .and_then(|a| Some((a.first()?.as_f64()?, a.get(1)?.as_f64()?)))
                        .ok_or_else(|| bad("`audio_band_hz` is not [low, high]".into()))?,
                ),
            },
        };
        let axes = spec
            .vary
            .iter()
            .map(|v| axis_values(v, spec.points, spec.log))
            .collect::<Result<Vec<_>>>()?;
        let mut result = SweepResult {
            scenario: text("scenario")?,
            scenario_hash: text("scenario_hash")?,
            spec,
            axes,
            shard: set.shard,
            rows: Vec::with_capacity(set.rows.len()),
            interrupted: set.interrupted.clone(),
        };
        if set.total_runs() != Some(result.total_points()) {
            return Err(bad(format!(
                "the header says {:?} points, the grid has {}",
                set.total_runs(),
                result.total_points()
            )));
        }
        let mut columns = vec!["index".to_string()];
        columns.extend(result.columns());
        if set.columns != columns {
            return Err(bad("the columns are not those of this sweep".into()));
        }
        let nv = result.spec.vary.len();
        let n_metrics = result.spec.metric_columns().len();
        let cell = |c: &Value| -> std::result::Result<Option<f64>, ()> {
            match c {
                Value::Null => Ok(None),
                v => v.as_f64().map(Some).ok_or(()),
            }
        };
        for r in &set.rows {
            let parsed = (|| -> std::result::Result<SweepRow, ()> {
                if r.len() != columns.len() {
                    return Err(());
                }
                let index = r[0].as_u64().ok_or(())?;
                let values = r[1..=nv]
                    .iter()
                    .map(|c| c.as_f64().ok_or(()))
                    .collect::<std::result::Result<Vec<f64>, ()>>()?;
                let metrics = r[nv + 3..nv + 3 + n_metrics]
                    .iter()
                    .map(cell)
                    .collect::<std::result::Result<Vec<_>, ()>>()?;
                let error = match &r[columns.len() - 1] {
                    Value::Null => None,
                    Value::String(s) => Some(s.clone()),
                    _ => return Err(()),
                };
                Ok(SweepRow {
                    index,
                    values,
                    frequency_requested_hz: cell(&r[nv + 1])?,
                    frequency_used_hz: cell(&r[nv + 2])?,
                    metrics,
                    error,
                })
            })()
            .map_err(|_| {
                let at = r.first().map_or("?".to_string(), Value::to_string);
                bad(format!("the row with index {at} does not fit the columns"))
            })?;
            result.rows.push(parsed);
        }
        Ok(result)
    }

    /// Column names: the varied keys, `frequency_used_hz` (beside the requested frequency), the metrics, `error`.
    pub fn columns(&self) -> Vec<String> {
        let mut c: Vec<String> = self.spec.vary.iter().map(|v| v.key.clone()).collect();
        c.push("frequency_requested_hz".into());
        c.push("frequency_used_hz".into());
        c.extend(self.spec.metric_columns().iter().map(|s| s.to_string()));
        c.push("error".into());
        c
    }

    /// Index of a metric column in [`SweepRow::metrics`].
    pub fn metric_index(name: &str) -> Option<usize> {
        METRIC_COLUMNS.iter().position(|c| *c == name)
    }

    /// The CSV text (empty cells for missing values; numbers in Rust's shortest round-trip form).
    pub fn to_csv(&self) -> Result<Vec<u8>> {
        let mut w = csv::Writer::from_writer(Vec::new());
        let io = |e: csv::Error| Error::Run(format!("sweep.csv: {e}"));
        w.write_record(self.columns()).map_err(io)?;
        let num = |x: Option<f64>| x.map(|v| v.to_string()).unwrap_or_default();
        for r in &self.rows {
            let mut rec: Vec<String> = r.values.iter().map(|v| v.to_string()).collect();
            rec.push(num(r.frequency_requested_hz));
            rec.push(num(r.frequency_used_hz));
            rec.extend(r.metrics.iter().map(|m| num(*m)));
            rec.push(r.error.clone().unwrap_or_default());
            w.write_record(&rec).map_err(io)?;
        }
        w.into_inner()
            .map_err(|e| Error::Run(format!("sweep.csv: {e}")))
    }

    /// The JSON document: scenario, the varied keys with their values, the columns, one object per row.
    pub fn to_json(&self) -> serde_json::Value {
        use serde_json::Map;
        let vary: Vec<Value> = self
            .spec
            .vary
            .iter()
            .zip(&self.axes)
            .map(|(v, a)| {
                json!({"key": v.key, "from": v.from, "to": v.to, "points": a.len(), "log": self.spec.log,
                       "values": a})
            })
            .collect();
        let rows: Vec<Value> = self
            .rows
            .iter()
            .map(|r| {
                let mut m = Map::new();
                for (v, x) in self.spec.vary.iter().zip(&r.values) {
                    m.insert(v.key.clone(), json!(x));
                }
                m.insert(
                    "frequency_requested_hz".into(),
                    json!(r.frequency_requested_hz),
                );
                m.insert("frequency_used_hz".into(), json!(r.frequency_used_hz));
                for (c, x) in self.spec.metric_columns().iter().zip(&r.metrics) {
                    m.insert(c.to_string(), json!(x));
                }
                m.insert("error".into(), json!(r.error));
                Value::Object(m)
            })
            .collect();
        let mut doc = json!({
            "scenario": self.scenario,
            "vary": vary,
            "columns": self.columns(),
            "rows": rows,
        });
        if self.shard != Shard::WHOLE {
            doc["shard"] = json!({
                "shard": self.shard.to_string(),
                "points": self.rows.len(),
                "of_points": self.total_points(),
                "note": "one shard of the sweep: its rows only; join every shard's folder with `convchain merge`",
            });
        }
        if let Some(note) = &self.interrupted {
            doc["interrupted"] = json!(note);
            doc["points_done"] = json!(self.rows.len());
        }
        doc
    }

    /// The x value of a row for plots: the first varied value, or the frequency used when the first key is
    /// the source frequency.
    fn plot_x(&self, r: &SweepRow) -> f64 {
        if self.spec.vary[0].key == "source.frequency" {
            r.frequency_used_hz.unwrap_or(r.values[0])
        } else {
            r.values[0]
        }
    }

    /// The plots: (file stem, plot title, y label, metric columns). One series per metric and per combination of
    /// the other keys' values.
    pub const PLOTS: &'static [(
        &'static str,
        &'static str,
        &'static str,
        &'static [&'static str],
    )] = &[
        (
            "sweep-enob",
            "ENOB",
            "ENOB (bits)",
            &["adc.enob_bits", "output.enob_bits"],
        ),
        (
            "sweep-sinad",
            "SINAD",
            "SINAD (dB)",
            &["adc.sinad_db", "output.sinad_db"],
        ),
        (
            "sweep-gain",
            "Gain",
            "output gain (dB)",
            &["output.gain_db"],
        ),
        (
            "sweep-fidelity",
            "Waveform fidelity",
            "output waveform fidelity (dB)",
            &["output.fidelity_db"],
        ),
    ];

    /// A metric column's legend in words: where it is measured, as the terminal's table heads say.
    pub fn metric_words(name: &str) -> String {
        match name.split_once('.') {
            Some(("adc", _)) => "ADC codes".to_string(),
            Some(("output", _)) => "analog output".to_string(),
            _ => name.replace(['.', '_'], " "),
        }
    }

    /// The series of one plot: (name, x, y), skipping missing values.
    pub fn plot_series(&self, metrics: &[&str]) -> Vec<(String, Vec<f64>, Vec<f64>)> {
        let mut out = Vec::new();
        // Groups: rows sharing the values of every key but the first.
        let mut groups: Vec<(Vec<f64>, Vec<&SweepRow>)> = Vec::new();
        for r in &self.rows {
            let rest = r.values[1..].to_vec();
            match groups.iter_mut().find(|(k, _)| *k == rest) {
                Some((_, g)) => g.push(r),
                None => groups.push((rest, vec![r])),
            }
        }
        for name in metrics {
            let Some(i) = Self::metric_index(name) else {
                continue;
            };
            for (rest, rows) in &groups {
                let mut x: Vec<f64> = Vec::new();
                let mut y: Vec<f64> = Vec::new();
                for r in rows {
                    // Two points at one x (requested values that ran at the same frequency) are drawn once.
                    if let Some(v) = r.metrics[i]
                        && !x.contains(&self.plot_x(r))
                    {
                        x.push(self.plot_x(r));
                        y.push(v);
                    }
                }
                if x.is_empty() {
                    continue;
                }
                let mut label = Self::metric_words(name);
                for (v, val) in self.spec.vary[1..].iter().zip(rest) {
                    let shown = match key_dimension(&v.key) {
                        Some(Dimension::Angle) => format!("{val} deg"),
                        Some(d) if d != Dimension::Gain && !d.base_unit().is_empty() => {
                            crate::format::units::format_si(*val, d.base_unit())
                        }
                        _ => val.to_string(),
                    };
                    label.push_str(&format!(", {} {shown}", key_words(&v.key)));
                }
                out.push((label, x, y));
            }
        }
        out
    }
}

/// A key in words for plot axes and legends: "buffer.slew_rate" -> "buffer slew rate".
pub fn key_words(key: &str) -> String {
    key.replace(['.', '_'], " ")
}

/// Write `sweep.csv`, `sweep.json`, `rows.json` and the plots (PNG and SVG) of the sweep a row set holds
/// (one machine's, one shard's or merged shards') into `out`. The same rows always give the same bytes.
pub fn write_outputs(out: &OutputDir, set: &RowSet) -> Result<SweepResult> {
    let result = SweepResult::from_rows(set)?;
    out.write("sweep.csv", &result.to_csv()?)?;
    let json =
        serde_json::to_vec_pretty(&result.to_json()).map_err(|e| Error::Run(e.to_string()))?;
    out.write("sweep.json", &json)?;
    out.write(ROWS_FILE, &set.to_json()?)?;
    let first = &result.spec.vary[0].key;
    let words = key_words(first);
    let x_label = match key_dimension(first) {
        _ if first == "source.frequency" => "source frequency used (Hz)".to_string(),
        Some(Dimension::Angle) => format!("{words} (deg)"),
        Some(d) if !d.base_unit().is_empty() && d != Dimension::Gain => {
            format!("{words} ({})", d.base_unit())
        }
        _ => words.clone(),
    };
    let mut shard_note = if result.shard == Shard::WHOLE {
        String::new()
    } else {
        format!(" (shard {} only)", result.shard)
    };
    if let Some(note) = &result.interrupted {
        shard_note.push_str(&format!(" ({note})"));
    }
    for (stem, title, y_label, metrics) in SweepResult::PLOTS {
        let series = result.plot_series(metrics);
        let xy = XyPlot {
            title: format!("{}: {title} against {words}{shard_note}", result.scenario),
            x_label: x_label.clone(),
            y_label: y_label.to_string(),
            series: series
                .iter()
                .map(|(n, x, y)| (n.as_str(), x.as_slice(), y.as_slice()))
                .collect(),
            log_x: result.spec.log,
            markers: Vec::new(),
        };
        let p = Plot::Xy(xy);
        let (png, _) = plot::render_png(&p, 1000, 620)?;
        out.write(&format!("{stem}.png"), &png)?;
        let (svg, _) = plot::render_svg(&p)?;
        out.write(&format!("{stem}.svg"), svg.as_bytes())?;
    }
    Ok(result)
}

/// The study header of a sweep's `rows.json` ([`SweepResult::study_header`]).
fn study_header(scenario: &str, hash: &str, spec: &SweepSpec, total_points: u64) -> Value {
    let mut h = json!({
        "runs": total_points,
        "scenario": scenario,
        "scenario_hash": hash,
        "vary": spec.vary.iter().map(|v| json!({"key": v.key, "from": v.from, "to": v.to}))
            .collect::<Vec<_>>(),
        "points": spec.points,
        "log": spec.log,
    });
    if let Some((low, high)) = spec.audio_band_hz {
        h["audio_band_hz"] = json!([low, high]);
    }
    h
}

/// Who writes the sweep `spec` of the scenario named `scenario` (shard `shard`) into a folder, known before
/// the sweep runs so a folder holding another study is refused at once: the same as the finished sweep's
/// ([`write_sweep`]) and a merge of its shards'.
pub fn folder_producer(
    spec: &SweepSpec,
    scenario: &str,
    shard: Shard,
    force: bool,
) -> Result<Producer> {
    let mut total = 1u64;
    for v in &spec.vary {
        total = total.saturating_mul(axis_values(v, spec.points, spec.log)?.len() as u64);
    }
    let header = study_header(scenario, "", spec, total);
    Ok(study_producer(KIND, &header, shard, force))
}

/// Write a sweep's files ([`write_outputs`] of its rows) atomically into `dir`, removing the files an earlier
/// run of the same sweep wrote there and this one did not. `force`: replace another study the folder holds.
pub fn write_sweep(result: &SweepResult, dir: &Path, force: bool) -> Result<()> {
    let producer = study_producer(KIND, &result.study_header(), result.shard, force);
    let out = OutputDir::create(dir, &producer)?;
    if let Err(e) = write_outputs(&out, &result.to_rows()) {
        out.abandon();
        return Err(e);
    }
    out.finish()?;
    Ok(())
}

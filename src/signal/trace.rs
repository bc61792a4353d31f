//! Traces: uniformly sampled fault responses of one case, and their files.
//!
//! A trace is a CSV file (a few `#` lines stating the format, units and per-unit bases, one
//! header row of channel names, one row per sample) plus a JSON sidecar with the case's
//! parameters. Numbers are written in Rust's shortest round-trip form, so write → read gives
//! back every value bit for bit.
//!
//! Standard channels (per unit on the unit's rating; phasors in the network frame, which rotates
//! at nominal frequency; generator convention):
//! `v_re, v_im, v_mag, v_angle` (terminal voltage; angle in rad), `i_re, i_im` (injected
//! current), `p, q` (injected power), `f_grid` (grid frequency, pu). Internal channels follow.

use crate::atomic::write_atomic;
use serde::{Deserialize, Serialize};
use std::fmt::Write as _;
use std::path::{Path, PathBuf};
use thiserror::Error;

pub const FORMAT: &str = "understudy-trace/1";

/// The channels every trace carries, in order.
pub const STANDARD_CHANNELS: [&str; 9] = [
    "v_re", "v_im", "v_mag", "v_angle", "i_re", "i_im", "p", "q", "f_grid",
];

#[derive(Debug, Error)]
pub enum TraceError {
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("{path}, line {line}: {message}")]
    Parse {
        path: PathBuf,
        line: usize,
        message: String,
    },
    #[error("{path}: {message}")]
    Invalid { path: PathBuf, message: String },
}

/// Per-unit bases and provenance of a trace.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TraceMeta {
    pub format: String,
    /// What produced it, e.g. "full-converter (built-in detailed model)".
    pub source: String,
    pub s_base_mva: f64,
    pub v_base_kv: f64,
    pub f_nom_hz: f64,
    /// The case's parameters (operating point, grid, disturbance, ...) as written by its producer.
    #[serde(default)]
    pub case: serde_json::Value,
}

/// One uniformly sampled trace.
#[derive(Debug, Clone, PartialEq)]
pub struct Trace {
    pub meta: TraceMeta,
    pub time_s: Vec<f64>,
    pub names: Vec<String>,
    /// One column per name, each as long as `time_s`.
    pub columns: Vec<Vec<f64>>,
}

fn fmt_number(out: &mut String, x: f64) {
    // shortest round-trip representation; exponent form for very small/large magnitudes
    let a = x.abs();
    if x != 0.0 && !(1e-5..1e15).contains(&a) {
        let _ = write!(out, "{x:e}");
    } else {
        let _ = write!(out, "{x}");
    }
}

impl Trace {
    pub fn new(meta: TraceMeta, names: Vec<String>) -> Self {
        let columns = vec![Vec::new(); names.len()];
        Self {
            meta,
            time_s: Vec::new(),
            names,
            columns,
        }
    }

    /// Append one sample. Panics if `values` does not match the channel count (a caller bug).
    pub fn push(&mut self, t_s: f64, values: &[f64]) {
        assert_eq!(values.len(), self.names.len(), "sample width");
        self.time_s.push(t_s);
        for (c, v) in self.columns.iter_mut().zip(values) {
            c.push(*v);
        }
    }

    pub fn len(&self) -> usize {
        self.time_s.len()
    }

    pub fn is_empty(&self) -> bool {
        self.time_s.is_empty()
    }

    /// The column named `name`.
    pub fn channel(&self, name: &str) -> Option<&[f64]> {
        self.names
            .iter()
            .position(|n| n == name)
            .map(|k| self.columns[k].as_slice())
    }

    /// Sample step, checking that samples are uniform (relative spread below 1e-6).
    pub fn uniform_step_s(&self) -> Option<f64> {
        if self.time_s.len() < 2 {
            return None;
        }
        let n = self.time_s.len() - 1;
        let dt = (self.time_s[n] - self.time_s[0]) / n as f64;
        let uniform = self
            .time_s
            .windows(2)
            .all(|w| ((w[1] - w[0]) - dt).abs() <= 1e-6 * dt);
        uniform.then_some(dt)
    }

    /// The CSV text of the trace.
    pub fn to_csv(&self) -> String {
        let mut s = String::with_capacity(32 * (self.names.len() + 1) * (self.len() + 4));
        let m = &self.meta;
        let _ = writeln!(s, "# {FORMAT}; source: {}", m.source);
        let _ = writeln!(
            s,
            "# per unit on S_base = {} MVA, V_base = {} kV (line-to-line), f_nom = {} Hz; \
             phasors in the network frame (rotating at nominal frequency); generator convention",
            m.s_base_mva, m.v_base_kv, m.f_nom_hz
        );
        let _ = writeln!(
            s,
            "# t_s in seconds; v_angle in rad; every other channel in per unit"
        );
        s.push_str("t_s");
        for n in &self.names {
            s.push(',');
            s.push_str(n);
        }
        s.push('\n');
        for (k, t) in self.time_s.iter().enumerate() {
            fmt_number(&mut s, *t);
            for c in &self.columns {
                s.push(',');
                fmt_number(&mut s, c[k]);
            }
            s.push('\n');
        }
        s
    }

    /// Write `<stem>.csv` and `<stem>.json` into `dir`, each atomically.
    pub fn write(&self, dir: &Path, stem: &str) -> Result<(), TraceError> {
        let csv = dir.join(format!("{stem}.csv"));
        let json = dir.join(format!("{stem}.json"));
        write_atomic(&csv, self.to_csv().as_bytes()).map_err(|source| TraceError::Io {
            path: csv.clone(),
            source,
        })?;
        let meta = serde_json::to_string_pretty(&self.meta).expect("trace metadata serialises");
        write_atomic(&json, meta.as_bytes()).map_err(|source| TraceError::Io {
            path: json.clone(),
            source,
        })
    }

    /// Read a trace from its CSV file; the sidecar `<stem>.json` beside it is read when present.
    pub fn read(csv_path: &Path) -> Result<Self, TraceError> {
        let text = std::fs::read_to_string(csv_path).map_err(|source| TraceError::Io {
            path: csv_path.to_path_buf(),
            source,
        })?;
        let sidecar = csv_path.with_extension("json");
        let meta = if sidecar.exists() {
            let raw = std::fs::read_to_string(&sidecar).map_err(|source| TraceError::Io {
                path: sidecar.clone(),
                source,
            })?;
            serde_json::from_str(&raw).map_err(|e| TraceError::Parse {
                path: sidecar.clone(),
                line: e.line(),
                message: e.to_string(),
            })?
        } else {
            TraceMeta {
                format: FORMAT.into(),
                source: "unknown (no sidecar)".into(),
                s_base_mva: f64::NAN,
                v_base_kv: f64::NAN,
                f_nom_hz: f64::NAN,
                case: serde_json::Value::Null,
            }
        };
        Self::parse_csv(csv_path, &text, meta)
    }

    fn parse_csv(path: &Path, text: &str, meta: TraceMeta) -> Result<Self, TraceError> {
        let err = |line: usize, message: String| TraceError::Parse {
            path: path.to_path_buf(),
            line,
            message,
        };
        let mut lines = text
            .lines()
            .enumerate()
            .map(|(k, l)| (k + 1, l))
            .filter(|(_, l)| !l.starts_with('#') && !l.trim().is_empty());
        let (hline, header) = lines
            .next()
            .ok_or_else(|| err(1, "no header row (expected `t_s,<channel>,...`)".into()))?;
        let mut fields = header.split(',').map(str::trim);
        if fields.next() != Some("t_s") {
            return Err(err(hline, "the first column must be `t_s`".into()));
        }
        let names: Vec<String> = fields.map(String::from).collect();
        if names.is_empty() {
            return Err(err(hline, "no channel columns after `t_s`".into()));
        }
        let mut trace = Trace::new(meta, names);
        let mut row = vec![0.0; trace.names.len()];
        for (lno, line) in lines {
            let mut it = line.split(',');
            let parse = |col: &str, s: Option<&str>| -> Result<f64, TraceError> {
                let s = s.ok_or_else(|| err(lno, format!("missing value for column `{col}`")))?;
                s.trim()
                    .parse::<f64>()
                    .map_err(|_| err(lno, format!("column `{col}`: `{s}` is not a number")))
            };
            let t = parse("t_s", it.next())?;
            for (k, name) in trace.names.iter().enumerate() {
                row[k] = parse(name, it.next())?;
            }
            if it.next().is_some() {
                return Err(err(
                    lno,
                    format!(
                        "more values than the {} columns of the header",
                        trace.names.len() + 1
                    ),
                ));
            }
            if let Some(&last) = trace.time_s.last() {
                if t <= last {
                    return Err(err(
                        lno,
                        format!("time {t} s does not increase (previous {last} s)"),
                    ));
                }
            }
            trace.time_s.push(t);
            for (c, v) in trace.columns.iter_mut().zip(&row) {
                c.push(*v);
            }
        }
        if trace.is_empty() {
            return Err(TraceError::Invalid {
                path: path.to_path_buf(),
                message: "no samples".into(),
            });
        }
        Ok(trace)
    }

    /// Checks a fitting stage relies on: finite values and uniform sampling. The error names the
    /// file, the channel and the sample.
    pub fn check_usable(&self, path: &Path) -> Result<f64, TraceError> {
        for (name, col) in self.names.iter().zip(&self.columns) {
            if let Some(k) = col.iter().position(|v| !v.is_finite()) {
                return Err(TraceError::Invalid {
                    path: path.to_path_buf(),
                    message: format!(
                        "channel `{name}` is not finite at sample {k} (t = {} s)",
                        self.time_s[k]
                    ),
                });
            }
        }
        self.uniform_step_s().ok_or_else(|| TraceError::Invalid {
            path: path.to_path_buf(),
            message: "sample times are not uniform (resample the recording first)".into(),
        })
    }
}

/// Read every `*.csv` trace of a folder, sorted by file name.
pub fn read_folder(dir: &Path) -> Result<Vec<(PathBuf, Trace)>, TraceError> {
    let entries = std::fs::read_dir(dir).map_err(|source| TraceError::Io {
        path: dir.to_path_buf(),
        source,
    })?;
    let mut paths: Vec<PathBuf> = entries
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| p.extension().is_some_and(|e| e == "csv"))
        .collect();
    paths.sort();
    if paths.is_empty() {
        return Err(TraceError::Invalid {
            path: dir.to_path_buf(),
            message: "no *.csv traces in this folder".into(),
        });
    }
    paths
        .into_iter()
        .map(|p| Trace::read(&p).map(|t| (p, t)))
        .collect()
}

//! COMTRADE transient-record files (IEEE Std C37.111, revisions 1991, 1999 and 2013; the 2013
//! revision is also IEC 60255-24:2013): read `.cfg` + `.dat` pairs and single `.cff` files,
//! write `.cfg` + `.dat` pairs (1999, 2013) and `.cff` files (2013).
//!
//! Values in a [`Recording`] are physical values on the PRIMARY side of the instrument
//! transformers (the unit is the channel's `unit` field, e.g. `kV`), NOT per unit. A missing
//! sample (99999 in ASCII, 0x8000 in BINARY, 0x80000000 in BINARY32, NaN in FLOAT32) is NaN.
//!
//! Times: `times_s` are seconds after `start`, the date/time of the first data point
//! (C37.111-1999 semantics). When the .cfg gives sample rates the sample times come
//! from the rates and the sample numbers (the data-file time stamps are then non-critical and are
//! ignored); when it gives `nrates = 0` they come from the time stamps × `timemult`.

use std::fmt::Write as _;
use std::fs;
use std::io::Write as _;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

/// Raw value that marks a missing ASCII sample (C37.111-1999).
const ASCII_MISSING: &str = "99999";
/// Largest magnitude the writer puts in an ASCII data field (valid range −99999..99998 in
/// C37.111-1999; 99999 is reserved for missing data).
const ASCII_RAW_LIMIT: f64 = 99_998.0;
/// Missing sample in BINARY (int16) data (C37.111-1999).
const INT16_MISSING: i16 = i16::MIN;
/// Missing sample in BINARY32 (int32) data (C37.111-2013).
const INT32_MISSING: i32 = i32::MIN;
/// Missing time stamp in binary data (C37.111-2013).
const TIMESTAMP_MISSING: u32 = u32::MAX;

/// Standard revision named on the first line of the .cfg (`rev_year`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub enum Revision {
    /// IEEE Std C37.111-1991 (no `rev_year` field; dates are mm/dd/yy).
    R1991,
    /// IEEE Std C37.111-1999.
    R1999,
    /// IEEE Std C37.111-2013 / IEC 60255-24:2013.
    R2013,
}

impl Revision {
    /// The `rev_year` text.
    pub fn year(self) -> &'static str {
        match self {
            Revision::R1991 => "1991",
            Revision::R1999 => "1999",
            Revision::R2013 => "2013",
        }
    }
}

/// Data-file format (`ft` line of the .cfg).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub enum DataFormat {
    /// Comma-separated text, integer raw values.
    Ascii,
    /// Little-endian int16 raw values.
    Binary,
    /// Little-endian int32 raw values (2013 only).
    Binary32,
    /// Little-endian IEEE-754 single-precision raw values (2013 only).
    Float32,
}

impl DataFormat {
    /// The keyword of the `ft` line.
    pub fn keyword(self) -> &'static str {
        match self {
            DataFormat::Ascii => "ASCII",
            DataFormat::Binary => "BINARY",
            DataFormat::Binary32 => "BINARY32",
            DataFormat::Float32 => "FLOAT32",
        }
    }

    fn from_keyword(text: &str) -> Option<Self> {
        match text.trim().to_ascii_uppercase().as_str() {
            "ASCII" => Some(DataFormat::Ascii),
            "BINARY" => Some(DataFormat::Binary),
            "BINARY32" => Some(DataFormat::Binary32),
            "FLOAT32" => Some(DataFormat::Float32),
            _ => None,
        }
    }

    /// Bytes of one analog value in a binary data file (0 for ASCII).
    fn analog_bytes(self) -> usize {
        match self {
            DataFormat::Ascii => 0,
            DataFormat::Binary => 2,
            DataFormat::Binary32 | DataFormat::Float32 => 4,
        }
    }
}

/// A calendar date and time of day as written in a .cfg (no time zone applied; see
/// [`Recording::time_code`]). `second` may be 60 during a leap second.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub struct ComtradeTimestamp {
    pub year: i32,
    pub month: u8,
    pub day: u8,
    pub hour: u8,
    pub minute: u8,
    pub second: u8,
    pub nanosecond: u32,
}

impl ComtradeTimestamp {
    /// Midnight of 1 January 1970, a neutral start for simulated records.
    pub const EPOCH: ComtradeTimestamp = ComtradeTimestamp {
        year: 1970,
        month: 1,
        day: 1,
        hour: 0,
        minute: 0,
        second: 0,
        nanosecond: 0,
    };

    fn total_nanoseconds(&self) -> i128 {
        let days = days_from_civil(
            i64::from(self.year),
            i64::from(self.month),
            i64::from(self.day),
        );
        let seconds_of_day =
            i64::from(self.hour) * 3600 + i64::from(self.minute) * 60 + i64::from(self.second);
        (i128::from(days) * 86_400 + i128::from(seconds_of_day)) * 1_000_000_000
            + i128::from(self.nanosecond)
    }

    fn from_total_nanoseconds(total: i128) -> Self {
        let ns_per_day: i128 = 86_400 * 1_000_000_000;
        let days = total.div_euclid(ns_per_day);
        let of_day = total.rem_euclid(ns_per_day);
        let (year, month, day) = civil_from_days(days as i64);
        let seconds = (of_day / 1_000_000_000) as i64;
        ComtradeTimestamp {
            year: year as i32,
            month: month as u8,
            day: day as u8,
            hour: (seconds / 3600) as u8,
            minute: ((seconds / 60) % 60) as u8,
            second: (seconds % 60) as u8,
            nanosecond: (of_day % 1_000_000_000) as u32,
        }
    }

    /// Seconds from `earlier` to `self` (negative when `self` is before `earlier`).
    pub fn seconds_since(&self, earlier: &ComtradeTimestamp) -> f64 {
        (self.total_nanoseconds() - earlier.total_nanoseconds()) as f64 * 1e-9
    }

    /// This instant moved by `seconds` (rounded to the nanosecond).
    pub fn plus_seconds(&self, seconds: f64) -> ComtradeTimestamp {
        let shift = (seconds * 1e9).round() as i128;
        Self::from_total_nanoseconds(self.total_nanoseconds() + shift)
    }
}

// Days since 1970-01-01 of a proleptic Gregorian date, H. Hinnant, "chrono-Compatible Low-Level
// Date Algorithms" (2013), days_from_civil.
fn days_from_civil(year: i64, month: i64, day: i64) -> i64 {
    let y = if month <= 2 { year - 1 } else { year };
    let era = if y >= 0 { y } else { y - 399 } / 400;
    let year_of_era = y - era * 400;
    let shifted_month = (month + 9) % 12; // March = 0
    let day_of_year = (153 * shifted_month + 2) / 5 + day - 1;
    let day_of_era = year_of_era * 365 + year_of_era / 4 - year_of_era / 100 + day_of_year;
    era * 146_097 + day_of_era - 719_468
}

// Inverse of days_from_civil, same source (civil_from_days).
fn civil_from_days(days: i64) -> (i64, i64, i64) {
    let z = days + 719_468;
    let era = if z >= 0 { z } else { z - 146_096 } / 146_097;
    let day_of_era = z - era * 146_097;
    let year_of_era =
        (day_of_era - day_of_era / 1460 + day_of_era / 36_524 - day_of_era / 146_096) / 365;
    let day_of_year = day_of_era - (365 * year_of_era + year_of_era / 4 - year_of_era / 100);
    let shifted_month = (5 * day_of_year + 2) / 153;
    let day = day_of_year - (153 * shifted_month + 2) / 5 + 1;
    let month = if shifted_month < 10 {
        shifted_month + 3
    } else {
        shifted_month - 9
    };
    let year = year_of_era + era * 400 + i64::from(month <= 2);
    (year, month, day)
}

/// One analog channel: scaled values on the primary side.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct AnalogChannel {
    /// Channel identifier (`ch_id`).
    pub name: String,
    /// Phase identification (`ph`), e.g. `A`, `B`, `C`, `N`; may be empty.
    pub phase: String,
    /// Circuit component being monitored (`ccbm`); may be empty.
    pub circuit: String,
    /// Unit of the values (`uu`), e.g. `kV`, `A`.
    pub unit: String,
    /// Time skew of this channel against the sample time, seconds (`skew`, stored in µs).
    pub skew_s: f64,
    /// Instrument-transformer primary rating (`primary`); 1 when unknown.
    pub primary_ratio: f64,
    /// Instrument-transformer secondary rating (`secondary`); 1 when unknown.
    pub secondary_ratio: f64,
    /// One value per sample, primary side, NaN where the sample is missing.
    pub values: Vec<f64>,
}

impl AnalogChannel {
    /// A channel with unit transformer ratios, no skew and no phase or circuit text.
    pub fn new(name: impl Into<String>, unit: impl Into<String>, values: Vec<f64>) -> Self {
        AnalogChannel {
            name: name.into(),
            phase: String::new(),
            circuit: String::new(),
            unit: unit.into(),
            skew_s: 0.0,
            primary_ratio: 1.0,
            secondary_ratio: 1.0,
            values,
        }
    }
}

/// One status (digital) channel.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct StatusChannel {
    /// Channel identifier (`ch_id`).
    pub name: String,
    /// Phase identification (`ph`); may be empty.
    pub phase: String,
    /// Circuit component being monitored (`ccbm`); may be empty.
    pub circuit: String,
    /// Normal (non-alarm) state, 0 or 1 (`y`).
    pub normal_state: u8,
    /// One state per sample, 0 or 1.
    pub values: Vec<u8>,
}

impl StatusChannel {
    /// A channel with normal state 0 and no phase or circuit text.
    pub fn new(name: impl Into<String>, values: Vec<u8>) -> Self {
        StatusChannel {
            name: name.into(),
            phase: String::new(),
            circuit: String::new(),
            normal_state: 0,
            values,
        }
    }
}

/// A whole COMTRADE record: configuration and data.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Recording {
    /// Station name (`station_name`).
    pub station: String,
    /// Recording device identification (`rec_dev_id`).
    pub device: String,
    /// Revision of the file this was read from (the writer's revision is chosen separately).
    pub revision: Revision,
    pub analog: Vec<AnalogChannel>,
    pub status: Vec<StatusChannel>,
    /// Sample times, seconds after `start`.
    pub times_s: Vec<f64>,
    /// Date/time of the first data point.
    pub start: ComtradeTimestamp,
    /// Trigger instant, seconds after `start`.
    pub trigger_s: f64,
    /// Nominal line frequency (`lf`), Hz.
    pub nominal_frequency_hz: f64,
    /// 2013 `time_code` (offset of the time stamps from UTC, e.g. `+5h30`); `0` when not given.
    pub time_code: String,
    /// 2013 `local_code` (offset of local time from UTC); `0` when not given.
    pub local_code: String,
    /// 2013 time-quality code `tmq_code` (one hexadecimal digit); `0` when not given.
    pub time_quality: String,
    /// 2013 leap-second indicator `leapsec` (0..=3); 0 when not given.
    pub leap_second: u8,
}

impl Recording {
    /// An empty recording with the given identification and time base; add channels after.
    pub fn new(
        station: impl Into<String>,
        device: impl Into<String>,
        nominal_frequency_hz: f64,
        times_s: Vec<f64>,
    ) -> Self {
        Recording {
            station: station.into(),
            device: device.into(),
            revision: Revision::R2013,
            analog: Vec::new(),
            status: Vec::new(),
            times_s,
            start: ComtradeTimestamp::EPOCH,
            trigger_s: 0.0,
            nominal_frequency_hz,
            time_code: "0".to_string(),
            local_code: "0".to_string(),
            time_quality: "0".to_string(),
            leap_second: 0,
        }
    }

    /// Date/time of the trigger.
    pub fn trigger_timestamp(&self) -> ComtradeTimestamp {
        self.start.plus_seconds(self.trigger_s)
    }

    /// The analog channel with this name, if any.
    pub fn analog_channel(&self, name: &str) -> Option<&AnalogChannel> {
        self.analog.iter().find(|c| c.name == name)
    }

    /// The status channel with this name, if any.
    pub fn status_channel(&self, name: &str) -> Option<&StatusChannel> {
        self.status.iter().find(|c| c.name == name)
    }
}

/// Why a COMTRADE file could not be read or written. Every variant names the file; text-file
/// variants name the 1-based line, and field variants the field.
#[derive(Debug, thiserror::Error)]
pub enum ComtradeError {
    #[error("cannot {action} {}: {source}", path.display())]
    Io {
        action: &'static str,
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("{}, line {line}: field `{field}` = `{found}` is not {expected}", path.display())]
    BadField {
        path: PathBuf,
        line: usize,
        field: String,
        found: String,
        expected: String,
    },
    #[error("{}, line {line} ({what}): expected {expected} comma-separated fields, found {found}", path.display())]
    FieldCount {
        path: PathBuf,
        line: usize,
        what: String,
        expected: String,
        found: usize,
    },
    #[error("{}: ends after line {last_line}; expected the {what} line next", path.display())]
    MissingLine {
        path: PathBuf,
        last_line: usize,
        what: String,
    },
    #[error("{}, line {line}: total channel count TT = {total} but {analog}A + {status}D = {}", path.display(), analog + status)]
    ChannelTotal {
        path: PathBuf,
        line: usize,
        total: usize,
        analog: usize,
        status: usize,
    },
    #[error("{}, line {line}: data format `{found}` is not one of ASCII, BINARY, BINARY32, FLOAT32", path.display())]
    UnknownFormat {
        path: PathBuf,
        line: usize,
        found: String,
    },
    #[error("{}, line {line}: data format {format} needs revision 2013, the file says {revision}", path.display())]
    FormatNeedsRevision2013 {
        path: PathBuf,
        line: usize,
        format: &'static str,
        revision: &'static str,
    },
    #[error("{}, line {line}: {found} values, but the .cfg declares {analog} analog + {status} status channels (expected {expected} fields with sample number and time stamp)", path.display())]
    ChannelCountMismatch {
        path: PathBuf,
        line: usize,
        expected: usize,
        found: usize,
        analog: usize,
        status: usize,
    },
    #[error("{}: truncated data: {found} whole samples present, the .cfg declares {expected} ({detail})", path.display())]
    Truncated {
        path: PathBuf,
        expected: usize,
        found: usize,
        detail: String,
    },
    #[error("{}: {found} bytes of data, but the .cfg declares {samples} samples of {row_bytes} bytes ({analog} analog + {status} status channels) = {expected} bytes", path.display())]
    DataLength {
        path: PathBuf,
        found: usize,
        expected: usize,
        samples: usize,
        row_bytes: usize,
        analog: usize,
        status: usize,
    },
    #[error("{}, {location}: sample number {found} does not follow {previous} (misaligned data or wrong channel count?)", path.display())]
    SampleNumber {
        path: PathBuf,
        location: String,
        found: u64,
        previous: u64,
    },
    #[error("{}, {location}: time stamp missing but the .cfg gives no sample rate (nrates = 0)", path.display())]
    MissingTimestamp { path: PathBuf, location: String },
    #[error("{}, line {line}: {reason}", path.display())]
    Container {
        path: PathBuf,
        line: usize,
        reason: String,
    },
    #[error("{}: file name must end in .cfg or .cff", path.display())]
    Extension { path: PathBuf },
    #[error("cannot write {}: {reason}", path.display())]
    InvalidRecording { path: PathBuf, reason: String },
    #[error("setting `{setting}`: {reason}")]
    Setting {
        setting: &'static str,
        reason: String,
    },
}

type Result<T> = std::result::Result<T, ComtradeError>;

// ---------------------------------------------------------------------------------------------
// Reading
// ---------------------------------------------------------------------------------------------

/// Read a COMTRADE record from a `.cfg` path (the `.dat` beside it, same stem) or a `.cff` path.
pub fn read_comtrade(path: &Path) -> Result<Recording> {
    let extension = path
        .extension()
        .and_then(|e| e.to_str())
        .unwrap_or_default()
        .to_ascii_lowercase();
    match extension.as_str() {
        "cfg" => {
            let dat = sibling_dat(path);
            read_cfg_dat(path, &dat)
        }
        "cff" => read_cff(path),
        _ => Err(ComtradeError::Extension {
            path: path.to_path_buf(),
        }),
    }
}

/// The `.dat` beside a `.cfg`: same stem, extension in the same letter case as the `.cfg`'s
/// (falling back to the other case when only that one exists).
fn sibling_dat(cfg: &Path) -> PathBuf {
    let upper = cfg
        .extension()
        .and_then(|e| e.to_str())
        .is_some_and(|e| e.chars().all(|c| c.is_ascii_uppercase()));
    let (first, second) = if upper {
        ("DAT", "dat")
    } else {
        ("dat", "DAT")
    };
    let preferred = cfg.with_extension(first);
    if preferred.exists() {
        return preferred;
    }
    let other = cfg.with_extension(second);
    if other.exists() {
        other
    } else {
        preferred
    }
}

/// Read a `.cfg` + `.dat` pair given both paths.
pub fn read_cfg_dat(cfg_path: &Path, dat_path: &Path) -> Result<Recording> {
    let cfg_bytes = read_file(cfg_path)?;
    let cfg_text = String::from_utf8_lossy(&cfg_bytes);
    let lines: Vec<&str> = cfg_text.lines().collect();
    let cfg = parse_cfg(cfg_path, &lines, 0)?;
    let dat_bytes = read_file(dat_path)?;
    let data = match cfg.format {
        DataFormat::Ascii => {
            let text = String::from_utf8_lossy(&dat_bytes);
            let lines: Vec<&str> = text.lines().collect();
            parse_ascii_data(dat_path, &cfg, &lines, 0)?
        }
        _ => parse_binary_data(dat_path, &cfg, &dat_bytes, 0)?,
    };
    build_recording(dat_path, cfg, data)
}

fn read_file(path: &Path) -> Result<Vec<u8>> {
    fs::read(path).map_err(|source| ComtradeError::Io {
        action: "read",
        path: path.to_path_buf(),
        source,
    })
}

/// Read a single-file `.cff` record (C37.111-2013): sections headed
/// `--- file type: CFG ---`, `INF`, `HDR` and `DAT <format>[: <byte count>]`.
pub fn read_cff(path: &Path) -> Result<Recording> {
    let bytes = read_file(path)?;
    let container_error = |line: usize, reason: String| ComtradeError::Container {
        path: path.to_path_buf(),
        line,
        reason,
    };
    let mut cfg_section: Option<(usize, Vec<String>)> = None;
    let mut current_is_cfg = false;
    let mut position = 0usize;
    let mut line_number = 0usize;
    while position < bytes.len() {
        let end = bytes[position..]
            .iter()
            .position(|&b| b == b'\n')
            .map_or(bytes.len(), |p| position + p);
        line_number += 1;
        let line = String::from_utf8_lossy(&bytes[position..end]).into_owned();
        let next = (end + 1).min(bytes.len());
        if let Some((file_type, rest)) = parse_cff_header(&line) {
            current_is_cfg = false;
            match file_type.as_str() {
                "CFG" => {
                    cfg_section = Some((line_number, Vec::new()));
                    current_is_cfg = true;
                }
                "INF" | "HDR" => {}
                "DAT" => {
                    let Some((first_cfg_line, cfg_lines)) = cfg_section.take() else {
                        return Err(container_error(
                            line_number,
                            "DAT section before any CFG section".to_string(),
                        ));
                    };
                    let refs: Vec<&str> = cfg_lines.iter().map(String::as_str).collect();
                    let cfg = parse_cfg(path, &refs, first_cfg_line)?;
                    let (format_text, byte_count) = match rest.split_once(':') {
                        Some((f, n)) => (f.trim().to_string(), Some(n.trim().to_string())),
                        None => (rest.trim().to_string(), None),
                    };
                    let Some(section_format) = DataFormat::from_keyword(&format_text) else {
                        return Err(ComtradeError::UnknownFormat {
                            path: path.to_path_buf(),
                            line: line_number,
                            found: format_text,
                        });
                    };
                    if section_format != cfg.format {
                        return Err(container_error(
                            line_number,
                            format!(
                                "DAT section says {}, the CFG section says {}",
                                section_format.keyword(),
                                cfg.format.keyword()
                            ),
                        ));
                    }
                    let data = if section_format == DataFormat::Ascii {
                        let text = String::from_utf8_lossy(&bytes[next..]);
                        // the DAT section runs to the end of the file or to a later header
                        let lines: Vec<&str> = text
                            .lines()
                            .take_while(|l| parse_cff_header(l).is_none())
                            .collect();
                        parse_ascii_data(path, &cfg, &lines, line_number)?
                    } else {
                        let count_text = byte_count.unwrap_or_default();
                        let count: usize =
                            count_text.parse().map_err(|_| ComtradeError::BadField {
                                path: path.to_path_buf(),
                                line: line_number,
                                field: "DAT byte count".to_string(),
                                found: count_text.clone(),
                                expected: "a non-negative integer".to_string(),
                            })?;
                        let available = bytes.len() - next;
                        if count > available {
                            let row = binary_row_bytes(&cfg);
                            return Err(ComtradeError::Truncated {
                                path: path.to_path_buf(),
                                expected: cfg.total_samples,
                                found: available / row,
                                detail: format!(
                                    "the DAT header at line {line_number} announces {count} bytes, \
                                     {available} follow it"
                                ),
                            });
                        }
                        parse_binary_data(path, &cfg, &bytes[next..next + count], next)?
                    };
                    return build_recording(path, cfg, data);
                }
                other => {
                    return Err(container_error(
                        line_number,
                        format!("unknown section type `{other}` (expected CFG, INF, HDR, DAT)"),
                    ))
                }
            }
        } else if current_is_cfg {
            if let Some((_, lines)) = cfg_section.as_mut() {
                lines.push(line.trim_end_matches('\r').to_string());
            }
        }
        position = next;
    }
    Err(container_error(
        line_number,
        "no `--- file type: DAT ... ---` section".to_string(),
    ))
}

/// `--- file type: X rest ---` → (X upper-cased, rest).
fn parse_cff_header(line: &str) -> Option<(String, String)> {
    let trimmed = line.trim();
    let inner = trimmed.strip_prefix("---")?.strip_suffix("---")?.trim();
    let lower = inner.to_ascii_lowercase();
    let body = lower.strip_prefix("file type:")?;
    // keep the original letters of the remainder (format names are matched case-insensitively)
    let body = &inner[inner.len() - body.len()..];
    let body = body.trim();
    let (kind, rest) = body.split_once(char::is_whitespace).unwrap_or((body, ""));
    Some((kind.to_ascii_uppercase(), rest.trim().to_string()))
}

struct AnalogSpec {
    name: String,
    phase: String,
    circuit: String,
    unit: String,
    a: f64,
    b: f64,
    skew_us: f64,
    primary: f64,
    secondary: f64,
    values_are_secondary: bool,
}

struct StatusSpec {
    name: String,
    phase: String,
    circuit: String,
    normal_state: u8,
}

struct Cfg {
    station: String,
    device: String,
    revision: Revision,
    analog: Vec<AnalogSpec>,
    status: Vec<StatusSpec>,
    line_frequency_hz: f64,
    /// (samp in Hz, endsamp) pairs; empty when `nrates = 0`.
    rates: Vec<(f64, u64)>,
    total_samples: usize,
    start: ComtradeTimestamp,
    trigger: ComtradeTimestamp,
    /// Unit of the data-file time stamps: 1e-6 s, or 1e-9 s when a .cfg time has nanoseconds.
    timebase_s: f64,
    timemult: f64,
    format: DataFormat,
    time_code: String,
    local_code: String,
    time_quality: String,
    leap_second: u8,
}

/// Cursor over the lines of a .cfg (or the CFG section of a .cff) with 1-based line numbers
/// counted in the file itself.
struct CfgLines<'a> {
    path: &'a Path,
    lines: &'a [&'a str],
    next: usize,
    line_offset: usize,
}

struct CfgLine {
    number: usize,
    fields: Vec<String>,
}

impl CfgLines<'_> {
    fn next_line(&mut self, what: &str) -> Result<CfgLine> {
        let Some(raw) = self.lines.get(self.next) else {
            return Err(ComtradeError::MissingLine {
                path: self.path.to_path_buf(),
                last_line: self.line_offset + self.next,
                what: what.to_string(),
            });
        };
        self.next += 1;
        Ok(CfgLine {
            number: self.line_offset + self.next,
            fields: split_fields(raw),
        })
    }

    /// The next line if there is one that is not blank (optional trailing lines).
    fn next_optional(&mut self) -> Option<CfgLine> {
        let raw = self.lines.get(self.next)?;
        if clean_line(raw).is_empty() {
            return None;
        }
        self.next += 1;
        Some(CfgLine {
            number: self.line_offset + self.next,
            fields: split_fields(raw),
        })
    }
}

/// A line without its end-of-line characters and without the 0x1A end-of-file marker some
/// platforms append.
fn clean_line(raw: &str) -> &str {
    raw.trim_end_matches(['\r', '\n', '\u{1a}'])
        .trim_start_matches('\u{feff}')
}

fn split_fields(raw: &str) -> Vec<String> {
    clean_line(raw)
        .split(',')
        .map(|f| f.trim().to_string())
        .collect()
}

struct FieldReader<'a> {
    path: &'a Path,
    line: usize,
}

impl FieldReader<'_> {
    fn bad(&self, field: &str, found: &str, expected: &str) -> ComtradeError {
        ComtradeError::BadField {
            path: self.path.to_path_buf(),
            line: self.line,
            field: field.to_string(),
            found: found.to_string(),
            expected: expected.to_string(),
        }
    }

    fn real(&self, field: &str, text: &str) -> Result<f64> {
        match text.trim().parse::<f64>() {
            Ok(v) if v.is_finite() => Ok(v),
            _ => Err(self.bad(field, text, "a finite number")),
        }
    }

    fn real_or(&self, field: &str, text: &str, default: f64) -> Result<f64> {
        if text.trim().is_empty() {
            Ok(default)
        } else {
            self.real(field, text)
        }
    }

    fn count(&self, field: &str, text: &str) -> Result<u64> {
        text.trim()
            .parse::<u64>()
            .map_err(|_| self.bad(field, text, "a non-negative integer"))
    }
}

fn field_count_error(path: &Path, line: &CfgLine, what: &str, expected: &str) -> ComtradeError {
    ComtradeError::FieldCount {
        path: path.to_path_buf(),
        line: line.number,
        what: what.to_string(),
        expected: expected.to_string(),
        found: line.fields.len(),
    }
}

/// Parse a .cfg (C37.111-1999; 2013; 1991 layout where it differs).
/// `line_offset` is the number of file lines before `lines[0]` (non-zero inside a .cff).
fn parse_cfg(path: &Path, lines: &[&str], line_offset: usize) -> Result<Cfg> {
    let mut cursor = CfgLines {
        path,
        lines,
        next: 0,
        line_offset,
    };

    // station_name,rec_dev_id[,rev_year]; no rev_year means 1991
    let line = cursor.next_line("station_name,rec_dev_id,rev_year")?;
    let fr = FieldReader {
        path,
        line: line.number,
    };
    let revision = match line.fields.len() {
        2 => Revision::R1991,
        3 => match line.fields[2].as_str() {
            "" | "1991" => Revision::R1991,
            "1999" => Revision::R1999,
            "2013" => Revision::R2013,
            other => return Err(fr.bad("rev_year", other, "1991, 1999 or 2013")),
        },
        _ => {
            return Err(field_count_error(
                path,
                &line,
                "station_name,rec_dev_id,rev_year",
                "2 or 3",
            ))
        }
    };
    let station = line.fields[0].clone();
    let device = line.fields[1].clone();

    // TT,##A,##D
    let line = cursor.next_line("TT,##A,##D")?;
    if line.fields.len() != 3 {
        return Err(field_count_error(path, &line, "TT,##A,##D", "3"));
    }
    let fr = FieldReader {
        path,
        line: line.number,
    };
    let total = fr.count("TT", &line.fields[0])? as usize;
    let counted = |field: &str, text: &str, suffix: char| -> Result<usize> {
        let digits = text
            .strip_suffix(suffix)
            .or_else(|| text.strip_suffix(suffix.to_ascii_lowercase()))
            .ok_or_else(|| {
                fr.bad(
                    field,
                    text,
                    &format!("a count followed by `{suffix}`, e.g. `3{suffix}`"),
                )
            })?;
        digits.trim().parse::<usize>().map_err(|_| {
            fr.bad(
                field,
                text,
                &format!("a count followed by `{suffix}`, e.g. `3{suffix}`"),
            )
        })
    };
    let analog_count = counted("##A", &line.fields[1], 'A')?;
    let status_count = counted("##D", &line.fields[2], 'D')?;
    if analog_count + status_count != total {
        return Err(ComtradeError::ChannelTotal {
            path: path.to_path_buf(),
            line: line.number,
            total,
            analog: analog_count,
            status: status_count,
        });
    }

    // An,ch_id,ph,ccbm,uu,a,b,skew,min,max[,primary,secondary,PS]
    let mut analog = Vec::with_capacity(analog_count);
    for index in 0..analog_count {
        let what = format!("analog channel {} of {analog_count}", index + 1);
        let line = cursor.next_line(&what)?;
        let fields = &line.fields;
        let full = fields.len() == 13;
        let short_ok = revision == Revision::R1991 && fields.len() == 10;
        if !full && !short_ok {
            let expected = if revision == Revision::R1991 {
                "10 or 13"
            } else {
                "13"
            };
            return Err(field_count_error(
                path,
                &line,
                &format!("{what}: An,ch_id,ph,ccbm,uu,a,b,skew,min,max,primary,secondary,PS"),
                expected,
            ));
        }
        let fr = FieldReader {
            path,
            line: line.number,
        };
        fr.count("An", &fields[0])?;
        let a = fr.real("a", &fields[5])?;
        let b = fr.real_or("b", &fields[6], 0.0)?;
        let skew_us = fr.real_or("skew", &fields[7], 0.0)?;
        fr.real_or("min", &fields[8], 0.0)?;
        fr.real_or("max", &fields[9], 0.0)?;
        let (primary, secondary, values_are_secondary) = if full {
            let primary = fr.real("primary", &fields[10])?;
            let secondary = fr.real("secondary", &fields[11])?;
            let secondary_flag = match fields[12].to_ascii_uppercase().as_str() {
                "P" => false,
                "S" => true,
                _ => return Err(fr.bad("PS", &fields[12], "`P` or `S`")),
            };
            if secondary_flag && (primary == 0.0 || secondary == 0.0) {
                return Err(fr.bad(
                    "primary/secondary",
                    &format!("{primary}/{secondary}"),
                    "two non-zero ratings when PS = S",
                ));
            }
            (primary, secondary, secondary_flag)
        } else {
            (1.0, 1.0, false)
        };
        analog.push(AnalogSpec {
            name: fields[1].clone(),
            phase: fields[2].clone(),
            circuit: fields[3].clone(),
            unit: fields[4].clone(),
            a,
            b,
            skew_us,
            primary,
            secondary,
            values_are_secondary,
        });
    }

    // Dn,ch_id,ph,ccbm,y (1999, 2013) or Dn,ch_id,y (1991, from memory)
    let mut status = Vec::with_capacity(status_count);
    for index in 0..status_count {
        let what = format!("status channel {} of {status_count}", index + 1);
        let line = cursor.next_line(&what)?;
        let fields = &line.fields;
        let (name, phase, circuit, normal) = match fields.len() {
            5 => (&fields[1], fields[2].clone(), fields[3].clone(), &fields[4]),
            3 => (&fields[1], String::new(), String::new(), &fields[2]),
            _ => {
                return Err(field_count_error(
                    path,
                    &line,
                    &format!("{what}: Dn,ch_id,ph,ccbm,y"),
                    "5 (or 3 in 1991 files)",
                ))
            }
        };
        let fr = FieldReader {
            path,
            line: line.number,
        };
        fr.count("Dn", &fields[0])?;
        let normal_state = match normal.as_str() {
            "" | "0" => 0,
            "1" => 1,
            other => return Err(fr.bad("y", other, "0 or 1")),
        };
        status.push(StatusSpec {
            name: name.clone(),
            phase,
            circuit,
            normal_state,
        });
    }

    // lf
    let line = cursor.next_line("line frequency lf")?;
    let line_frequency_hz = FieldReader {
        path,
        line: line.number,
    }
    .real("lf", &line.fields[0])?;

    // nrates, then nrates × samp,endsamp (one `0,endsamp` line when nrates = 0)
    let line = cursor.next_line("nrates")?;
    let fr = FieldReader {
        path,
        line: line.number,
    };
    let nrates = fr.count("nrates", &line.fields[0])? as usize;
    let mut rates = Vec::with_capacity(nrates);
    let mut total_samples = 0u64;
    for index in 0..nrates.max(1) {
        let what = format!(
            "sample rate {} of {}: samp,endsamp",
            index + 1,
            nrates.max(1)
        );
        let line = cursor.next_line(&what)?;
        if line.fields.len() != 2 {
            return Err(field_count_error(path, &line, &what, "2"));
        }
        let fr = FieldReader {
            path,
            line: line.number,
        };
        let samp = fr.real("samp", &line.fields[0])?;
        let endsamp = fr.count("endsamp", &line.fields[1])?;
        if nrates > 0 {
            if samp <= 0.0 {
                return Err(fr.bad("samp", &line.fields[0], "a positive rate in Hz"));
            }
            if endsamp <= total_samples {
                return Err(fr.bad(
                    "endsamp",
                    &line.fields[1],
                    &format!("larger than the previous endsamp {total_samples}"),
                ));
            }
            rates.push((samp, endsamp));
        }
        total_samples = endsamp;
    }

    // start and trigger date/time
    let line = cursor.next_line("date/time of the first data point")?;
    let (start, start_ns) = parse_date_time(path, &line, revision, "first data point")?;
    let line = cursor.next_line("date/time of the trigger point")?;
    let (trigger, trigger_ns) = parse_date_time(path, &line, revision, "trigger point")?;
    let timebase_s = if start_ns || trigger_ns { 1e-9 } else { 1e-6 };

    // ft
    let line = cursor.next_line("data file type ft")?;
    let format =
        DataFormat::from_keyword(&line.fields[0]).ok_or_else(|| ComtradeError::UnknownFormat {
            path: path.to_path_buf(),
            line: line.number,
            found: line.fields.join(","),
        })?;
    if matches!(format, DataFormat::Binary32 | DataFormat::Float32) && revision != Revision::R2013 {
        return Err(ComtradeError::FormatNeedsRevision2013 {
            path: path.to_path_buf(),
            line: line.number,
            format: format.keyword(),
            revision: revision.year(),
        });
    }

    let mut timemult = 1.0;
    let mut time_code = "0".to_string();
    let mut local_code = "0".to_string();
    let mut time_quality = "0".to_string();
    let mut leap_second = 0u8;
    if revision != Revision::R1991 {
        if let Some(line) = cursor.next_optional() {
            let fr = FieldReader {
                path,
                line: line.number,
            };
            timemult = fr.real_or("timemult", &line.fields[0], 1.0)?;
            if timemult <= 0.0 {
                return Err(fr.bad("timemult", &line.fields[0], "a positive number"));
            }
        }
    }
    if revision == Revision::R2013 {
        if let Some(line) = cursor.next_optional() {
            if line.fields.len() != 2 {
                return Err(field_count_error(path, &line, "time_code,local_code", "2"));
            }
            time_code = line.fields[0].clone();
            local_code = line.fields[1].clone();
        }
        if let Some(line) = cursor.next_optional() {
            if line.fields.len() != 2 {
                return Err(field_count_error(path, &line, "tmq_code,leapsec", "2"));
            }
            let fr = FieldReader {
                path,
                line: line.number,
            };
            let tmq = &line.fields[0];
            if tmq.len() != 1 || !tmq.chars().all(|c| c.is_ascii_hexdigit()) {
                return Err(fr.bad("tmq_code", tmq, "one hexadecimal digit"));
            }
            time_quality = tmq.to_ascii_uppercase();
            leap_second = match line.fields[1].as_str() {
                "0" => 0,
                "1" => 1,
                "2" => 2,
                "3" => 3,
                other => return Err(fr.bad("leapsec", other, "0, 1, 2 or 3")),
            };
        }
    }

    Ok(Cfg {
        station,
        device,
        revision,
        analog,
        status,
        line_frequency_hz,
        rates,
        total_samples: total_samples as usize,
        start,
        trigger,
        timebase_s,
        timemult,
        format,
        time_code,
        local_code,
        time_quality,
        leap_second,
    })
}

/// `dd/mm/yyyy,hh:mm:ss.ssssss` (1991: `mm/dd/yy`). Returns the stamp and whether the fraction
/// had more than 6 digits (nanosecond time base, 2013).
fn parse_date_time(
    path: &Path,
    line: &CfgLine,
    revision: Revision,
    what: &str,
) -> Result<(ComtradeTimestamp, bool)> {
    if line.fields.len() != 2 {
        return Err(field_count_error(
            path,
            line,
            &format!("date/time of the {what}: dd/mm/yyyy,hh:mm:ss.ssssss"),
            "2",
        ));
    }
    let fr = FieldReader {
        path,
        line: line.number,
    };
    let date_text = &line.fields[0];
    let date_expected = if revision == Revision::R1991 {
        "a date mm/dd/yy or mm/dd/yyyy"
    } else {
        "a date dd/mm/yyyy"
    };
    let bad_date = || fr.bad("date", date_text, date_expected);
    let parts: Vec<&str> = date_text.split('/').collect();
    if parts.len() != 3 {
        return Err(bad_date());
    }
    let numbers: Vec<i64> = parts
        .iter()
        .map(|p| p.trim().parse::<i64>())
        .collect::<std::result::Result<_, _>>()
        .map_err(|_| bad_date())?;
    let (day, month, mut year) = if revision == Revision::R1991 {
        (numbers[1], numbers[0], numbers[2])
    } else {
        (numbers[0], numbers[1], numbers[2])
    };
    if parts[2].trim().len() <= 2 {
        // two-digit years: pivot at 1970 (common practice)
        year += if year >= 70 { 1900 } else { 2000 };
    }
    let days_in_month = |y: i64, m: i64| -> i64 {
        let next = if m == 12 { (y + 1, 1) } else { (y, m + 1) };
        days_from_civil(next.0, next.1, 1) - days_from_civil(y, m, 1)
    };
    if !(1..=12).contains(&month) || day < 1 || day > days_in_month(year, month) {
        return Err(bad_date());
    }
    if !(0..=9999).contains(&year) {
        return Err(bad_date());
    }

    let time_text = &line.fields[1];
    let bad_time = || fr.bad("time", time_text, "a time hh:mm:ss.ssssss");
    let (clock, fraction) = match time_text.split_once('.') {
        Some((c, f)) => (c, f),
        None => (time_text.as_str(), ""),
    };
    let clock_parts: Vec<&str> = clock.split(':').collect();
    if clock_parts.len() != 3 {
        return Err(bad_time());
    }
    let clock_numbers: Vec<u8> = clock_parts
        .iter()
        .map(|p| p.trim().parse::<u8>())
        .collect::<std::result::Result<_, _>>()
        .map_err(|_| bad_time())?;
    let (hour, minute, second) = (clock_numbers[0], clock_numbers[1], clock_numbers[2]);
    if hour > 23 || minute > 59 || second > 60 {
        return Err(bad_time());
    }
    if fraction.len() > 9 || !fraction.chars().all(|c| c.is_ascii_digit()) {
        return Err(bad_time());
    }
    let nanosecond = if fraction.is_empty() {
        0
    } else {
        let digits: u32 = fraction.parse().map_err(|_| bad_time())?;
        digits * 10u32.pow(9 - fraction.len() as u32)
    };
    Ok((
        ComtradeTimestamp {
            year: year as i32,
            month: month as u8,
            day: day as u8,
            hour,
            minute,
            second,
            nanosecond,
        },
        fraction.len() > 6,
    ))
}

/// Raw data of a .dat before scaling.
struct RawData {
    sample_numbers: Vec<u64>,
    /// Time stamps in time-base units, NaN when missing.
    timestamps: Vec<f64>,
    /// Raw analog values per channel, NaN when missing.
    analog: Vec<Vec<f64>>,
    status: Vec<Vec<u8>>,
    /// Where sample i sits, for error messages.
    locations: SampleLocations,
}

enum SampleLocations {
    /// 1-based line number of each sample.
    Lines(Vec<usize>),
    /// Byte offset of the first sample and bytes per sample.
    Bytes { first: usize, row_bytes: usize },
}

impl SampleLocations {
    fn describe(&self, index: usize) -> String {
        match self {
            SampleLocations::Lines(lines) => format!("line {}", lines[index]),
            SampleLocations::Bytes { first, row_bytes } => {
                format!("sample at byte offset {}", first + index * row_bytes)
            }
        }
    }
}

/// ASCII data file (C37.111-1999): `n,timestamp,A1..Ak,D1..Dm` per line.
/// `line_offset` is the number of file lines before `lines[0]`.
fn parse_ascii_data(path: &Path, cfg: &Cfg, lines: &[&str], line_offset: usize) -> Result<RawData> {
    let analog_count = cfg.analog.len();
    let status_count = cfg.status.len();
    let expected_fields = 2 + analog_count + status_count;
    let samples = cfg.total_samples;
    let mut data = RawData {
        sample_numbers: Vec::with_capacity(samples),
        timestamps: Vec::with_capacity(samples),
        analog: vec![Vec::with_capacity(samples); analog_count],
        status: vec![Vec::with_capacity(samples); status_count],
        locations: SampleLocations::Lines(Vec::with_capacity(samples)),
    };
    let mut line_numbers = Vec::with_capacity(samples);
    let non_blank: Vec<(usize, &str)> = lines
        .iter()
        .enumerate()
        .map(|(i, l)| (line_offset + i + 1, clean_line(l)))
        .filter(|(_, l)| !l.trim().is_empty())
        .collect();
    let last_line = non_blank.last().map_or(line_offset, |(n, _)| *n);
    // 1991 marks a missing value with an empty field; later revisions with 99999
    let missing_is_99999 = cfg.revision != Revision::R1991;
    for (row, &(line_number, text)) in non_blank.iter().enumerate() {
        if row >= samples {
            return Err(ComtradeError::Truncated {
                path: path.to_path_buf(),
                expected: samples,
                found: non_blank.len(),
                detail: format!(
                    "line {line_number} holds sample {} but the .cfg's last endsamp is {samples}; \
                     the data is longer than declared",
                    row + 1
                ),
            });
        }
        let fields: Vec<&str> = text.split(',').map(str::trim).collect();
        if fields.len() != expected_fields {
            if row + 1 == non_blank.len() && fields.len() < expected_fields {
                return Err(ComtradeError::Truncated {
                    path: path.to_path_buf(),
                    expected: samples,
                    found: row,
                    detail: format!(
                        "last line {line_number} has {} of {expected_fields} fields",
                        fields.len()
                    ),
                });
            }
            return Err(ComtradeError::ChannelCountMismatch {
                path: path.to_path_buf(),
                line: line_number,
                expected: expected_fields,
                found: fields.len(),
                analog: analog_count,
                status: status_count,
            });
        }
        let fr = FieldReader {
            path,
            line: line_number,
        };
        let sample_number = fr.count("n (sample number)", fields[0])?;
        let timestamp = if fields[1].is_empty() {
            f64::NAN
        } else {
            fr.real("timestamp", fields[1])?
        };
        for (channel, text) in fields[2..2 + analog_count].iter().enumerate() {
            let raw = if text.is_empty() || (missing_is_99999 && *text == ASCII_MISSING) {
                f64::NAN
            } else {
                fr.real(
                    &format!("A{} ({})", channel + 1, cfg.analog[channel].name),
                    text,
                )?
            };
            data.analog[channel].push(raw);
        }
        for (channel, text) in fields[2 + analog_count..].iter().enumerate() {
            let state = match *text {
                "0" => 0,
                "1" => 1,
                other => {
                    return Err(fr.bad(
                        &format!("D{} ({})", channel + 1, cfg.status[channel].name),
                        other,
                        "0 or 1",
                    ))
                }
            };
            data.status[channel].push(state);
        }
        data.sample_numbers.push(sample_number);
        data.timestamps.push(timestamp);
        line_numbers.push(line_number);
    }
    if data.sample_numbers.len() < samples {
        return Err(ComtradeError::Truncated {
            path: path.to_path_buf(),
            expected: samples,
            found: data.sample_numbers.len(),
            detail: format!("the data ends at line {last_line}"),
        });
    }
    data.locations = SampleLocations::Lines(line_numbers);
    Ok(data)
}

fn binary_row_bytes(cfg: &Cfg) -> usize {
    // n (u32) + timestamp (u32) + analog values + status words of 16 channels each
    8 + cfg.analog.len() * cfg.format.analog_bytes() + 2 * cfg.status.len().div_ceil(16)
}

/// Binary data (C37.111-1999, 2013): little-endian rows of
/// `n: u32, timestamp: u32, analog values, status words (channel k of a word in bit k)`.
/// `file_offset` is the position of `bytes[0]` in the file (for messages).
fn parse_binary_data(path: &Path, cfg: &Cfg, bytes: &[u8], file_offset: usize) -> Result<RawData> {
    let analog_count = cfg.analog.len();
    let status_count = cfg.status.len();
    let row_bytes = binary_row_bytes(cfg);
    let samples = cfg.total_samples;
    let expected = samples * row_bytes;
    if bytes.len() != expected {
        if bytes.len() < expected && bytes.len().is_multiple_of(row_bytes) {
            return Err(ComtradeError::Truncated {
                path: path.to_path_buf(),
                expected: samples,
                found: bytes.len() / row_bytes,
                detail: format!("{} of {expected} bytes", bytes.len()),
            });
        }
        if bytes.len() < expected {
            return Err(ComtradeError::Truncated {
                path: path.to_path_buf(),
                expected: samples,
                found: bytes.len() / row_bytes,
                detail: format!(
                    "{} of {expected} bytes, and {} bytes of a partial sample \
                     (or the .cfg's channel count disagrees with the data)",
                    bytes.len(),
                    bytes.len() % row_bytes
                ),
            });
        }
        return Err(ComtradeError::DataLength {
            path: path.to_path_buf(),
            found: bytes.len(),
            expected,
            samples,
            row_bytes,
            analog: analog_count,
            status: status_count,
        });
    }
    let u32_at =
        |at: usize| u32::from_le_bytes([bytes[at], bytes[at + 1], bytes[at + 2], bytes[at + 3]]);
    let mut data = RawData {
        sample_numbers: Vec::with_capacity(samples),
        timestamps: Vec::with_capacity(samples),
        analog: vec![Vec::with_capacity(samples); analog_count],
        status: vec![Vec::with_capacity(samples); status_count],
        locations: SampleLocations::Bytes {
            first: file_offset,
            row_bytes,
        },
    };
    for row in 0..samples {
        let base = row * row_bytes;
        data.sample_numbers.push(u64::from(u32_at(base)));
        let stamp = u32_at(base + 4);
        data.timestamps.push(if stamp == TIMESTAMP_MISSING {
            f64::NAN
        } else {
            f64::from(stamp)
        });
        let mut at = base + 8;
        for channel in data.analog.iter_mut() {
            let raw = match cfg.format {
                DataFormat::Binary => {
                    let v = i16::from_le_bytes([bytes[at], bytes[at + 1]]);
                    // 0x8000 marks a missing sample from 1999 on (not in 1991, where the whole
                    // int16 range is data as far as we know)
                    if v == INT16_MISSING && cfg.revision != Revision::R1991 {
                        f64::NAN
                    } else {
                        f64::from(v)
                    }
                }
                DataFormat::Binary32 => {
                    let v = u32_at(at) as i32;
                    if v == INT32_MISSING {
                        f64::NAN
                    } else {
                        f64::from(v)
                    }
                }
                DataFormat::Float32 => f64::from(f32::from_bits(u32_at(at))),
                DataFormat::Ascii => unreachable!("ASCII data is parsed as text"),
            };
            channel.push(raw);
            at += cfg.format.analog_bytes();
        }
        for (channel, values) in data.status.iter_mut().enumerate() {
            let word_at = at + 2 * (channel / 16);
            let word = u16::from_le_bytes([bytes[word_at], bytes[word_at + 1]]);
            values.push(((word >> (channel % 16)) & 1) as u8);
        }
    }
    Ok(data)
}

/// Scale the raw data, compute the sample times and assemble the record.
fn build_recording(dat_path: &Path, cfg: Cfg, data: RawData) -> Result<Recording> {
    let samples = data.sample_numbers.len();
    for i in 1..samples {
        if data.sample_numbers[i] <= data.sample_numbers[i - 1] {
            return Err(ComtradeError::SampleNumber {
                path: dat_path.to_path_buf(),
                location: data.locations.describe(i),
                found: data.sample_numbers[i],
                previous: data.sample_numbers[i - 1],
            });
        }
    }

    let mut times_s = Vec::with_capacity(samples);
    if cfg.rates.is_empty() {
        // nrates = 0: the time stamps are critical (C37.111-1999)
        let unit_s = cfg.timebase_s * cfg.timemult;
        for (i, stamp) in data.timestamps.iter().enumerate() {
            if stamp.is_nan() {
                return Err(ComtradeError::MissingTimestamp {
                    path: dat_path.to_path_buf(),
                    location: data.locations.describe(i),
                });
            }
            times_s.push(stamp * unit_s);
        }
    } else {
        // Segment k runs at samp_k from the last sample of segment k−1 (whose time it shares)
        // to sample endsamp_k; sample numbers are 1-based. Samples past the last endsamp
        // continue at the last rate.
        let mut segments = Vec::with_capacity(cfg.rates.len());
        let (mut first_n, mut first_t) = (1u64, 0.0f64);
        for &(samp, endsamp) in &cfg.rates {
            segments.push((samp, endsamp, first_n, first_t));
            first_t += (endsamp - first_n) as f64 / samp;
            first_n = endsamp;
        }
        for &n in &data.sample_numbers {
            let &(samp, _, first_n, first_t) = segments
                .iter()
                .find(|s| n <= s.1)
                .unwrap_or_else(|| segments.last().expect("nrates > 0"));
            times_s.push(first_t + (n as f64 - first_n as f64) / samp);
        }
    }

    let analog = cfg
        .analog
        .into_iter()
        .zip(data.analog)
        .map(|(spec, raw)| {
            // value = a·x + b, C37.111-1999; secondary values are brought to the
            // primary side with the transformer ratio primary/secondary
            let ratio = if spec.values_are_secondary {
                spec.primary / spec.secondary
            } else {
                1.0
            };
            let values = raw
                .into_iter()
                .map(|x| (spec.a * x + spec.b) * ratio)
                .collect();
            AnalogChannel {
                name: spec.name,
                phase: spec.phase,
                circuit: spec.circuit,
                unit: spec.unit,
                skew_s: spec.skew_us * 1e-6,
                primary_ratio: spec.primary,
                secondary_ratio: spec.secondary,
                values,
            }
        })
        .collect();
    let status = cfg
        .status
        .into_iter()
        .zip(data.status)
        .map(|(spec, values)| StatusChannel {
            name: spec.name,
            phase: spec.phase,
            circuit: spec.circuit,
            normal_state: spec.normal_state,
            values,
        })
        .collect();

    Ok(Recording {
        station: cfg.station,
        device: cfg.device,
        revision: cfg.revision,
        analog,
        status,
        times_s,
        start: cfg.start,
        trigger_s: cfg.trigger.seconds_since(&cfg.start),
        nominal_frequency_hz: cfg.line_frequency_hz,
        time_code: cfg.time_code,
        local_code: cfg.local_code,
        time_quality: cfg.time_quality,
        leap_second: cfg.leap_second,
    })
}

// ---------------------------------------------------------------------------------------------
// Writing
// ---------------------------------------------------------------------------------------------

/// What to write: the standard revision and the data format.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ComtradeWriteConfig {
    revision: Revision,
    format: DataFormat,
}

impl ComtradeWriteConfig {
    /// ASCII data in the given revision; 1991 is read but not written.
    pub fn new(revision: Revision) -> Result<Self> {
        if revision == Revision::R1991 {
            return Err(ComtradeError::Setting {
                setting: "revision",
                reason: "writing is supported for revisions 1999 and 2013, not 1991".to_string(),
            });
        }
        Ok(ComtradeWriteConfig {
            revision,
            format: DataFormat::Ascii,
        })
    }

    /// Data format; BINARY32 and FLOAT32 exist only in revision 2013.
    pub fn with_format(mut self, format: DataFormat) -> Result<Self> {
        if matches!(format, DataFormat::Binary32 | DataFormat::Float32)
            && self.revision != Revision::R2013
        {
            return Err(ComtradeError::Setting {
                setting: "format",
                reason: format!(
                    "{} needs revision 2013, this configuration has {}",
                    format.keyword(),
                    self.revision.year()
                ),
            });
        }
        self.format = format;
        Ok(self)
    }

    pub fn revision(&self) -> Revision {
        self.revision
    }

    pub fn format(&self) -> DataFormat {
        self.format
    }
}

/// Write `recording` to `path`: a `.cfg` path writes the `.cfg` and the `.dat` beside it (same
/// stem, same letter case), a `.cff` path one combined file (revision 2013 only). Each file is
/// written to a temporary name in the same directory and renamed when complete; the `.dat` is
/// renamed before the `.cfg`. Returns the paths written.
///
/// Scaling: integer formats store `raw = round((value − b)/a)` with per-channel `b` = middle and
/// `a` = half-range / limit of the finite values (limit 32767 BINARY, 2147483647 BINARY32,
/// 99998 ASCII), so the quantisation error is at most a/2; FLOAT32 stores `value` as f32 with
/// a = 1, b = 0. Values are written as primary values (PS = P). Sample times: uniformly spaced
/// times (within 1e-9 of the step) are written as one sample rate and the start stamp is moved
/// to the first sample; other times are written as `nrates = 0` with time stamps in µs
/// (nanoseconds in 2013 when the start or trigger has sub-µs digits).
pub fn write_comtrade(
    recording: &Recording,
    path: &Path,
    config: &ComtradeWriteConfig,
) -> Result<Vec<PathBuf>> {
    let extension = path
        .extension()
        .and_then(|e| e.to_str())
        .unwrap_or_default();
    let is_cff = match extension.to_ascii_lowercase().as_str() {
        "cfg" => false,
        "cff" => true,
        _ => {
            return Err(ComtradeError::Extension {
                path: path.to_path_buf(),
            })
        }
    };
    if is_cff && config.revision != Revision::R2013 {
        return Err(ComtradeError::InvalidRecording {
            path: path.to_path_buf(),
            reason: format!(
                ".cff files exist from revision 2013 on, the configuration asks for {}",
                config.revision.year()
            ),
        });
    }
    validate_recording(recording, path)?;
    let plan = TimePlan::new(recording, config.revision);
    let encoded: Vec<EncodedChannel> = recording
        .analog
        .iter()
        .map(|c| EncodedChannel::new(&c.values, config.format))
        .collect();
    let cfg_text = cfg_text(recording, config, &plan, &encoded);
    let dat_bytes = dat_bytes(recording, config.format, &plan, &encoded);

    if is_cff {
        let mut bytes = Vec::with_capacity(cfg_text.len() + dat_bytes.len() + 200);
        bytes.extend_from_slice(b"--- file type: CFG ---\r\n");
        bytes.extend_from_slice(cfg_text.as_bytes());
        bytes.extend_from_slice(b"--- file type: INF ---\r\n");
        bytes.extend_from_slice(b"--- file type: HDR ---\r\n");
        let header = if config.format == DataFormat::Ascii {
            "--- file type: DAT ASCII ---\r\n".to_string()
        } else {
            format!(
                "--- file type: DAT {}: {} ---\r\n",
                config.format.keyword(),
                dat_bytes.len()
            )
        };
        bytes.extend_from_slice(header.as_bytes());
        bytes.extend_from_slice(&dat_bytes);
        write_atomically(path, &bytes)?;
        Ok(vec![path.to_path_buf()])
    } else {
        let upper = extension.chars().all(|c| c.is_ascii_uppercase());
        let dat_path = path.with_extension(if upper { "DAT" } else { "dat" });
        write_atomically(&dat_path, &dat_bytes)?;
        write_atomically(path, cfg_text.as_bytes())?;
        Ok(vec![path.to_path_buf(), dat_path])
    }
}

fn validate_recording(recording: &Recording, path: &Path) -> Result<()> {
    let invalid = |reason: String| ComtradeError::InvalidRecording {
        path: path.to_path_buf(),
        reason,
    };
    let samples = recording.times_s.len();
    if samples == 0 {
        return Err(invalid("the recording has no samples".to_string()));
    }
    if samples > u32::MAX as usize - 1 {
        return Err(invalid(format!(
            "{samples} samples do not fit the 32-bit sample number"
        )));
    }
    if let Some(i) = (1..samples).find(|&i| {
        recording.times_s[i] <= recording.times_s[i - 1] || !recording.times_s[i].is_finite()
    }) {
        return Err(invalid(format!(
            "times_s must increase strictly: sample {i} at {} s follows {} s",
            recording.times_s[i],
            recording.times_s[i - 1]
        )));
    }
    if !recording.times_s[0].is_finite() {
        return Err(invalid("times_s[0] is not finite".to_string()));
    }
    if !(recording.nominal_frequency_hz.is_finite() && recording.nominal_frequency_hz > 0.0) {
        return Err(invalid(format!(
            "nominal_frequency_hz = {} is not a positive frequency",
            recording.nominal_frequency_hz
        )));
    }
    let check_text = |what: &str, text: &str| -> Result<()> {
        if text.contains([',', '\r', '\n']) {
            Err(invalid(format!(
                "{what} `{text}` contains a comma or line break, which COMTRADE text fields cannot hold"
            )))
        } else {
            Ok(())
        }
    };
    check_text("station", &recording.station)?;
    check_text("device", &recording.device)?;
    check_text("time_code", &recording.time_code)?;
    check_text("local_code", &recording.local_code)?;
    for channel in &recording.analog {
        for (what, text) in [
            ("analog channel name", &channel.name),
            ("phase", &channel.phase),
            ("circuit", &channel.circuit),
            ("unit", &channel.unit),
        ] {
            check_text(what, text)?;
        }
        if channel.values.len() != samples {
            return Err(invalid(format!(
                "analog channel `{}` has {} values, times_s has {samples}",
                channel.name,
                channel.values.len()
            )));
        }
        if let Some(v) = channel.values.iter().find(|v| v.is_infinite()) {
            return Err(invalid(format!(
                "analog channel `{}` holds {v}; only finite values or NaN (missing) can be written",
                channel.name
            )));
        }
        if !(channel.skew_s.is_finite()
            && channel.primary_ratio.is_finite()
            && channel.secondary_ratio.is_finite())
        {
            return Err(invalid(format!(
                "analog channel `{}`: skew_s, primary_ratio and secondary_ratio must be finite",
                channel.name
            )));
        }
    }
    for channel in &recording.status {
        for (what, text) in [
            ("status channel name", &channel.name),
            ("phase", &channel.phase),
            ("circuit", &channel.circuit),
        ] {
            check_text(what, text)?;
        }
        if channel.values.len() != samples {
            return Err(invalid(format!(
                "status channel `{}` has {} values, times_s has {samples}",
                channel.name,
                channel.values.len()
            )));
        }
        if channel.normal_state > 1 || channel.values.iter().any(|&v| v > 1) {
            return Err(invalid(format!(
                "status channel `{}` holds a state other than 0 or 1",
                channel.name
            )));
        }
    }
    if recording.time_quality.len() != 1
        || !recording
            .time_quality
            .chars()
            .all(|c| c.is_ascii_hexdigit())
    {
        return Err(invalid(format!(
            "time_quality `{}` is not one hexadecimal digit",
            recording.time_quality
        )));
    }
    if recording.leap_second > 3 {
        return Err(invalid(format!(
            "leap_second = {} is not 0..=3",
            recording.leap_second
        )));
    }
    Ok(())
}

/// How sample times go into the files.
struct TimePlan {
    /// Sample rate in Hz when the times are uniform; None → nrates = 0 with critical stamps.
    rate_hz: Option<f64>,
    start: ComtradeTimestamp,
    trigger: ComtradeTimestamp,
    nanosecond_stamps: bool,
    timemult: f64,
    /// Data-file time stamp of each sample, in units of time base × timemult.
    stamps: Vec<u32>,
}

impl TimePlan {
    fn new(recording: &Recording, revision: Revision) -> Self {
        let times = &recording.times_s;
        let n = times.len();
        let t0 = times[0];
        let step = if n > 1 {
            (times[n - 1] - t0) / (n - 1) as f64
        } else {
            0.0
        };
        let uniform = n > 1
            && times
                .iter()
                .enumerate()
                .all(|(i, t)| (t - (t0 + i as f64 * step)).abs() <= 1e-9 * step);
        let rate_hz = uniform.then(|| {
            let rate = 1.0 / step;
            // prefer a short decimal (1000 rather than 999.9999999999999) when it is as good
            let rounded = (rate * 1e6).round() / 1e6;
            if (rounded - rate).abs() <= 1e-9 * rate {
                rounded
            } else {
                rate
            }
        });
        // the start stamp is the first data point's date/time; with a rate the first sample is
        // at that instant, so move the stamp there
        let (start, shift) = if uniform {
            (recording.start.plus_seconds(t0), t0)
        } else {
            (recording.start, 0.0)
        };
        let trigger = recording.start.plus_seconds(recording.trigger_s);
        let nanosecond_stamps = revision == Revision::R2013
            && (!start.nanosecond.is_multiple_of(1000) || !trigger.nanosecond.is_multiple_of(1000));
        let timebase_s = if nanosecond_stamps { 1e-9 } else { 1e-6 };
        let span_units = (times[n - 1] - shift).abs() / timebase_s;
        let limit = f64::from(u32::MAX - 1);
        let timemult = if span_units > limit {
            (span_units / limit).ceil()
        } else {
            1.0
        };
        let stamps = times
            .iter()
            .map(|t| {
                ((t - shift) / (timebase_s * timemult))
                    .round()
                    .clamp(0.0, limit) as u32
            })
            .collect();
        TimePlan {
            rate_hz,
            start,
            trigger,
            nanosecond_stamps,
            timemult,
            stamps,
        }
    }
}

/// One analog channel turned into raw values with its scaling.
struct EncodedChannel {
    a: f64,
    b: f64,
    /// Raw integer values (integer formats), None where missing.
    integers: Vec<Option<i64>>,
    /// Raw float values (FLOAT32), NaN where missing.
    floats: Vec<f32>,
    raw_min: f64,
    raw_max: f64,
}

impl EncodedChannel {
    fn new(values: &[f64], format: DataFormat) -> Self {
        if format == DataFormat::Float32 {
            let floats: Vec<f32> = values.iter().map(|&v| v as f32).collect();
            let (raw_min, raw_max) = finite_range(floats.iter().map(|&v| f64::from(v)));
            return EncodedChannel {
                a: 1.0,
                b: 0.0,
                integers: Vec::new(),
                floats,
                raw_min,
                raw_max,
            };
        }
        let limit = match format {
            DataFormat::Ascii => ASCII_RAW_LIMIT,
            DataFormat::Binary => f64::from(i16::MAX),
            DataFormat::Binary32 => f64::from(i32::MAX),
            DataFormat::Float32 => unreachable!("handled above"),
        };
        let (low, high) = finite_range(values.iter().copied());
        let b = 0.5 * (low + high);
        let half_range = 0.5 * (high - low);
        let a = if half_range > 0.0 {
            half_range / limit
        } else {
            1.0
        };
        let integers: Vec<Option<i64>> = values
            .iter()
            .map(|&v| {
                v.is_finite()
                    .then(|| ((v - b) / a).round().clamp(-limit, limit) as i64)
            })
            .collect();
        let (raw_min, raw_max) = finite_range(integers.iter().flatten().map(|&r| r as f64));
        EncodedChannel {
            a,
            b,
            integers,
            floats: Vec::new(),
            raw_min,
            raw_max,
        }
    }
}

/// (min, max) of the finite values, (0, 0) when there are none.
fn finite_range(values: impl Iterator<Item = f64>) -> (f64, f64) {
    let (low, high) = values
        .filter(|v| v.is_finite())
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), v| {
            (lo.min(v), hi.max(v))
        });
    if low.is_finite() {
        (low, high)
    } else {
        (0.0, 0.0)
    }
}

/// A real number for a .cfg field: shortest round-trip decimal, scientific notation when the
/// plain form would exceed the 32-character field length of C37.111-1999.
fn real_text(value: f64) -> String {
    let plain = format!("{value}");
    if plain.len() <= 32 {
        plain
    } else {
        format!("{value:e}")
    }
}

fn date_time_text(stamp: &ComtradeTimestamp, nanoseconds: bool) -> String {
    let fraction = if nanoseconds {
        format!("{:09}", stamp.nanosecond)
    } else {
        format!("{:06}", stamp.nanosecond / 1000)
    };
    format!(
        "{:02}/{:02}/{:04},{:02}:{:02}:{:02}.{fraction}",
        stamp.day, stamp.month, stamp.year, stamp.hour, stamp.minute, stamp.second
    )
}

fn cfg_text(
    recording: &Recording,
    config: &ComtradeWriteConfig,
    plan: &TimePlan,
    encoded: &[EncodedChannel],
) -> String {
    let mut text = String::new();
    let mut line = |s: String| {
        text.push_str(&s);
        text.push_str("\r\n");
    };
    let analog_count = recording.analog.len();
    let status_count = recording.status.len();
    line(format!(
        "{},{},{}",
        recording.station,
        recording.device,
        config.revision.year()
    ));
    line(format!(
        "{},{analog_count}A,{status_count}D",
        analog_count + status_count
    ));
    for (index, (channel, enc)) in recording.analog.iter().zip(encoded).enumerate() {
        let integer_format = config.format != DataFormat::Float32;
        let range = |v: f64| {
            if integer_format {
                format!("{}", v as i64)
            } else {
                real_text(v)
            }
        };
        line(format!(
            "{},{},{},{},{},{},{},{},{},{},{},{},P",
            index + 1,
            channel.name,
            channel.phase,
            channel.circuit,
            channel.unit,
            real_text(enc.a),
            real_text(enc.b),
            real_text(channel.skew_s * 1e6),
            range(enc.raw_min),
            range(enc.raw_max),
            real_text(channel.primary_ratio),
            real_text(channel.secondary_ratio),
        ));
    }
    for (index, channel) in recording.status.iter().enumerate() {
        line(format!(
            "{},{},{},{},{}",
            index + 1,
            channel.name,
            channel.phase,
            channel.circuit,
            channel.normal_state
        ));
    }
    line(real_text(recording.nominal_frequency_hz));
    let samples = recording.times_s.len();
    match plan.rate_hz {
        Some(rate) => {
            line("1".to_string());
            line(format!("{},{samples}", real_text(rate)));
        }
        None => {
            line("0".to_string());
            line(format!("0,{samples}"));
        }
    }
    line(date_time_text(&plan.start, plan.nanosecond_stamps));
    line(date_time_text(&plan.trigger, plan.nanosecond_stamps));
    line(config.format.keyword().to_string());
    line(real_text(plan.timemult));
    if config.revision == Revision::R2013 {
        line(format!("{},{}", recording.time_code, recording.local_code));
        line(format!(
            "{},{}",
            recording.time_quality, recording.leap_second
        ));
    }
    text
}

fn dat_bytes(
    recording: &Recording,
    format: DataFormat,
    plan: &TimePlan,
    encoded: &[EncodedChannel],
) -> Vec<u8> {
    let samples = recording.times_s.len();
    let status_words = recording.status.len().div_ceil(16);
    if format == DataFormat::Ascii {
        let mut text = String::with_capacity(samples * (12 + 8 * encoded.len()));
        for i in 0..samples {
            let _ = write!(text, "{},{}", i + 1, plan.stamps[i]);
            for channel in encoded {
                match channel.integers[i] {
                    Some(raw) => {
                        let _ = write!(text, ",{raw}");
                    }
                    None => {
                        let _ = write!(text, ",{ASCII_MISSING}");
                    }
                }
            }
            for channel in &recording.status {
                let _ = write!(text, ",{}", channel.values[i]);
            }
            text.push_str("\r\n");
        }
        return text.into_bytes();
    }
    let row_bytes = 8 + encoded.len() * format.analog_bytes() + 2 * status_words;
    let mut bytes = Vec::with_capacity(samples * row_bytes);
    for i in 0..samples {
        bytes.extend_from_slice(&(i as u32 + 1).to_le_bytes());
        bytes.extend_from_slice(&plan.stamps[i].to_le_bytes());
        for channel in encoded {
            match format {
                DataFormat::Binary => {
                    let raw = channel.integers[i].map_or(INT16_MISSING, |r| r as i16);
                    bytes.extend_from_slice(&raw.to_le_bytes());
                }
                DataFormat::Binary32 => {
                    let raw = channel.integers[i].map_or(INT32_MISSING, |r| r as i32);
                    bytes.extend_from_slice(&raw.to_le_bytes());
                }
                DataFormat::Float32 => {
                    bytes.extend_from_slice(&channel.floats[i].to_le_bytes());
                }
                DataFormat::Ascii => unreachable!("written as text above"),
            }
        }
        for word in 0..status_words {
            let mut bits = 0u16;
            for (k, channel) in recording.status.iter().skip(16 * word).take(16).enumerate() {
                bits |= u16::from(channel.values[i]) << k;
            }
            bytes.extend_from_slice(&bits.to_le_bytes());
        }
    }
    bytes
}

/// Write `bytes` to a temporary file beside `path`, flush it to disk, then rename it over
/// `path`, so a reader never sees a half-written file.
fn write_atomically(path: &Path, bytes: &[u8]) -> Result<()> {
    let io_error = |action: &'static str, at: &Path| {
        let at = at.to_path_buf();
        move |source| ComtradeError::Io {
            action,
            path: at,
            source,
        }
    };
    let directory = match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    };
    let file_name = path
        .file_name()
        .ok_or_else(|| ComtradeError::Extension {
            path: path.to_path_buf(),
        })?
        .to_string_lossy()
        .into_owned();
    let temporary = directory.join(format!(".{file_name}.{}.partial", std::process::id()));
    let result = (|| {
        let mut file = fs::File::create(&temporary).map_err(io_error("create", &temporary))?;
        file.write_all(bytes)
            .map_err(io_error("write", &temporary))?;
        file.sync_all().map_err(io_error("flush", &temporary))?;
        drop(file);
        fs::rename(&temporary, path).map_err(io_error("rename into place", path))
    })();
    if result.is_err() {
        let _ = fs::remove_file(&temporary);
    }
    result
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn calendar_round_trip_and_known_day_counts() {
        // 2000-03-01 is day 11017 after 1970-01-01 (from memory; 30 years × 365 + 7 leap days
        // + 59 days of Jan–Feb 2000 + 1 leap day)
        assert_eq!(days_from_civil(2000, 3, 1), 11_017);
        assert_eq!(days_from_civil(1970, 1, 1), 0);
        for days in [
            -800_000i64,
            -1,
            0,
            59,
            60,
            11_016,
            11_017,
            20_000,
            2_932_896,
        ] {
            let (y, m, d) = civil_from_days(days);
            assert_eq!(days_from_civil(y, m, d), days);
        }
    }

    #[test]
    fn timestamp_shift_crosses_midnight_and_years() {
        let start = ComtradeTimestamp {
            year: 2023,
            month: 12,
            day: 31,
            hour: 23,
            minute: 59,
            second: 59,
            nanosecond: 999_000_000,
        };
        let later = start.plus_seconds(0.0015);
        assert_eq!(
            later,
            ComtradeTimestamp {
                year: 2024,
                month: 1,
                day: 1,
                hour: 0,
                minute: 0,
                second: 0,
                nanosecond: 500_000,
            }
        );
        assert!((later.seconds_since(&start) - 0.0015).abs() < 1e-12);
    }

    #[test]
    fn cff_header_parsing() {
        assert_eq!(
            parse_cff_header("--- file type: DAT BINARY: 128 ---\r"),
            Some(("DAT".to_string(), "BINARY: 128".to_string()))
        );
        assert_eq!(
            parse_cff_header("--- File Type: cfg ---"),
            Some(("CFG".to_string(), String::new()))
        );
        assert_eq!(parse_cff_header("1,2,3"), None);
    }

    #[test]
    fn integer_encoding_error_is_at_most_half_a_step() {
        let values: Vec<f64> = (0..200)
            .map(|i| (i as f64 * 0.37).sin() * 311.0 + 4.0)
            .collect();
        for format in [DataFormat::Ascii, DataFormat::Binary, DataFormat::Binary32] {
            let enc = EncodedChannel::new(&values, format);
            for (v, raw) in values.iter().zip(&enc.integers) {
                let back = enc.a * raw.unwrap() as f64 + enc.b;
                assert!((back - v).abs() <= 0.5 * enc.a * (1.0 + 1e-9), "{format:?}");
            }
        }
    }

    #[test]
    fn uniform_times_not_starting_at_zero_move_the_start_stamp() {
        let times: Vec<f64> = (0..8).map(|i| 0.5 + i as f64 * 0.01).collect();
        let mut rec = Recording::new("S", "D", 60.0, times);
        rec.analog.push(AnalogChannel::new(
            "X",
            "A",
            (0..8).map(f64::from).collect(),
        ));
        rec.trigger_s = 0.53;
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("shifted.cfg");
        let config = ComtradeWriteConfig::new(Revision::R2013)
            .unwrap()
            .with_format(DataFormat::Float32)
            .unwrap();
        write_comtrade(&rec, &path, &config).unwrap();
        let back = read_comtrade(&path).unwrap();
        assert_eq!(back.start, ComtradeTimestamp::EPOCH.plus_seconds(0.5));
        assert!((back.trigger_s - 0.03).abs() < 1e-9, "{}", back.trigger_s);
        for (i, t) in back.times_s.iter().enumerate() {
            assert!((t - i as f64 * 0.01).abs() < 1e-12);
        }
        assert_eq!(back.analog[0].values, rec.analog[0].values);
    }

    #[test]
    fn write_config_rejects_32_bit_formats_before_2013() {
        let config = ComtradeWriteConfig::new(Revision::R1999).unwrap();
        let err = config.with_format(DataFormat::Float32).unwrap_err();
        assert!(err.to_string().contains("`format`"), "{err}");
        assert!(ComtradeWriteConfig::new(Revision::R1991).is_err());
    }
}

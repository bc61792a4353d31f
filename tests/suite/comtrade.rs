//! COMTRADE read/write (IEEE Std C37.111-1999/2013) and phasor extraction on recordings.
//!
//! External checks: the PyPI `comtrade` package (`comtrade.Comtrade().load(cfg, dat)`) reads
//! every file our writer makes, through `tests/reference/comtrade_read.py`.

use std::f64::consts::PI;
use std::path::{Path, PathBuf};

use nalgebra::Complex;
use understudy::signal::comtrade::{
    read_comtrade, write_comtrade, AnalogChannel, ComtradeError, ComtradeTimestamp,
    ComtradeWriteConfig, DataFormat, Recording, Revision, StatusChannel,
};
use understudy::signal::phasor::{
    resample_linear, sequence_phasors, uniform_grid, PhasorEstimator, SequenceComponents,
};

use crate::common;

// The worked example: value = a·x + b (IEEE Std C37.111-1999 scaling rule); raw values and
// expected results are common practice, computed by hand: 0.01·100 + 0.5 = 1.5, etc.
const EXAMPLE_CFG: &str = "TEST_STATION,SIMDEV,1999\r
3,2A,1D\r
1,VA,A,BUS1,V,0.01,0.5,0,-99999,99998,1,1,P\r
2,IA,A,BUS1,A,0.002,0,0,-99999,99998,1,1,P\r
1,TRIP,,BRK1,0\r
50\r
1\r
1000,4\r
17/03/2024,10:15:00.000000\r
17/03/2024,10:15:00.002000\r
ASCII\r
1\r
";

const EXAMPLE_DAT: &str = "1,0,100,-500,0\r
2,1000,200,-250,0\r
3,2000,300,0,1\r
4,3000,99999,250,1\r
";

fn write_pair(dir: &Path, stem: &str, cfg: &str, dat: &[u8]) -> PathBuf {
    let cfg_path = dir.join(format!("{stem}.cfg"));
    std::fs::write(&cfg_path, cfg).unwrap();
    std::fs::write(dir.join(format!("{stem}.dat")), dat).unwrap();
    cfg_path
}

/// Read files with the reference reader, one Python run for all (each run costs seconds).
fn reference_read(paths: &[PathBuf]) -> Option<Vec<serde_json::Value>> {
    let paths: Vec<&str> = paths.iter().map(|p| p.to_str().unwrap()).collect();
    let answer = common::run_reference("comtrade_read.py", &serde_json::json!({ "paths": paths }))?;
    Some(answer["records"].as_array().unwrap().clone())
}

fn json_f64s(value: &serde_json::Value) -> Vec<f64> {
    value
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_f64().unwrap_or(f64::NAN))
        .collect()
}

#[test]
fn worked_example_1999_ascii_scales_and_marks_missing() {
    let dir = tempfile::tempdir().unwrap();
    let cfg = write_pair(dir.path(), "example", EXAMPLE_CFG, EXAMPLE_DAT.as_bytes());
    let rec = read_comtrade(&cfg).unwrap();

    assert_eq!(rec.station, "TEST_STATION");
    assert_eq!(rec.device, "SIMDEV");
    assert_eq!(rec.revision, Revision::R1999);
    assert_eq!(rec.nominal_frequency_hz, 50.0);
    let va = &rec.analog_channel("VA").unwrap().values;
    let ia = &rec.analog_channel("IA").unwrap().values;
    // VA = 0.01·x + 0.5, IA = 0.002·x (C37.111-1999 scaling value = a·x + b)
    for (got, want) in va[..3].iter().zip([1.5, 2.5, 3.5]) {
        assert!((got - want).abs() < 1e-12, "VA {got} vs {want}");
    }
    assert!(va[3].is_nan(), "99999 marks a missing ASCII sample");
    for (got, want) in ia.iter().zip([-1.0, -0.5, 0.0, 0.5]) {
        assert!((got - want).abs() < 1e-12, "IA {got} vs {want}");
    }
    for (got, want) in rec.times_s.iter().zip([0.0, 0.001, 0.002, 0.003]) {
        assert!((got - want).abs() < 1e-12, "time {got} vs {want}");
    }
    assert!((rec.trigger_s - 0.002).abs() < 1e-12);
    assert_eq!(rec.status_channel("TRIP").unwrap().values, vec![0, 0, 1, 1]);
    assert_eq!(rec.analog[0].phase, "A");
    assert_eq!(rec.analog[0].unit, "V");
    assert_eq!(rec.status[0].circuit, "BRK1");

    // the same file through the reference reader (PyPI comtrade)
    if let Some(records) = reference_read(&[cfg]) {
        let r = &records[0];
        let py_va = json_f64s(&r["analog"][0]);
        assert!(py_va[3].is_nan());
        for (got, want) in va[..3].iter().zip(&py_va[..3]) {
            assert!((got - want).abs() < 1e-12);
        }
        for (got, want) in ia.iter().zip(json_f64s(&r["analog"][1])) {
            assert!((got - want).abs() < 1e-12);
        }
        assert!((r["trigger_time"].as_f64().unwrap() - rec.trigger_s).abs() < 1e-9);
    }
}

#[test]
fn secondary_values_are_brought_to_the_primary_side() {
    // PS = S: the scaled value is secondary; primary = secondary · primary/secondary
    // (C37.111-1999 primary/secondary fields; 132000/110 is a common practice VT ratio)
    let cfg = EXAMPLE_CFG.replace(
        "1,VA,A,BUS1,V,0.01,0.5,0,-99999,99998,1,1,P",
        "1,VA,A,BUS1,V,0.01,0.5,0,-99999,99998,132000,110,S",
    );
    let dir = tempfile::tempdir().unwrap();
    let path = write_pair(dir.path(), "secondary", &cfg, EXAMPLE_DAT.as_bytes());
    let rec = read_comtrade(&path).unwrap();
    let va = &rec.analog[0].values;
    assert!((va[0] - 1.5 * 1200.0).abs() < 1e-9, "{}", va[0]);
    assert_eq!(rec.analog[0].primary_ratio, 132000.0);
    assert_eq!(rec.analog[0].secondary_ratio, 110.0);
}

/// A record that exercises the writer: three phase voltages with a missing sample, a constant
/// channel, an all-missing channel and 18 status channels (two 16-bit status words).
fn sample_recording(times_s: Vec<f64>) -> Recording {
    let n = times_s.len();
    let mut rec = Recording::new("UNIT_7", "RECORDER-2", 50.0, times_s.clone());
    rec.start = ComtradeTimestamp {
        year: 2025,
        month: 6,
        day: 30,
        hour: 23,
        minute: 59,
        second: 59,
        nanosecond: 990_000_000,
    };
    rec.trigger_s = 0.0125;
    for (k, phase) in ["A", "B", "C"].iter().enumerate() {
        let values: Vec<f64> = times_s
            .iter()
            .enumerate()
            .map(|(i, t)| {
                if k == 1 && i == 7 {
                    f64::NAN
                } else {
                    93.9 * (2.0 * PI * 50.0 * t - 2.0 * PI * k as f64 / 3.0).cos() + 0.3
                }
            })
            .collect();
        let mut channel = AnalogChannel::new(format!("V{phase}"), "kV", values);
        channel.phase = phase.to_string();
        channel.circuit = "LINE1".to_string();
        channel.primary_ratio = 132_000.0;
        channel.secondary_ratio = 110.0;
        rec.analog.push(channel);
    }
    rec.analog
        .push(AnalogChannel::new("DCLINK", "V", vec![1050.0; n]));
    rec.analog
        .push(AnalogChannel::new("LOST", "A", vec![f64::NAN; n]));
    for s in 0..18 {
        let values = (0..n).map(|i| u8::from((i + s) % 5 < 2)).collect();
        let mut channel = StatusChannel::new(format!("S{s:02}"), values);
        channel.normal_state = u8::from(s % 2 == 1);
        rec.status.push(channel);
    }
    rec
}

/// Largest writer quantisation error for a channel: half a raw step (see write_comtrade docs).
fn quantisation_bound(values: &[f64], format: DataFormat) -> f64 {
    let finite: Vec<f64> = values.iter().copied().filter(|v| v.is_finite()).collect();
    if finite.is_empty() {
        return 0.0;
    }
    let low = finite.iter().copied().fold(f64::INFINITY, f64::min);
    let high = finite.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let half_range = 0.5 * (high - low);
    match format {
        DataFormat::Ascii => 0.5 * half_range / 99_998.0 + 1e-12,
        DataFormat::Binary => 0.5 * half_range / 32_767.0 + 1e-12,
        DataFormat::Binary32 => 0.5 * half_range / 2_147_483_647.0 + 1e-12,
        // f32 rounding: half an ulp, relative 2^-24
        DataFormat::Float32 => high.abs().max(low.abs()) * 6.0e-8,
    }
}

/// Our reader on a file our writer made: the original within the quantisation bound.
fn check_round_trip(original: &Recording, path: &Path, format: DataFormat, revision: Revision) {
    let label = format!("{} {:?}", path.display(), format);
    let back = read_comtrade(path).unwrap_or_else(|e| panic!("{label}: {e}"));
    assert_eq!(back.revision, revision, "{label}");
    assert_eq!(back.station, original.station);
    assert_eq!(back.device, original.device);
    assert_eq!(back.times_s.len(), original.times_s.len());
    for (got, want) in back.times_s.iter().zip(&original.times_s) {
        // uniform times are written as a rate; non-uniform as µs time stamps (writer docs)
        assert!((got - want).abs() <= 5e-7, "{label}: time {got} vs {want}");
    }
    assert!(
        (back.trigger_s - original.trigger_s).abs() < 1e-6,
        "{label}"
    );
    assert_eq!(back.start, original.start, "{label}");
    for (b, o) in back.analog.iter().zip(&original.analog) {
        assert_eq!(b.name, o.name);
        assert_eq!(b.phase, o.phase);
        assert_eq!(b.circuit, o.circuit);
        assert_eq!(b.unit, o.unit);
        assert_eq!(b.primary_ratio, o.primary_ratio);
        assert_eq!(b.secondary_ratio, o.secondary_ratio);
        let bound = quantisation_bound(&o.values, format);
        for (i, (got, want)) in b.values.iter().zip(&o.values).enumerate() {
            if want.is_nan() {
                assert!(
                    got.is_nan(),
                    "{label} {} sample {i}: {got} not missing",
                    o.name
                );
            } else {
                assert!(
                    (got - want).abs() <= bound,
                    "{label} {} sample {i}: {got} vs {want} (bound {bound})",
                    o.name
                );
            }
        }
    }
    assert_eq!(back.status, original.status, "{label}");
}

/// The reference reader (PyPI comtrade) must read the very same numbers from the file as ours.
fn check_reference(path: &Path, r: &serde_json::Value, format: DataFormat, revision: Revision) {
    let label = format!("{} {:?} (reference reader)", path.display(), format);
    let back = read_comtrade(path).unwrap();
    assert_eq!(r["station"], back.station.as_str(), "{label}");
    assert_eq!(r["device"], back.device.as_str(), "{label}");
    assert_eq!(r["rev_year"], revision.year(), "{label}");
    assert_eq!(r["ft"], format.keyword(), "{label}");
    assert_eq!(r["total_samples"], back.times_s.len(), "{label}");
    assert!((r["frequency"].as_f64().unwrap() - back.nominal_frequency_hz).abs() < 1e-12);
    let names: Vec<&str> = back.analog.iter().map(|c| c.name.as_str()).collect();
    assert_eq!(r["analog_ids"], serde_json::json!(names), "{label}");
    let phases: Vec<&str> = back.analog.iter().map(|c| c.phase.as_str()).collect();
    assert_eq!(r["analog_phases"], serde_json::json!(phases), "{label}");
    let units: Vec<&str> = back.analog.iter().map(|c| c.unit.as_str()).collect();
    assert_eq!(r["analog_units"], serde_json::json!(units), "{label}");
    let status_names: Vec<&str> = back.status.iter().map(|c| c.name.as_str()).collect();
    assert_eq!(r["status_ids"], serde_json::json!(status_names), "{label}");
    for (t_ours, t_ref) in back.times_s.iter().zip(json_f64s(&r["time"])) {
        assert!(
            (t_ours - t_ref).abs() <= 1e-12,
            "{label}: time {t_ours} vs {t_ref}"
        );
    }
    assert!(
        (r["trigger_time"].as_f64().unwrap() - back.trigger_s).abs() <= 1e-6,
        "{label}: trigger"
    );
    for (channel, py) in back.analog.iter().zip(r["analog"].as_array().unwrap()) {
        // written as primary values (PS = P), so the package's a·x + b is our value
        for (ours, theirs) in channel.values.iter().zip(json_f64s(py)) {
            if ours.is_nan() {
                assert!(
                    theirs.is_nan(),
                    "{label} {}: missing vs {theirs}",
                    channel.name
                );
            } else {
                assert!(
                    (ours - theirs).abs() <= 1e-12 * ours.abs().max(1.0),
                    "{label} {}: {ours} vs {theirs}",
                    channel.name
                );
            }
        }
    }
    for (channel, py) in back.status.iter().zip(r["status"].as_array().unwrap()) {
        let theirs: Vec<u8> = py
            .as_array()
            .unwrap()
            .iter()
            .map(|v| v.as_u64().unwrap() as u8)
            .collect();
        assert_eq!(channel.values, theirs, "{label} {}", channel.name);
    }
}

#[test]
fn written_files_read_back_identically_here_and_in_the_reference_reader() {
    let dir = tempfile::tempdir().unwrap();
    // 1.2 cycles at 4 kHz: uniform times, written as one sample rate
    let uniform: Vec<f64> = (0..97).map(|i| i as f64 / 4000.0).collect();
    let rec = sample_recording(uniform);
    let cases = [
        (Revision::R1999, DataFormat::Ascii, "cfg"),
        (Revision::R1999, DataFormat::Binary, "cfg"),
        (Revision::R2013, DataFormat::Ascii, "cfg"),
        (Revision::R2013, DataFormat::Binary, "cfg"),
        (Revision::R2013, DataFormat::Binary32, "cfg"),
        (Revision::R2013, DataFormat::Float32, "cfg"),
        (Revision::R2013, DataFormat::Ascii, "cff"),
        (Revision::R2013, DataFormat::Binary, "cff"),
        (Revision::R2013, DataFormat::Binary32, "cff"),
        (Revision::R2013, DataFormat::Float32, "cff"),
    ];
    let mut written_paths = Vec::new();
    for (revision, format, extension) in cases {
        let config = ComtradeWriteConfig::new(revision)
            .unwrap()
            .with_format(format)
            .unwrap();
        let path = dir.path().join(format!(
            "rec_{}_{}.{extension}",
            revision.year(),
            format.keyword()
        ));
        let written = write_comtrade(&rec, &path, &config).unwrap();
        assert_eq!(written.len(), if extension == "cfg" { 2 } else { 1 });
        check_round_trip(&rec, &path, format, revision);
        written_paths.push(path);
    }
    if let Some(records) = reference_read(&written_paths) {
        for ((revision, format, _), (path, r)) in
            cases.iter().zip(written_paths.iter().zip(&records))
        {
            check_reference(path, r, *format, *revision);
        }
    }
    // no temporary files left behind by the atomic writes
    let leftovers: Vec<_> = std::fs::read_dir(dir.path())
        .unwrap()
        .filter_map(|e| e.ok())
        .filter(|e| e.file_name().to_string_lossy().ends_with(".partial"))
        .collect();
    assert!(leftovers.is_empty());
}

#[test]
fn non_uniform_times_are_written_as_critical_time_stamps() {
    // nrates = 0: times come from the data-file stamps × timemult (C37.111-1999)
    let times: Vec<f64> = (0..40)
        .map(|i| {
            if i < 20 {
                i as f64 * 1e-3
            } else {
                0.019 + (i - 19) as f64 * 2.5e-4
            }
        })
        .collect();
    let rec = sample_recording(times);
    let dir = tempfile::tempdir().unwrap();
    let cases = [
        (Revision::R1999, DataFormat::Binary),
        (Revision::R2013, DataFormat::Ascii),
    ];
    let mut paths = Vec::new();
    for (revision, format) in cases {
        let config = ComtradeWriteConfig::new(revision)
            .unwrap()
            .with_format(format)
            .unwrap();
        let path = dir
            .path()
            .join(format!("nonuniform_{}.cfg", revision.year()));
        write_comtrade(&rec, &path, &config).unwrap();
        let cfg_text = std::fs::read_to_string(&path).unwrap();
        assert!(cfg_text.contains("\r\n0\r\n0,40\r\n"), "{cfg_text}");
        check_round_trip(&rec, &path, format, revision);
        paths.push(path);
    }
    if let Some(records) = reference_read(&paths) {
        for ((revision, format), (path, r)) in cases.iter().zip(paths.iter().zip(&records)) {
            check_reference(path, r, *format, *revision);
        }
    }
}

#[test]
fn hand_made_binary32_and_float32_cff_files_read() {
    // Built byte by byte per C37.111-2013 (not by our writer): one analog channel, two status
    // channels, 3 samples; rows of n: u32, timestamp: u32, value, one status word (LE).
    let dir = tempfile::tempdir().unwrap();
    let mut paths = Vec::new();
    for (format, raw) in [
        (
            "BINARY32",
            [
                100i32.to_le_bytes(),
                (-200i32).to_le_bytes(),
                i32::MIN.to_le_bytes(),
            ],
        ),
        (
            "FLOAT32",
            [
                100f32.to_le_bytes(),
                (-200f32).to_le_bytes(),
                f32::NAN.to_le_bytes(),
            ],
        ),
    ] {
        let cfg = format!(
            "ST,DEV,2013\r\n3,1A,2D\r\n1,IB,B,,A,0.5,1,0,-200,100,1,1,P\r\n1,CB_OPEN,,,0\r\n\
             2,CB_CLOSED,,,1\r\n60\r\n1\r\n960,3\r\n01/02/2020,00:00:00.000000\r\n\
             01/02/2020,00:00:00.001000\r\n{format}\r\n1\r\n-5h30,-5h30\r\nA,0\r\n"
        );
        let mut dat = Vec::new();
        for (i, value) in raw.iter().enumerate() {
            dat.extend_from_slice(&(i as u32 + 1).to_le_bytes());
            dat.extend_from_slice(&u32::MAX.to_le_bytes()); // time stamp missing: rate given
            dat.extend_from_slice(value);
            dat.extend_from_slice(&(0b10u16 | (i as u16 & 1)).to_le_bytes());
        }
        let mut cff = Vec::new();
        cff.extend_from_slice(b"--- file type: CFG ---\r\n");
        cff.extend_from_slice(cfg.as_bytes());
        cff.extend_from_slice(b"--- file type: INF ---\r\n--- file type: HDR ---\r\n");
        cff.extend_from_slice(
            format!("--- file type: DAT {format}: {} ---\r\n", dat.len()).as_bytes(),
        );
        cff.extend_from_slice(&dat);
        let path = dir.path().join(format!("hand_{format}.cff"));
        std::fs::write(&path, &cff).unwrap();

        let rec = read_comtrade(&path).unwrap_or_else(|e| panic!("{format}: {e}"));
        let ib = &rec.analog[0].values;
        // 0.5·100 + 1 = 51, 0.5·(−200) + 1 = −99, then missing (0x80000000 / NaN)
        assert_eq!(ib[0], 51.0, "{format}");
        assert_eq!(ib[1], -99.0, "{format}");
        assert!(ib[2].is_nan(), "{format}");
        assert_eq!(rec.status[0].values, vec![0, 1, 0]);
        assert_eq!(rec.status[1].values, vec![1, 1, 1]);
        assert_eq!(rec.status[1].normal_state, 1);
        assert_eq!(rec.time_code, "-5h30");
        assert_eq!(rec.time_quality, "A");
        for (got, want) in rec.times_s.iter().zip([0.0, 1.0 / 960.0, 2.0 / 960.0]) {
            assert!((got - want).abs() < 1e-15);
        }
        paths.push(path);
    }
    if let Some(records) = reference_read(&paths) {
        for r in records {
            let theirs = json_f64s(&r["analog"][0]);
            assert_eq!(&theirs[..2], &[51.0, -99.0], "reference reader");
            assert_eq!(r["status"][0], serde_json::json!([0, 1, 0]));
            assert_eq!(r["status"][1], serde_json::json!([1, 1, 1]));
        }
    }
}

// ------------------------------------------------------------------------------------------
// bad input: every error names the file and (text files) the line

fn expect_error(cfg: &str, dat: &[u8]) -> (ComtradeError, String) {
    let dir = tempfile::tempdir().unwrap();
    let path = write_pair(dir.path(), "bad", cfg, dat);
    let err = read_comtrade(&path).expect_err("bad input must be rejected");
    let text = err.to_string();
    (err, text)
}

#[test]
fn truncated_data_is_reported_with_file_and_line() {
    // a whole line missing
    let short = EXAMPLE_DAT.lines().take(3).collect::<Vec<_>>().join("\r\n");
    let (err, text) = expect_error(EXAMPLE_CFG, short.as_bytes());
    assert!(
        matches!(
            err,
            ComtradeError::Truncated {
                expected: 4,
                found: 3,
                ..
            }
        ),
        "{text}"
    );
    assert!(
        text.contains("bad.dat") && text.contains("line 3"),
        "{text}"
    );
    // the last line cut in the middle
    let cut = &EXAMPLE_DAT[..EXAMPLE_DAT.len() - 8];
    let (err, text) = expect_error(EXAMPLE_CFG, cut.as_bytes());
    assert!(
        matches!(err, ComtradeError::Truncated { found: 3, .. }),
        "{text}"
    );
    assert!(
        text.contains("bad.dat") && text.contains("line 4"),
        "{text}"
    );
}

#[test]
fn truncated_binary_data_is_reported_with_byte_counts() {
    let cfg = EXAMPLE_CFG.replace("ASCII", "BINARY");
    // rows of 4 + 4 + 2·2 + 2 = 14 bytes; keep 3 rows and half of the fourth
    let dat = vec![0u8; 14 * 3 + 7];
    let (err, text) = expect_error(&cfg, &dat);
    assert!(
        matches!(
            err,
            ComtradeError::Truncated {
                expected: 4,
                found: 3,
                ..
            }
        ),
        "{text}"
    );
    assert!(
        text.contains("bad.dat") && text.contains("49 of 56 bytes"),
        "{text}"
    );
}

#[test]
fn channel_count_disagreeing_with_the_data_is_reported() {
    // the .cfg declares 2 analog channels, the data has 3
    let dat = "1,0,100,-500,7,0\r\n2,1000,200,-250,7,0\r\n3,2000,300,0,7,1\r\n4,3000,1,250,7,1\r\n";
    let (err, text) = expect_error(EXAMPLE_CFG, dat.as_bytes());
    assert!(
        matches!(
            err,
            ComtradeError::ChannelCountMismatch {
                line: 1,
                expected: 5,
                found: 6,
                ..
            }
        ),
        "{text}"
    );
    assert!(text.contains("bad.dat, line 1"), "{text}");
    // binary: 2 analog declared, rows hold 3 → the byte count cannot match
    let cfg = EXAMPLE_CFG.replace("ASCII", "BINARY");
    let (err, text) = expect_error(&cfg, &[0u8; 16 * 4]);
    assert!(
        matches!(
            err,
            ComtradeError::DataLength {
                expected: 56,
                found: 64,
                ..
            }
        ),
        "{text}"
    );
    // TT disagreeing with ##A + ##D in the .cfg itself
    let cfg = EXAMPLE_CFG.replace("3,2A,1D", "4,2A,1D");
    let (err, text) = expect_error(&cfg, EXAMPLE_DAT.as_bytes());
    assert!(
        matches!(
            err,
            ComtradeError::ChannelTotal {
                line: 2,
                total: 4,
                ..
            }
        ),
        "{text}"
    );
    assert!(text.contains("bad.cfg, line 2"), "{text}");
}

#[test]
fn garbage_in_numeric_fields_names_file_line_and_field() {
    let cfg = EXAMPLE_CFG.replace("0.002,0,0", "0.0o2,0,0");
    let (err, text) = expect_error(&cfg, EXAMPLE_DAT.as_bytes());
    assert!(
        matches!(err, ComtradeError::BadField { line: 4, .. }),
        "{text}"
    );
    assert!(
        text.contains("bad.cfg, line 4") && text.contains("`a`") && text.contains("0.0o2"),
        "{text}"
    );

    let dat = EXAMPLE_DAT.replace("3,2000,300,0,1", "3,2000,3x0,0,1");
    let (err, text) = expect_error(EXAMPLE_CFG, dat.as_bytes());
    assert!(
        matches!(err, ComtradeError::BadField { line: 3, .. }),
        "{text}"
    );
    assert!(
        text.contains("bad.dat, line 3") && text.contains("A1 (VA)"),
        "{text}"
    );

    let cfg = EXAMPLE_CFG.replace("\r\n50\r\n", "\r\nfifty\r\n");
    let (_, text) = expect_error(&cfg, EXAMPLE_DAT.as_bytes());
    assert!(
        text.contains("bad.cfg, line 6") && text.contains("`lf`"),
        "{text}"
    );

    let cfg = EXAMPLE_CFG.replace("17/03/2024,10:15:00.002", "17/13/2024,10:15:00.002");
    let (_, text) = expect_error(&cfg, EXAMPLE_DAT.as_bytes());
    assert!(
        text.contains("bad.cfg, line 10") && text.contains("`date`"),
        "{text}"
    );

    let dat = EXAMPLE_DAT.replace("2,1000,200,-250,0", "2,1000,200,-250,2");
    let (_, text) = expect_error(EXAMPLE_CFG, dat.as_bytes());
    assert!(
        text.contains("bad.dat, line 2") && text.contains("D1 (TRIP)"),
        "{text}"
    );
}

#[test]
fn unknown_format_and_short_cfg_are_reported() {
    let cfg = EXAMPLE_CFG.replace("ASCII", "BINARY16");
    let (err, text) = expect_error(&cfg, EXAMPLE_DAT.as_bytes());
    assert!(
        matches!(err, ComtradeError::UnknownFormat { line: 11, .. }),
        "{text}"
    );
    assert!(text.contains("BINARY16"), "{text}");

    let cfg = EXAMPLE_CFG.replace("ASCII", "FLOAT32");
    let (err, text) = expect_error(&cfg, EXAMPLE_DAT.as_bytes());
    assert!(
        matches!(err, ComtradeError::FormatNeedsRevision2013 { line: 11, .. }),
        "{text}"
    );

    let cfg: String = EXAMPLE_CFG
        .lines()
        .take(7)
        .map(|l| format!("{l}\n"))
        .collect();
    let (err, text) = expect_error(&cfg, EXAMPLE_DAT.as_bytes());
    assert!(
        matches!(err, ComtradeError::MissingLine { last_line: 7, .. }),
        "{text}"
    );
    assert!(text.contains("samp,endsamp"), "{text}");

    let cfg = EXAMPLE_CFG.replace(
        "1,VA,A,BUS1,V,0.01,0.5,0,-99999,99998,1,1,P",
        "1,VA,A,BUS1,V,0.01",
    );
    let (err, text) = expect_error(&cfg, EXAMPLE_DAT.as_bytes());
    assert!(
        matches!(
            err,
            ComtradeError::FieldCount {
                line: 3,
                found: 6,
                ..
            }
        ),
        "{text}"
    );
}

#[test]
fn writer_rejects_records_it_cannot_represent() {
    let dir = tempfile::tempdir().unwrap();
    let config = ComtradeWriteConfig::new(Revision::R1999).unwrap();
    let mut rec = sample_recording((0..10).map(|i| i as f64 * 1e-3).collect());
    rec.analog[0].name = "VA,LINE".to_string();
    let err = write_comtrade(&rec, &dir.path().join("x.cfg"), &config).unwrap_err();
    assert!(err.to_string().contains("comma"), "{err}");
    let mut rec = sample_recording((0..10).map(|i| i as f64 * 1e-3).collect());
    rec.status[3].values.pop();
    let err = write_comtrade(&rec, &dir.path().join("x.cfg"), &config).unwrap_err();
    assert!(err.to_string().contains("S03"), "{err}");
    let rec = sample_recording((0..10).map(|i| i as f64 * 1e-3).collect());
    let err = write_comtrade(&rec, &dir.path().join("x.cff"), &config).unwrap_err();
    assert!(err.to_string().contains("2013"), "{err}");
    assert!(
        std::fs::read_dir(dir.path()).unwrap().next().is_none(),
        "nothing written"
    );
}

// ------------------------------------------------------------------------------------------
// phasors

/// Three phases built from known sequence components (inverse Fortescue transform, Fortescue
/// 1918), each with a DC offset and a 5th harmonic that a full-cycle DFT rejects exactly.
fn unbalanced_three_phase(
    sequences: &SequenceComponents,
    times_s: &[f64],
    f0_hz: f64,
) -> [Vec<f64>; 3] {
    let phases = sequences.to_phases();
    let mut out: [Vec<f64>; 3] = Default::default();
    for (k, phasor) in phases.iter().enumerate() {
        out[k] = times_s
            .iter()
            .map(|t| {
                // RMS phasor P ↔ √2 |P| cos(ωt + ∠P)
                let w = 2.0 * PI * f0_hz * t;
                2f64.sqrt() * (phasor * Complex::from_polar(1.0, w)).re
                    + 0.05 * (k as f64 + 1.0)
                    + 0.08 * (5.0 * w + 0.4 * k as f64).sin()
            })
            .collect();
    }
    out
}

fn known_sequences() -> SequenceComponents {
    SequenceComponents {
        positive: Complex::from_polar(1.02, -0.4),
        negative: Complex::from_polar(0.15, 1.1),
        zero: Complex::from_polar(0.07, -2.0),
    }
}

#[test]
fn positive_sequence_of_an_unbalanced_set_after_one_cycle() {
    let expected = known_sequences();
    let f0 = 50.0;
    let fs = 2000.0; // 40 samples per cycle
    let times: Vec<f64> = (0..200).map(|i| i as f64 / fs).collect();
    let [a, b, c] = unbalanced_three_phase(&expected, &times, f0);
    let estimator = PhasorEstimator::new(fs, f0).unwrap();
    let seq = sequence_phasors(&estimator, &a, &b, &c).unwrap();
    assert_eq!(seq.len(), 200 - 40 + 1);
    let mut worst = 0.0f64;
    for s in &seq {
        worst = worst
            .max((s.positive - expected.positive).norm())
            .max((s.negative - expected.negative).norm())
            .max((s.zero - expected.zero).norm());
    }
    // analytic: Fortescue 1918 symmetrical components of the constructed phases
    eprintln!("direct: worst sequence-component error {worst:e}");
    assert!(worst < 1e-6, "worst sequence error {worst:e}");

    // the same waveforms through a 2013 BINARY32 COMTRADE file and back
    let mut rec = Recording::new("ST", "DEV", f0, times);
    for (name, values) in [("VA", a), ("VB", b), ("VC", c)] {
        rec.analog.push(AnalogChannel::new(name, "pu", values));
    }
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("unbalanced.cfg");
    let config = ComtradeWriteConfig::new(Revision::R2013)
        .unwrap()
        .with_format(DataFormat::Binary32)
        .unwrap();
    write_comtrade(&rec, &path, &config).unwrap();
    let back = read_comtrade(&path).unwrap();
    let fs_back = 1.0 / (back.times_s[1] - back.times_s[0]);
    let estimator = PhasorEstimator::new(fs_back, back.nominal_frequency_hz).unwrap();
    let seq = sequence_phasors(
        &estimator,
        &back.analog[0].values,
        &back.analog[1].values,
        &back.analog[2].values,
    )
    .unwrap();
    let worst_file = seq
        .iter()
        .map(|s| (s.positive - expected.positive).norm())
        .fold(0.0, f64::max);
    eprintln!("through BINARY32 file: worst positive-sequence error {worst_file:e}");
    assert!(worst_file < 1e-6);
}

#[test]
fn non_integer_rate_is_named_and_resampling_recovers_the_phasor() {
    let expected = known_sequences();
    let f0 = 60.0;
    let fs = 10_000.0; // 166.67 samples per 60 Hz cycle
    assert!(PhasorEstimator::new(fs, f0)
        .unwrap_err()
        .to_string()
        .contains("10000"));
    let times: Vec<f64> = (0..600).map(|i| i as f64 / fs).collect();
    let phases = expected.to_phases();
    let waves: Vec<Vec<f64>> = phases
        .iter()
        .map(|p| {
            times
                .iter()
                .map(|t| 2f64.sqrt() * (p * Complex::from_polar(1.0, 2.0 * PI * f0 * t)).re)
                .collect()
        })
        .collect();
    let new_rate = 128.0 * f0;
    let grid = uniform_grid(times[0], *times.last().unwrap(), new_rate).unwrap();
    let resampled: Vec<Vec<f64>> = waves
        .iter()
        .map(|w| resample_linear(&times, w, &grid).unwrap())
        .collect();
    let estimator = PhasorEstimator::new(new_rate, f0).unwrap();
    let seq = sequence_phasors(&estimator, &resampled[0], &resampled[1], &resampled[2]).unwrap();
    // linear interpolation error ≤ h²/8 · max|x''| (textbook bound), x'' peak = ω²·√2|P|; the
    // DFT's weights sum to √2 in magnitude and the Fortescue rows average three phases
    let h = 1.0 / fs;
    let omega = 2.0 * PI * f0;
    let peak = phases
        .iter()
        .map(|p| 2f64.sqrt() * p.norm())
        .fold(0.0, f64::max);
    let bound = 2f64.sqrt() * h * h / 8.0 * omega * omega * peak;
    let worst = seq
        .iter()
        .map(|s| (s.positive - expected.positive).norm())
        .fold(0.0, f64::max);
    eprintln!(
        "resampled 10 kHz to 7680 Hz: worst positive-sequence error {worst:e}, bound {bound:e}"
    );
    assert!(worst <= bound, "{worst:e} > bound {bound:e}");
}

#[test]
fn multiple_sample_rates_give_piecewise_uniform_times() {
    // nrates = 2: samples 1..=3 at 1 kHz, then 4..=5 at 500 Hz, each segment continuing from the
    // last sample of the one before (C37.111-1999 samp/endsamp; same rule as the reference
    // reader): 0, 1, 2, 4, 6 ms
    let cfg = EXAMPLE_CFG.replace("\r\n1\r\n1000,4\r\n", "\r\n2\r\n1000,3\r\n500,5\r\n");
    let dat = format!("{EXAMPLE_DAT}5,0,400,500,0\r\n");
    let dir = tempfile::tempdir().unwrap();
    let path = write_pair(dir.path(), "tworates", &cfg, dat.as_bytes());
    let rec = read_comtrade(&path).unwrap();
    let expected = [0.0, 0.001, 0.002, 0.004, 0.006];
    for (got, want) in rec.times_s.iter().zip(expected) {
        assert!((got - want).abs() < 1e-15, "{got} vs {want}");
    }
    if let Some(records) = reference_read(&[path]) {
        for (got, want) in json_f64s(&records[0]["time"]).iter().zip(expected) {
            assert!(
                (got - want).abs() < 1e-12,
                "reference reader: {got} vs {want}"
            );
        }
    }
}

#[test]
fn revision_1991_layout_reads() {
    // 1991 layout (from memory): no rev_year, mm/dd/yy dates, 10-field analog lines,
    // Dn,ch_id,y status lines, no timemult line; ASCII missing value is an empty field
    let cfg = "OLD_STATION,7\r\n2,1A,1D\r\n1,VA,A,,kV,0.5,0,0,-2000,2000\r\n1,TRIP,0\r\n60\r\n\
               1\r\n600,3\r\n12/31/91,23:59:59.000000\r\n01/01/92,00:00:00.000000\r\nASCII\r\n";
    let dat = "1,0,10,0\r\n2,1667,,1\r\n3,3333,-4,1\r\n";
    let dir = tempfile::tempdir().unwrap();
    let path = write_pair(dir.path(), "old", cfg, dat.as_bytes());
    let rec = read_comtrade(&path).unwrap();
    assert_eq!(rec.revision, Revision::R1991);
    assert_eq!(rec.analog[0].values[0], 5.0);
    assert!(rec.analog[0].values[1].is_nan());
    assert_eq!(rec.analog[0].values[2], -2.0);
    assert_eq!(rec.status[0].values, vec![0, 1, 1]);
    assert_eq!(
        (rec.start.year, rec.start.month, rec.start.day),
        (1991, 12, 31)
    );
    assert!(
        (rec.trigger_s - 1.0).abs() < 1e-12,
        "crosses the new year: {}",
        rec.trigger_s
    );
}

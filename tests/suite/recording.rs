//! Recordings → traces (`understudy ingest`): COMTRADE three-phase waveforms to positive-sequence
//! phasors, CSV with a column mapping, resampling and compressed-sensing gap filling.
//!
//! External checks: the analytic positive sequence of a constructed unbalanced set (C. L.
//! Fortescue, AIEE Trans. 1918); scikit-learn `OrthogonalMatchingPursuit` on the same gap-filling
//! problem (`tests/reference/residual_sparse.py`).

use std::f64::consts::PI;
use std::path::Path;

use nalgebra::Complex;
use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde_json::json;
use understudy::residual::dct::Dct;
use understudy::signal::comtrade::{
    write_comtrade, AnalogChannel, ComtradeWriteConfig, DataFormat, Recording, Revision,
};
use understudy::signal::phasor::SequenceComponents;
use understudy::signal::recording::{fill_gaps, ingest, GapConfig, GapMethod, Mapping};
use understudy::signal::trace::Trace;
use understudy::simulate::{simulate_case, SimulationSettings};

use crate::common::{self, run_cli};

// ------------------------------------------------------------------ COMTRADE three-phase

/// Instantaneous phase-to-neutral waveforms of known sequence phasors (inverse Fortescue
/// transform, Fortescue 1918), in physical units (`base` per pu), with a DC offset and a 5th
/// harmonic that a full-cycle DFT rejects exactly.
fn waveforms(seq: &SequenceComponents, base: f64, times_s: &[f64], f0_hz: f64) -> [Vec<f64>; 3] {
    let mut out: [Vec<f64>; 3] = Default::default();
    for (k, phasor) in seq.to_phases().iter().enumerate() {
        out[k] = times_s
            .iter()
            .map(|t| {
                let w = 2.0 * PI * f0_hz * t;
                base * (2f64.sqrt() * (phasor * Complex::from_polar(1.0, w)).re
                    + 0.04 * (k as f64 + 1.0)
                    + 0.06 * (5.0 * w + 0.3 * k as f64).sin())
            })
            .collect();
    }
    out
}

#[test]
fn comtrade_three_phase_recording_gives_the_analytic_positive_sequence() {
    let f0 = 50.0;
    let fs = 2000.0; // 40 samples per cycle
    let (s_base_mva, v_base_kv) = (50.0, 33.0);
    let v_phase_base_kv = v_base_kv / 3f64.sqrt();
    let i_base_a = 1e3 * s_base_mva / (3f64.sqrt() * v_base_kv);
    let voltage = SequenceComponents {
        positive: Complex::from_polar(0.97, -0.4),
        negative: Complex::from_polar(0.12, 1.1),
        zero: Complex::from_polar(0.05, -2.0),
    };
    let current = SequenceComponents {
        positive: Complex::from_polar(0.8, 2.3),
        negative: Complex::from_polar(0.1, -0.7),
        zero: Complex::from_polar(0.02, 0.5),
    };
    let times: Vec<f64> = (0..300).map(|k| k as f64 / fs).collect();
    let v = waveforms(&voltage, v_phase_base_kv, &times, f0);
    let i = waveforms(&current, i_base_a, &times, f0);
    let mut rec = Recording::new("INVENTED_STATION", "REC1", f0, times.clone());
    rec.trigger_s = 0.05;
    for (name, unit, values) in [
        ("VA", "kV", &v[0]),
        ("VB", "kV", &v[1]),
        ("VC", "kV", &v[2]),
        ("IA", "A", &i[0]),
        ("IB", "A", &i[1]),
        ("IC", "A", &i[2]),
    ] {
        rec.analog
            .push(AnalogChannel::new(name, unit, values.clone()));
    }
    let dir = tempfile::tempdir().unwrap();
    let config = ComtradeWriteConfig::new(Revision::R2013)
        .unwrap()
        .with_format(DataFormat::Binary32)
        .unwrap();
    write_comtrade(&rec, &dir.path().join("unbalanced.cfg"), &config).unwrap();
    let map_path = dir.path().join("map.toml");
    std::fs::write(
        &map_path,
        r#"
[[recording]]
name = "unbalanced"
file = "unbalanced.cfg"
format = "comtrade"
s_base_mva = 50.0
v_base_kv = 33.0
convention = "load"
units = { voltage = "kV", current = "A" }
[recording.three_phase]
va = "VA"
vb = "VB"
vc = "VC"
ia = "IA"
ib = "IB"
ic = "IC"
"#,
    )
    .unwrap();
    let mapping = Mapping::load(&map_path).unwrap();
    let done = ingest(
        &mapping.recordings[0],
        &mapping.gaps,
        &mapping.base_dir,
        None,
    )
    .unwrap();
    let trace = &done.trace;
    // the first phasor belongs to the last sample of the first cycle (40 samples)
    assert_eq!(trace.len(), 300 - 40 + 1);
    assert!((trace.time_s[0] - 39.0 / fs).abs() < 1e-12);
    assert_eq!(done.report.trigger_s, Some(0.05));
    assert!((done.report.f_nom_hz - 50.0).abs() < 1e-12);
    // load convention → injected current is the negative of the recorded one
    let v1 = voltage.positive;
    let i1 = -current.positive;
    let s1 = v1 * i1.conj();
    let ch = |n: &str| trace.channel(n).unwrap();
    let mut worst = 0.0f64;
    for k in 0..trace.len() {
        let v = Complex::new(ch("v_re")[k], ch("v_im")[k]);
        let i = Complex::new(ch("i_re")[k], ch("i_im")[k]);
        let s = Complex::new(ch("p")[k], ch("q")[k]);
        worst = worst
            .max((v - v1).norm())
            .max((i - i1).norm())
            .max((s - s1).norm())
            .max((ch("v_mag")[k] - v1.norm()).abs());
    }
    // analytic: Fortescue 1918 positive sequence of the constructed phases, per unit
    eprintln!("COMTRADE BINARY32 → trace: worst positive-sequence error {worst:.2e} pu");
    assert!(worst < 1e-6, "worst error {worst:e}");
    assert!(done.report.filled.is_empty());
    assert!(!done.report.f_grid_recorded && trace.channel("f_grid").is_none());
    // |v| = 0.97 < 0.9? no: in band all along, so no fault is detected
    assert!(done.report.fault.is_none());
}

// ----------------------------------------------------------------- CSV with a mapping

fn write_number_row(out: &mut String, values: &[f64]) {
    let row: Vec<String> = values.iter().map(|v| format!("{v:e}")).collect();
    out.push_str(&row.join(","));
    out.push('\n');
}

#[test]
fn simulator_trace_with_renamed_shuffled_columns_ingests_back_to_the_original() {
    let study = understudy::demo::demo_study();
    let (cases, _) = study.design.generate(|_| true).unwrap();
    let settings = SimulationSettings {
        duration_s: 0.5,
        ..SimulationSettings::default()
    };
    let (original, _) = cases
        .iter()
        .find_map(|c| simulate_case(&study.unit, c, &settings).ok())
        .expect("a demo case simulates");
    let ch = |n: &str| original.channel(n).unwrap();
    let (s_base, v_base, f_nom) = (
        original.meta.s_base_mva,
        original.meta.v_base_kv,
        original.meta.f_nom_hz,
    );
    let dir = tempfile::tempdir().unwrap();
    // 1: physical units, polar voltage in degrees, time in ms, columns shuffled and renamed
    let mut text = String::from("# invented export of a field recorder\nQ_Mvar,I_imag,time_ms,Vang_deg,P_MW,junk,V_kV,freq_Hz,I_real\n");
    let kv = v_base / 3f64.sqrt();
    for k in 0..original.len() {
        write_number_row(
            &mut text,
            &[
                ch("q")[k] * s_base,
                ch("i_im")[k],
                original.time_s[k] * 1e3,
                ch("v_angle")[k].to_degrees(),
                ch("p")[k] * s_base,
                7.0,
                ch("v_mag")[k] * kv,
                ch("f_grid")[k] * f_nom,
                ch("i_re")[k],
            ],
        );
    }
    std::fs::write(dir.path().join("physical.csv"), text).unwrap();
    // 2: per unit, re/im, shuffled and renamed, shortest round-trip numbers
    let names = ["i_im", "q", "v_im", "p", "t_s", "i_re", "f_grid", "v_re"];
    let mut text = format!("Ii,Qs,Vi,Ps,{},Ir,F,Vr\n", "seconds");
    for k in 0..original.len() {
        let row: Vec<String> = names
            .iter()
            .map(|n| {
                if *n == "t_s" {
                    format!("{}", original.time_s[k])
                } else {
                    format!("{}", ch(n)[k])
                }
            })
            .collect();
        text.push_str(&row.join(","));
        text.push('\n');
    }
    std::fs::write(dir.path().join("per-unit.csv"), text).unwrap();
    let map = format!(
        r#"
[[recording]]
name = "physical"
file = "physical.csv"
format = "csv"
time_column = "time_ms"
time_scale = 0.001
s_base_mva = {s_base}
v_base_kv = {v_base}
f_nom_hz = {f_nom}
frequency = "freq_Hz"
units = {{ voltage = "kV", power = "MW", angle = "deg", frequency = "Hz" }}
[recording.phasor]
v_mag = "V_kV"
v_angle = "Vang_deg"
i_re = "I_real"
i_im = "I_imag"
p = "P_MW"
q = "Q_Mvar"

[[recording]]
name = "per-unit"
file = "per-unit.csv"
format = "csv"
time_column = "seconds"
s_base_mva = {s_base}
v_base_kv = {v_base}
f_nom_hz = {f_nom}
frequency = "F"
[recording.phasor]
v_re = "Vr"
v_im = "Vi"
i_re = "Ir"
i_im = "Ii"
p = "Ps"
q = "Qs"
"#
    );
    std::fs::write(dir.path().join("map.toml"), map).unwrap();
    let (code, _, stderr) = run_cli(
        dir.path(),
        &["ingest", "--map", "map.toml", "--out", "traces"],
    );
    assert_eq!(code, 0, "{stderr}");
    assert!(
        stderr.contains("2 trace(s) written") && stderr.contains("no gaps"),
        "{stderr}"
    );
    let manifest: serde_json::Value = serde_json::from_str(
        &std::fs::read_to_string(dir.path().join("traces/manifest.json")).unwrap(),
    )
    .unwrap();
    assert_eq!(manifest["traces"].as_array().unwrap().len(), 2);
    let standard = [
        "v_re", "v_im", "v_mag", "v_angle", "i_re", "i_im", "p", "q", "f_grid",
    ];
    for (stem, exact) in [("physical", false), ("per-unit", true)] {
        let back = Trace::read(&dir.path().join(format!("traces/{stem}.csv"))).unwrap();
        assert_eq!(back.names, standard, "{stem}");
        assert_eq!(back.len(), original.len());
        assert!((back.meta.s_base_mva - s_base).abs() < 1e-12);
        let mut worst = 0.0f64;
        for (a, b) in back.time_s.iter().zip(&original.time_s) {
            worst = worst.max((a - b).abs());
            if exact {
                assert_eq!(a.to_bits(), b.to_bits(), "{stem}: time");
            }
        }
        for name in standard {
            for (a, b) in back.channel(name).unwrap().iter().zip(ch(name)) {
                worst = worst.max((a - b).abs());
                if exact {
                    assert_eq!(a.to_bits(), b.to_bits(), "{stem}: {name}");
                }
            }
        }
        eprintln!("{stem}: worst difference from the simulator's trace {worst:.2e}");
        assert!(worst < 1e-12, "{stem}: {worst:e}");
    }
}

// --------------------------------------------------------------------------- gap filling

/// n = 256 samples: a ramp plus two pairs of DCT atoms whose weights cancel at both ends (same
/// parity, c₁ψ_{k₁}(0) + c₂ψ_{k₂}(0) = 0), so the signal minus its end-point line is exactly
/// 4-sparse in the orthonormal DCT basis.
fn ramp_plus_sparse(n: usize) -> (Vec<f64>, [(usize, f64); 4]) {
    let dct = Dct::new(n);
    let pair = |k1: usize, c1: f64, k2: usize| {
        let c2 = -c1 * dct.inverse_entry(0, k1) / dct.inverse_entry(0, k2);
        [(k1, c1), (k2, c2)]
    };
    let [a, b] = pair(6, 1.0, 20);
    let [c, d] = pair(9, 0.5, 33);
    let atoms = [a, b, c, d];
    let signal = (0..n)
        .map(|i| {
            0.3 + 0.002 * i as f64
                + atoms
                    .iter()
                    .map(|&(k, c)| c * dct.inverse_entry(i, k))
                    .sum::<f64>()
        })
        .collect();
    (signal, atoms)
}

#[test]
fn gaps_in_a_dct_sparse_signal_are_recovered_and_agree_with_scikit_learn() {
    let n = 256;
    let step = 1e-3;
    let (truth, atoms) = ramp_plus_sparse(n);
    // 20 % of the samples removed at random (the two end samples kept)
    let mut rng = ChaCha8Rng::seed_from_u64(7);
    let mut interior: Vec<usize> = (1..n - 1).collect();
    let removed_count = n / 5;
    for i in 0..removed_count {
        let j = rng.random_range(i..interior.len());
        interior.swap(i, j);
    }
    let mut removed = interior[..removed_count].to_vec();
    removed.sort_unstable();
    let mut values = truth.clone();
    for &k in &removed {
        values[k] = f64::NAN;
    }
    let config = GapConfig::default().with_max_gap_s(0.02).unwrap();
    let mut by_omp = values.clone();
    let report = fill_gaps(
        &mut by_omp,
        0.0,
        step,
        &config,
        Path::new("synthetic.csv"),
        "v_re",
    )
    .unwrap();
    // the gaps lie close together: one recovery window over the whole signal
    assert_eq!(report.len(), 1);
    let w = &report[0];
    assert_eq!(w.samples, removed);
    assert_eq!(w.known_samples, n - removed_count);
    assert_eq!(w.atoms, 4);
    let worst = removed
        .iter()
        .map(|&k| (by_omp[k] - truth[k]).abs())
        .fold(0.0, f64::max);
    eprintln!(
        "OMP gap fill: {} of {n} samples, worst error {worst:.2e}, fit RMS {:.2e}",
        removed.len(),
        w.fit_rms
    );
    // exactly sparse and 205 known samples for 4 atoms: recovery to rounding
    assert!(worst < 1e-10, "{worst:e}");
    assert!(w.fit_rms < 1e-12);
    for k in (0..n).filter(|k| !removed.contains(k)) {
        assert_eq!(
            by_omp[k].to_bits(),
            truth[k].to_bits(),
            "known sample {k} changed"
        );
    }

    // FISTA on the same problem: the ℓ1 penalty biases each coefficient by about λ (1e-4)
    let lasso = config
        .with_method(GapMethod::Fista)
        .with_lambda(1e-6)
        .unwrap();
    let mut by_fista = values.clone();
    fill_gaps(
        &mut by_fista,
        0.0,
        step,
        &lasso,
        Path::new("synthetic.csv"),
        "v_re",
    )
    .unwrap();
    let worst_fista = removed
        .iter()
        .map(|&k| (by_fista[k] - truth[k]).abs())
        .fold(0.0, f64::max);
    eprintln!("FISTA gap fill (λ = 1e-6): worst error {worst_fista:.2e}");
    assert!(worst_fista < 1e-4, "{worst_fista:e}");

    // scikit-learn OrthogonalMatchingPursuit(n_nonzero_coefs=4, fit_intercept=False) on the
    // same problem: rows of the orthonormal inverse DCT at the known samples, the known values
    // minus the line through the end samples
    let known: Vec<usize> = (0..n).filter(|k| !removed.contains(k)).collect();
    let line = |i: usize| truth[0] + (truth[n - 1] - truth[0]) * i as f64 / (n - 1) as f64;
    let dct = Dct::new(n);
    let a: Vec<Vec<f64>> = known
        .iter()
        .map(|&i| (0..n).map(|j| dct.inverse_entry(i, j)).collect())
        .collect();
    let b: Vec<f64> = known.iter().map(|&i| truth[i] - line(i)).collect();
    let input = json!({ "a": a, "b": b, "k": 4, "lambda": 1e-6 });
    if let Some(r) = common::run_reference("residual_sparse.py", &input) {
        let coefficients: Vec<f64> = serde_json::from_value(r["omp"].clone()).unwrap();
        let mut support: Vec<usize> = (0..n).filter(|&j| coefficients[j] != 0.0).collect();
        support.sort_unstable();
        let mut expected: Vec<usize> = atoms.iter().map(|a| a.0).collect();
        expected.sort_unstable();
        assert_eq!(support, expected);
        let mut worst_sk = 0.0f64;
        for &k in &removed {
            let sk = line(k)
                + (0..n)
                    .map(|j| coefficients[j] * dct.inverse_entry(k, j))
                    .sum::<f64>();
            worst_sk = worst_sk.max((sk - by_omp[k]).abs());
        }
        eprintln!("OMP gap fill vs scikit-learn: worst difference {worst_sk:.2e}");
        assert!(worst_sk < 1e-10, "{worst_sk:e}");
    }
}

/// A per-unit phasor CSV with an uneven, gappy time axis; `hole` rows removed from sample 150.
fn gappy_csv(dir: &Path, hole: usize) {
    let mut text = String::from("t,vr,vi,ir,ii\n");
    for k in 0..400usize {
        if (150..150 + hole).contains(&k) {
            continue;
        }
        let t = k as f64 * 1e-3;
        let vr = 1.0 - 0.5 * (-((t - 0.2) / 0.03).powi(2)).exp();
        let vi = 0.1 * (3.0 * t).sin();
        let ir = 0.8 + 0.1 * (5.0 * t).cos();
        // one missing value (empty cell) in i_im
        let ii = if k == 300 {
            String::new()
        } else {
            format!("{}", -0.2 + 0.05 * t)
        };
        text.push_str(&format!("{t},{vr},{vi},{ir},{ii}\n"));
    }
    std::fs::write(dir.join("gappy.csv"), text).unwrap();
    std::fs::write(
        dir.join("map.toml"),
        r#"
[gaps]
max_gap_s = 0.005

[[recording]]
name = "gappy"
file = "gappy.csv"
format = "csv"
time_column = "t"
s_base_mva = 10.0
v_base_kv = 20.0
f_nom_hz = 50.0
[recording.phasor]
v_re = "vr"
v_im = "vi"
i_re = "ir"
i_im = "ii"
"#,
    )
    .unwrap();
}

#[test]
fn gaps_are_filled_and_reported_and_long_gaps_refused() {
    let dir = tempfile::tempdir().unwrap();
    gappy_csv(dir.path(), 3);
    let (code, _, stderr) = run_cli(
        dir.path(),
        &[
            "ingest", "--map", "map.toml", "--out", "out", "--step", "0.001",
        ],
    );
    assert_eq!(code, 0, "{stderr}");
    assert!(stderr.contains("filled 3 sample(s) of `v_re`"), "{stderr}");
    assert!(stderr.contains("filled 1 sample(s) of `i_im`"), "{stderr}");
    let trace = Trace::read(&dir.path().join("out/gappy.csv")).unwrap();
    assert_eq!(trace.len(), 400);
    trace.check_usable(Path::new("gappy.csv")).unwrap();
    // the sidecar names what was filled
    let filled = &trace.meta.case["recording"]["filled"];
    let channels: Vec<&str> = filled
        .as_array()
        .unwrap()
        .iter()
        .map(|w| w["channel"].as_str().unwrap())
        .collect();
    // the missing rows in every channel; the missing cell of i_im is far away: its own window
    assert_eq!(channels, ["v_re", "v_im", "i_re", "i_im", "i_im"]);
    assert_eq!(filled[0]["samples"], json!([150, 151, 152]));
    assert_eq!(filled[4]["samples"], json!([300]));
    eprintln!("gappy recording, filled windows: {filled}");
    // the fault (a dip to 0.5 pu at 0.2 s) is detected from |v|
    let fault = &trace.meta.case["recording"]["fault"];
    assert!(fault["how"].as_str().unwrap().starts_with("detected"));
    let start = fault["start_s"].as_f64().unwrap();
    // |v| ≈ 1 − 0.5·exp(−((t − 0.2)/0.03)²) crosses 0.9 at t ≈ 0.2 − 0.03·√ln 5 ≈ 0.162 s
    assert!((0.155..0.17).contains(&start), "{start}");
    // smooth channels, so the fill is close to the truth (measured, not a published number)
    let i_im = trace.channel("i_im").unwrap();
    assert!(
        (i_im[300] - (-0.2 + 0.05 * 0.3)).abs() < 1e-6,
        "{}",
        i_im[300]
    );
    // the 3 ms hole in v_im (which changes by ~1e-3 across it): the fill is measured here
    // against the known function; 1e-4 is a tenth of that change (a loose bound: a 16-atom DCT
    // fit of a smooth window, fit RMS ~1e-6, is not exact)
    let v_im = trace.channel("v_im").unwrap();
    let worst = (150..153)
        .map(|k| (v_im[k] - 0.1 * (3.0 * k as f64 * 1e-3).sin()).abs())
        .fold(0.0, f64::max);
    eprintln!("gappy recording: worst v_im fill error {worst:.2e}");
    assert!(worst < 1e-4, "{worst:e}");

    // a hole of 8 ms with a 5 ms limit is refused, naming the channel, times and setting
    gappy_csv(dir.path(), 8);
    let (code, _, stderr) = run_cli(
        dir.path(),
        &[
            "ingest", "--map", "map.toml", "--out", "out2", "--step", "0.001",
        ],
    );
    assert_eq!(code, 2, "{stderr}");
    assert!(
        stderr.contains("gappy.csv")
            && stderr.contains("`v_re`")
            && stderr.contains("8 samples")
            && stderr.contains("gaps.max_gap_s = 0.005"),
        "{stderr}"
    );
    assert!(
        !dir.path().join("out2").exists(),
        "nothing is written on error"
    );
}

// ----------------------------------------------------------------------------- bad input

#[test]
fn bad_mappings_and_files_are_named() {
    let dir = tempfile::tempdir().unwrap();
    gappy_csv(dir.path(), 0);
    // a mapped column the file lacks
    let map = std::fs::read_to_string(dir.path().join("map.toml")).unwrap();
    std::fs::write(
        dir.path().join("missing.toml"),
        map.replace("\"ii\"", "\"I_imag\""),
    )
    .unwrap();
    let (code, _, stderr) = run_cli(
        dir.path(),
        &["ingest", "--map", "missing.toml", "--out", "o"],
    );
    assert_eq!(code, 2, "{stderr}");
    assert!(
        stderr.contains("gappy.csv")
            && stderr.contains("`I_imag`")
            && stderr.contains("phasor.i_im"),
        "{stderr}"
    );
    // an unknown key names the key and its line
    std::fs::write(
        dir.path().join("unknown.toml"),
        map.replace("f_nom_hz = 50.0", "f_nom_hz = 50.0\nvoltage_base = 20.0"),
    )
    .unwrap();
    let (code, _, stderr) = run_cli(
        dir.path(),
        &["ingest", "--map", "unknown.toml", "--out", "o"],
    );
    assert_eq!(code, 2, "{stderr}");
    assert!(
        stderr.contains("voltage_base") && stderr.contains("unknown.toml, line 13"),
        "{stderr}"
    );
    // both phasor forms for one quantity
    std::fs::write(
        dir.path().join("both.toml"),
        map.replace("v_re = \"vr\"", "v_re = \"vr\"\nv_mag = \"vr\""),
    )
    .unwrap();
    let (code, _, stderr) = run_cli(dir.path(), &["ingest", "--map", "both.toml", "--out", "o"]);
    assert_eq!(code, 2, "{stderr}");
    assert!(
        stderr.contains("`phasor.v_re`") && stderr.contains("gappy"),
        "{stderr}"
    );
    // a non-numeric cell names file, line and column
    let csv = std::fs::read_to_string(dir.path().join("gappy.csv")).unwrap();
    let broken = csv.replacen("\n0.005,", "\n0.005,abc,", 1);
    let broken: String = broken
        .lines()
        .map(|l| {
            if l.starts_with("0.005,abc,") {
                let mut f: Vec<&str> = l.split(',').collect();
                f.remove(2);
                f.join(",")
            } else {
                l.to_string()
            }
        })
        .collect::<Vec<_>>()
        .join("\n");
    std::fs::write(dir.path().join("gappy.csv"), broken).unwrap();
    let (code, _, stderr) = run_cli(dir.path(), &["ingest", "--map", "map.toml", "--out", "o"]);
    assert_eq!(code, 2, "{stderr}");
    assert!(
        stderr.contains("gappy.csv, line 7") && stderr.contains("`vr`") && stderr.contains("`abc`"),
        "{stderr}"
    );
    // a truncated COMTRADE .dat is reported through ingest with the .dat's name (the reader's
    // own checks, including a channel count that disagrees with the data, are in comtrade.rs)
    let times: Vec<f64> = (0..100).map(|k| k as f64 / 1000.0).collect();
    let mut rec = Recording::new("ST", "DEV", 50.0, times);
    for name in ["VA", "VB", "VC", "IA", "IB", "IC"] {
        rec.analog
            .push(AnalogChannel::new(name, "pu", vec![0.5; 100]));
    }
    let cfg = dir.path().join("short.cfg");
    write_comtrade(
        &rec,
        &cfg,
        &ComtradeWriteConfig::new(Revision::R1999).unwrap(),
    )
    .unwrap();
    let dat = dir.path().join("short.dat");
    let text = std::fs::read_to_string(&dat).unwrap();
    std::fs::write(&dat, &text[..text.len() / 2]).unwrap();
    std::fs::write(
        dir.path().join("short.toml"),
        r#"
[[recording]]
name = "short"
file = "short.cfg"
format = "comtrade"
s_base_mva = 1.0
v_base_kv = 1.0
[recording.three_phase]
va = "VA"
vb = "VB"
vc = "VC"
ia = "IA"
ib = "IB"
ic = "IC"
"#,
    )
    .unwrap();
    let (code, _, stderr) = run_cli(dir.path(), &["ingest", "--map", "short.toml", "--out", "o"]);
    assert_eq!(code, 2, "{stderr}");
    assert!(
        stderr.contains("short.dat") && stderr.contains("truncated"),
        "{stderr}"
    );
}

#[test]
fn the_example_mapping_parses() {
    let path = common::repo_root().join("demo-models/recordings-map.toml");
    let mapping = Mapping::load(&path).unwrap();
    assert_eq!(mapping.recordings.len(), 2);
    assert!((mapping.gaps.max_gap_s() - 0.01).abs() < 1e-15);
    assert_eq!(mapping.gaps.method(), GapMethod::Omp);
    assert_eq!(mapping.recordings[1].extra["breaker"], "CB_state");
}

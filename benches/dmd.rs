//! DMD with control on a residual-sized data set: 8 channels × 30 delays × 2000 samples, 2 inputs.
//! Run with `cargo bench --bench dmd`. A second part fits a demo-like residual set (2 current
//! channels, 6 delays, 5 terminal inputs, 12 traces × 800 samples side by side) with our DMDc and
//! with PyDMD's DMDc on the same data in the same run, and prints the ratio (PyDMD through the
//! reference venv: `UNDERSTUDY_REFERENCE_PYTHON` or `.venv-reference/bin/python`; skipped with a
//! message when absent).

use criterion::{criterion_group, criterion_main, Criterion};
use nalgebra::{DMatrix, DVector};
use understudy::residual::dmd::{delay_embed, fit_dmdc, DmdConfig, RankSelection};

/// A stable 8-channel response of a random-ish 12-state system to 2 inputs, with a little
/// deterministic "noise" (no RNG so the bench data are the same everywhere).
fn synthetic(channels: usize, inputs: usize, samples: usize) -> (DMatrix<f64>, DMatrix<f64>) {
    let states = 12;
    let a = DMatrix::from_fn(states, states, |i, j| {
        if i == j {
            0.97 - 0.01 * i as f64
        } else {
            0.02 * ((i * 7 + j * 3) as f64).sin()
        }
    });
    let b = DMatrix::from_fn(states, inputs, |i, j| ((i + 2 * j) as f64).cos());
    let c = DMatrix::from_fn(channels, states, |i, j| ((i * 5 + j) as f64 * 0.3).sin());
    let u = DMatrix::from_fn(inputs, samples, |j, k| {
        if (k / 150 + j) % 3 == 0 {
            1.0
        } else {
            ((k as f64) * 0.01 * (j + 1) as f64).sin()
        }
    });
    let mut x = DVector::zeros(states);
    let mut y = DMatrix::zeros(channels, samples);
    for k in 0..samples {
        let noise = DVector::from_fn(channels, |i, _| 1e-3 * ((k * 31 + i * 17) as f64).sin());
        y.set_column(k, &(&c * &x + noise));
        x = &a * &x + &b * u.column(k);
    }
    (y, u)
}

fn bench_dmdc(criterion: &mut Criterion) {
    let (series, inputs) = synthetic(8, 2, 2000);
    let embedded = delay_embed(&series, &inputs, 30, 1).expect("embedding");
    let config = DmdConfig::default()
        .with_rank(RankSelection::HardThreshold { noise: None })
        .expect("rank")
        .with_augmented_rank(RankSelection::HardThreshold { noise: None })
        .expect("augmented rank");
    let mut group = criterion.benchmark_group("dmdc");
    group.sample_size(10);
    group.bench_function("8ch_30delays_2000samples_unknown_b", |bench| {
        bench.iter(|| fit_dmdc(&embedded.states, &embedded.inputs, 1e-3, &config).expect("fit"))
    });
    group.finish();
}

fn reference_python() -> Option<std::path::PathBuf> {
    let p = std::env::var_os("UNDERSTUDY_REFERENCE_PYTHON")
        .map(std::path::PathBuf::from)
        .unwrap_or_else(|| {
            std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join(".venv-reference/bin/python")
        });
    p.exists().then_some(p)
}

fn rows(m: &DMatrix<f64>) -> Vec<Vec<f64>> {
    (0..m.nrows())
        .map(|i| m.row(i).iter().copied().collect())
        .collect()
}

/// Our DMDc against PyDMD's on a demo-like residual set, same data, same ranks, one run.
fn compare_with_pydmd(_: &mut Criterion) {
    use std::io::Write;
    let (series, inputs) = synthetic(2, 5, 12 * 800);
    let embedded = delay_embed(&series, &inputs, 6, 1).expect("embedding");
    let rank = 10;
    let config = DmdConfig::default()
        .with_rank(RankSelection::Fixed(rank))
        .expect("rank");
    let repeats = 7;
    let mut times = Vec::new();
    for _ in 0..repeats {
        let start = std::time::Instant::now();
        let fit = fit_dmdc(&embedded.states, &embedded.inputs, 1e-3, &config).expect("fit");
        times.push(start.elapsed().as_secs_f64());
        std::hint::black_box(fit);
    }
    times.sort_by(f64::total_cmp);
    let ours = times[repeats / 2];
    println!(
        "dmdc demo-like set ({}×{} snapshots, rank {rank}): understudy {:.3} ms (median of {repeats})",
        embedded.states.nrows(),
        embedded.states.ncols(),
        ours * 1e3
    );
    let Some(python) = reference_python() else {
        println!("PyDMD comparison skipped: no reference venv (set UNDERSTUDY_REFERENCE_PYTHON)");
        return;
    };
    let script =
        std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/reference/bench_dmdc.py");
    let request = serde_json::json!({
        "snapshots": rows(&embedded.states),
        "inputs": rows(&embedded.inputs),
        "svd_rank": rank,
        "repeats": repeats,
    });
    let mut child = match std::process::Command::new(&python)
        .arg(&script)
        .stdin(std::process::Stdio::piped())
        .stdout(std::process::Stdio::piped())
        .spawn()
    {
        Ok(c) => c,
        Err(e) => {
            println!(
                "PyDMD comparison skipped: cannot run {}: {e}",
                python.display()
            );
            return;
        }
    };
    child
        .stdin
        .take()
        .expect("piped")
        .write_all(request.to_string().as_bytes())
        .expect("write request");
    let out = child.wait_with_output().expect("PyDMD run");
    let Ok(answer) = serde_json::from_slice::<serde_json::Value>(&out.stdout) else {
        println!("PyDMD comparison skipped: the reference script failed");
        return;
    };
    let theirs = answer["seconds"].as_f64().unwrap_or(f64::NAN);
    println!(
        "dmdc demo-like set: PyDMD {:.3} ms; PyDMD / understudy = {:.2}",
        theirs * 1e3,
        theirs / ours
    );
}

criterion_group!(benches, bench_dmdc, compare_with_pydmd);
criterion_main!(benches);

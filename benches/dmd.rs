//! DMD with control on a residual-sized data set: 8 channels × 30 delays × 2000 samples, 2 inputs.
//! Rust side only; run with `cargo bench --bench dmd`.

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

criterion_group!(benches, bench_dmdc);
criterion_main!(benches);

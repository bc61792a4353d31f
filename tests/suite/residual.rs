//! Residual-modelling numerics (src/residual): DCT, compressed sensing, DMD with control.
//! Each external check names its source; reference scripts live in tests/reference/residual_*.py.

use nalgebra::{DMatrix, DVector};
use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde_json::json;
use understudy::residual::dct::{dct, idct};
use understudy::residual::dmd::{
    delay_embed, fit_dmd, fit_dmdc, fit_dmdc_known_b, hard_threshold_known_noise,
    hard_threshold_unknown_noise, hard_threshold_unknown_noise_approx, select_rank, Complex64,
    ContinuousModel, DmdConfig, LinearModel, RankSelection,
};
use understudy::residual::sparse::{
    compress, fista, omp, recover_from_samples, FistaSettings, LinearOperator, OmpSettings,
    RecoveryMethod, SparseConfig,
};
use understudy::residual::ResidualError;

use crate::common;

fn gaussian(rng: &mut ChaCha8Rng) -> f64 {
    // Box–Muller (common practice)
    let u1: f64 = rng.random::<f64>().max(1e-300);
    let u2: f64 = rng.random();
    (-2.0 * u1.ln()).sqrt() * (2.0 * std::f64::consts::PI * u2).cos()
}

fn random_matrix(rng: &mut ChaCha8Rng, rows: usize, cols: usize) -> DMatrix<f64> {
    DMatrix::from_fn(rows, cols, |_, _| gaussian(rng))
}

fn rows_json(m: &DMatrix<f64>) -> serde_json::Value {
    json!((0..m.nrows())
        .map(|i| m.row(i).iter().copied().collect::<Vec<f64>>())
        .collect::<Vec<_>>())
}

fn matrix_from_json(v: &serde_json::Value) -> DMatrix<f64> {
    let rows: Vec<Vec<f64>> = serde_json::from_value(v.clone()).unwrap();
    DMatrix::from_fn(rows.len(), rows[0].len(), |i, j| rows[i][j])
}

fn sorted(mut values: Vec<Complex64>) -> Vec<Complex64> {
    values.sort_by(|p, q| p.re.total_cmp(&q.re).then(p.im.total_cmp(&q.im)));
    values
}

fn full_rank() -> DmdConfig {
    DmdConfig::default()
        .with_rank(RankSelection::Full)
        .unwrap()
        .with_enforce_stability(false)
}

// ------------------------------------------------------------------------------------- DCT

#[test]
fn dct_of_1234_is_the_published_value() {
    // scipy.fft.dct([1, 2, 3, 4], norm='ortho') = [5, -2.2304425, 0, -0.1585127]
    let c = dct(&[1.0, 2.0, 3.0, 4.0]).unwrap();
    let expected = [5.0, -2.2304425, 0.0, -0.1585127];
    for (a, b) in c.iter().zip(expected) {
        assert!((a - b).abs() < 1e-7, "{c:?}");
    }
}

#[test]
fn dct_matches_scipy_for_odd_even_and_prime_lengths() {
    let mut rng = ChaCha8Rng::seed_from_u64(11);
    let lengths = [1usize, 2, 7, 16, 31, 97, 100, 257];
    let vectors: Vec<Vec<f64>> = lengths
        .iter()
        .map(|&n| (0..n).map(|_| gaussian(&mut rng)).collect())
        .collect();
    for v in &vectors {
        let back = idct(&dct(v).unwrap()).unwrap();
        for (a, b) in back.iter().zip(v) {
            assert!((a - b).abs() < 1e-12, "round trip, n = {}", v.len());
        }
    }
    // scipy.fft.dct / scipy.fft.idct with norm="ortho"
    if let Some(r) = common::run_reference("residual_dct.py", &json!({ "vectors": vectors })) {
        let forward: Vec<Vec<f64>> = serde_json::from_value(r["dct"].clone()).unwrap();
        let inverse: Vec<Vec<f64>> = serde_json::from_value(r["idct"].clone()).unwrap();
        assert_eq!(
            (forward.len(), inverse.len()),
            (vectors.len(), vectors.len())
        );
        for ((v, f), i) in vectors.iter().zip(&forward).zip(&inverse) {
            let ours_f = dct(v).unwrap();
            let ours_i = idct(v).unwrap();
            for k in 0..v.len() {
                assert!(
                    (ours_f[k] - f[k]).abs() < 1e-12,
                    "dct n = {} k = {k}",
                    v.len()
                );
                assert!(
                    (ours_i[k] - i[k]).abs() < 1e-12,
                    "idct n = {} k = {k}",
                    v.len()
                );
            }
        }
    }
}

// ----------------------------------------------------------------------- compressed sensing

/// N = 256, support {3, 10, 17, 40, 90}, m = 64 Gaussian measurements (entries N(0, 1/m)).
fn sensing_problem() -> (DMatrix<f64>, Vec<f64>, Vec<f64>) {
    let (n, m) = (256, 64);
    let mut rng = ChaCha8Rng::seed_from_u64(2024);
    let a = random_matrix(&mut rng, m, n) / (m as f64).sqrt();
    let mut x = vec![0.0; n];
    for (&j, &v) in [3usize, 10, 17, 40, 90]
        .iter()
        .zip(&[1.0, -0.7, 0.5, 0.3, -0.2])
    {
        x[j] = v;
    }
    let mut b = vec![0.0; m];
    LinearOperator::apply(&a, &x, &mut b);
    (a, x, b)
}

#[test]
fn omp_recovers_the_support_and_matches_scikit_learn() {
    let (a, x_true, b) = sensing_problem();
    let solution = omp(&a, &b, &OmpSettings::new(5).unwrap()).unwrap();
    let mut support = solution.support.clone();
    support.sort_unstable();
    assert_eq!(support, vec![3, 10, 17, 40, 90]);
    for (u, v) in solution.coefficients.iter().zip(&x_true) {
        assert!((u - v).abs() < 1e-10);
    }
    // FISTA on the same problem (λ = 0.01, well below the smallest entry 0.2)
    let lambda = 0.01;
    let settings = FistaSettings::new(lambda)
        .unwrap()
        .with_tolerance(1e-13)
        .unwrap()
        .with_max_iterations(200_000)
        .unwrap();
    let lasso = fista(&a, &b, &settings).unwrap();
    assert!(lasso.converged, "FISTA hit the iteration limit");
    assert_eq!(lasso.support, vec![3, 10, 17, 40, 90]);
    // scikit-learn OrthogonalMatchingPursuit(n_nonzero_coefs=5, fit_intercept=False) and
    // Lasso(alpha=λ/m, fit_intercept=False, tol=1e-14, max_iter=1e6)
    let input = json!({ "a": rows_json(&a), "b": b, "k": 5, "lambda": lambda });
    if let Some(r) = common::run_reference("residual_sparse.py", &input) {
        let sk_omp: Vec<f64> = serde_json::from_value(r["omp"].clone()).unwrap();
        let sk_lasso: Vec<f64> = serde_json::from_value(r["lasso"].clone()).unwrap();
        assert_eq!((sk_omp.len(), sk_lasso.len()), (256, 256));
        let max_lasso_difference = (0..256)
            .map(|j| (lasso.coefficients[j] - sk_lasso[j]).abs())
            .fold(0.0, f64::max);
        eprintln!(
            "FISTA: {} iterations, max |x − x_sklearn| = {max_lasso_difference:.2e}",
            lasso.iterations
        );
        for j in 0..sk_omp.len() {
            assert!(
                (solution.coefficients[j] - sk_omp[j]).abs() < 1e-10,
                "omp j = {j}"
            );
            // both solvers stop near the same unique minimiser: FISTA on a relative step of
            // 1e-13 (with restart it converges linearly once the support settles), coordinate
            // descent on a duality gap of 1e-14·‖b‖²/m; measured differences are ~1e-13, so
            // 1e-9 leaves room for other BLAS builds without hiding a wrong minimiser
            assert!(
                (lasso.coefficients[j] - sk_lasso[j]).abs() < 1e-9,
                "lasso j = {j}: {} vs {}",
                lasso.coefficients[j],
                sk_lasso[j]
            );
        }
    }
}

#[test]
fn a_dct_sparse_trace_is_recovered_from_random_samples() {
    let n = 512;
    let mut coefficients = vec![0.0; n];
    for (&k, &v) in [2usize, 15, 40, 77].iter().zip(&[3.0, -1.5, 1.0, 0.5]) {
        coefficients[k] = v;
    }
    let trace = idct(&coefficients).unwrap();
    let mut rng = ChaCha8Rng::seed_from_u64(5);
    let mut indices: Vec<usize> = (0..n).collect();
    // partial Fisher–Yates: 80 distinct random samples
    for i in 0..80 {
        let j = rng.random_range(i..n);
        indices.swap(i, j);
    }
    indices.truncate(80);
    indices.sort_unstable();
    let values: Vec<f64> = indices.iter().map(|&i| trace[i]).collect();
    let norm = trace.iter().map(|v| v * v).sum::<f64>().sqrt();
    let error = |recovered: &[f64]| {
        recovered
            .iter()
            .zip(&trace)
            .map(|(a, b)| (a - b) * (a - b))
            .sum::<f64>()
            .sqrt()
            / norm
    };
    let by_omp = recover_from_samples(
        n,
        &indices,
        &values,
        &RecoveryMethod::Omp(OmpSettings::new(4).unwrap()),
    )
    .unwrap();
    assert!(
        error(&by_omp.signal) < 1e-10,
        "OMP error {}",
        error(&by_omp.signal)
    );
    let by_fista = recover_from_samples(
        n,
        &indices,
        &values,
        &RecoveryMethod::Fista(
            FistaSettings::new(1e-4)
                .unwrap()
                .with_max_iterations(50_000)
                .unwrap(),
        ),
    )
    .unwrap();
    // the ℓ1 penalty shrinks each coefficient by about λ·n/m; far below 1e-3 here
    assert!(
        error(&by_fista.signal) < 1e-3,
        "FISTA error {}",
        error(&by_fista.signal)
    );

    // compression keeps exactly the 4 coefficients and reports a tiny error
    let c = compress(&trace, 4.0 / n as f64).unwrap();
    let mut kept = c.kept_indices.clone();
    kept.sort_unstable();
    assert_eq!(kept, vec![2, 15, 40, 77]);
    assert!(c.relative_error < 1e-13);
    assert!((c.kept_fraction - 4.0 / 512.0).abs() < 1e-15);
    // and a coarser compression reports the error of what it dropped (Parseval): dropping the
    // 0.5 coefficient leaves sqrt(0.25 / (9 + 2.25 + 1 + 0.25))
    let c3 = compress(&trace, 3.0 / n as f64).unwrap();
    assert!((c3.relative_error - (0.25f64 / 12.5).sqrt()).abs() < 1e-12);
}

// --------------------------------------------------------------------------------- DMD

fn simulate(a: &DMatrix<f64>, x0: &[f64], steps: usize) -> DMatrix<f64> {
    let mut out = DMatrix::zeros(a.nrows(), steps);
    let mut x = DVector::from_column_slice(x0);
    for k in 0..steps {
        out.set_column(k, &x);
        x = a * &x;
    }
    out
}

#[test]
fn exact_dmd_finds_the_analytic_eigenvalues_of_a_rotation() {
    // A = [[0.9, −0.2], [0.2, 0.9]] has eigenvalues 0.9 ± 0.2i (analytic)
    let a = DMatrix::from_row_slice(2, 2, &[0.9, -0.2, 0.2, 0.9]);
    let snapshots = simulate(&a, &[1.0, 0.0], 21);
    let fit = fit_dmd(&snapshots, 0.1, &full_rank()).unwrap();
    let eig = sorted(fit.eigenvalues.clone());
    assert!(
        (eig[0] - Complex64::new(0.9, -0.2)).norm() < 1e-12,
        "{eig:?}"
    );
    assert!(
        (eig[1] - Complex64::new(0.9, 0.2)).norm() < 1e-12,
        "{eig:?}"
    );
    // the model reproduces the snapshots: y = C z, z⁺ = A z
    let mut z = fit.model.c.transpose() * snapshots.column(0);
    for k in 1..21 {
        z = fit.model.step(&z, &DVector::zeros(0));
        assert!((&fit.model.c * &z - snapshots.column(k)).norm() < 1e-12);
    }
}

#[test]
fn exact_dmd_matches_pydmd_on_random_stable_systems() {
    let mut rng = ChaCha8Rng::seed_from_u64(99);
    let mut cases = Vec::new();
    let mut ours_all = Vec::new();
    for trial in 0..3 {
        let n = 6;
        // A = Q D Q⁻¹ with known eigenvalues 0.95e^{±0.3i}, 0.8e^{±1.1i}, 0.6, −0.3 (analytic)
        let mut d = DMatrix::zeros(n, n);
        let pairs = [(0.95, 0.3), (0.8, 1.1)];
        for (p, &(radius, angle)) in pairs.iter().enumerate() {
            let (re, im) = (radius * f64::cos(angle), radius * f64::sin(angle));
            d[(2 * p, 2 * p)] = re;
            d[(2 * p, 2 * p + 1)] = im;
            d[(2 * p + 1, 2 * p)] = -im;
            d[(2 * p + 1, 2 * p + 1)] = re;
        }
        d[(4, 4)] = 0.6;
        d[(5, 5)] = -0.3;
        let q = DMatrix::identity(n, n) + 0.3 * random_matrix(&mut rng, n, n);
        let a = &q * d * q.clone().try_inverse().unwrap();
        let x0: Vec<f64> = (0..n).map(|_| gaussian(&mut rng)).collect();
        let snapshots = simulate(&a, &x0, 40);
        let fit = fit_dmd(
            &snapshots,
            0.02,
            &full_rank().with_rank(RankSelection::Fixed(6)).unwrap(),
        )
        .unwrap();
        let ours = sorted(fit.eigenvalues.clone());
        let mut analytic = vec![Complex64::new(0.6, 0.0), Complex64::new(-0.3, 0.0)];
        for &(radius, angle) in &pairs {
            analytic.push(Complex64::from_polar(radius, angle));
            analytic.push(Complex64::from_polar(radius, -angle));
        }
        for (o, e) in ours.iter().zip(sorted(analytic)) {
            assert!((o - e).norm() < 1e-8, "trial {trial}: {o} vs {e}");
        }
        cases.push(json!({ "kind": "dmd", "snapshots": rows_json(&snapshots), "svd_rank": 6 }));
        ours_all.push(ours);
    }
    // PyDMD DMD(svd_rank=6, exact=True)
    if let Some(r) = common::run_reference("residual_dmd.py", &json!({ "cases": cases })) {
        for (trial, ours) in ours_all.iter().enumerate() {
            let theirs: Vec<[f64; 2]> =
                serde_json::from_value(r["results"][trial]["eigenvalues"].clone()).unwrap();
            assert_eq!(theirs.len(), ours.len());
            for (o, t) in ours.iter().zip(&theirs) {
                assert!(
                    (o - Complex64::new(t[0], t[1])).norm() < 1e-8,
                    "trial {trial}: {o} vs {t:?}"
                );
            }
        }
    }
}

/// Proctor, Brunton & Kutz 2016, Section 3 example: A = diag(1.5, 0.1), B = (1, 0)ᵀ, feedback
/// u = −x₁, x₀ = (4, 7).
fn feedback_example() -> (DMatrix<f64>, DMatrix<f64>, DMatrix<f64>) {
    let steps = 10;
    let a = DMatrix::from_row_slice(2, 2, &[1.5, 0.0, 0.0, 0.1]);
    let b = DMatrix::from_row_slice(2, 1, &[1.0, 0.0]);
    let mut x = DMatrix::zeros(2, steps);
    let mut u = DMatrix::zeros(1, steps - 1);
    x.set_column(0, &DVector::from_vec(vec![4.0, 7.0]));
    for k in 0..steps - 1 {
        u[(0, k)] = -x[(0, k)];
        let next = &a * x.column(k) + &b * u.column(k);
        x.set_column(k + 1, &next);
    }
    (x, u, b)
}

#[test]
fn dmd_with_known_input_matrix_recovers_the_unstable_open_loop() {
    let (x, u, b) = feedback_example();
    // plain DMD sees the closed loop A + BK = diag(0.5, 0.1) (Proctor et al. 2016, Section 3)
    let plain = sorted(fit_dmd(&x, 1.0, &full_rank()).unwrap().eigenvalues);
    assert!(
        (plain[0] - Complex64::new(0.1, 0.0)).norm() < 1e-10,
        "{plain:?}"
    );
    assert!(
        (plain[1] - Complex64::new(0.5, 0.0)).norm() < 1e-10,
        "{plain:?}"
    );
    // DMDc with known B recovers diag(1.5, 0.1)
    let config = DmdConfig::default().with_rank(RankSelection::Full).unwrap();
    let fit = fit_dmdc_known_b(&x, &u, &b, 1.0, &config).unwrap();
    let eig = sorted(fit.eigenvalues.clone());
    assert!(
        (eig[0] - Complex64::new(0.1, 0.0)).norm() < 1e-10,
        "{eig:?}"
    );
    assert!(
        (eig[1] - Complex64::new(1.5, 0.0)).norm() < 1e-10,
        "{eig:?}"
    );
    // the default stability enforcement moved 1.5 onto 0.999 and left 0.1
    assert_eq!(fit.stability.moved.len(), 1);
    assert!((fit.stability.moved[0].before - Complex64::new(1.5, 0.0)).norm() < 1e-10);
    assert!((fit.stability.moved[0].after - Complex64::new(0.999, 0.0)).norm() < 1e-10);
    let after = sorted(fit.model.eigenvalues().unwrap());
    assert!((after[0] - Complex64::new(0.1, 0.0)).norm() < 1e-10);
    assert!((after[1] - Complex64::new(0.999, 0.0)).norm() < 1e-10);
    // PyDMD DMDc(svd_rank=-1).fit(X, I, B=B)
    let input = json!({ "cases": [{
        "kind": "dmdc_known", "snapshots": rows_json(&x), "inputs": rows_json(&u),
        "b": rows_json(&b), "svd_rank": -1
    }]});
    if let Some(r) = common::run_reference("residual_dmd.py", &input) {
        let r = &r["results"][0];
        let theirs: Vec<[f64; 2]> = serde_json::from_value(r["eigenvalues"].clone()).unwrap();
        assert_eq!(theirs.len(), 2);
        for (o, t) in eig.iter().zip(&theirs) {
            assert!(
                (o - Complex64::new(t[0], t[1])).norm() < 1e-8,
                "{o} vs {t:?}"
            );
        }
    }
}

#[test]
fn dmd_with_unknown_input_matrix_recovers_a_and_b() {
    let mut rng = ChaCha8Rng::seed_from_u64(7);
    let a = DMatrix::from_row_slice(3, 3, &[0.8, 0.3, 0.0, -0.3, 0.8, 0.1, 0.0, 0.0, 0.5]);
    let b = DMatrix::from_row_slice(3, 2, &[1.0, 0.0, 0.0, 0.5, 0.2, -1.0]);
    let steps = 30;
    let u = random_matrix(&mut rng, 2, steps - 1);
    let mut x = DMatrix::zeros(3, steps);
    x.set_column(0, &DVector::from_vec(vec![1.0, -1.0, 0.5]));
    for k in 0..steps - 1 {
        let next = &a * x.column(k) + &b * u.column(k);
        x.set_column(k + 1, &next);
    }
    let fit = fit_dmdc(&x, &u, 0.01, &full_rank()).unwrap();
    let m = &fit.model;
    let a_full = &m.c * &m.a * m.c.transpose();
    let b_full = &m.c * &m.b;
    assert!((&a_full - &a).norm() < 1e-9, "A = {a_full}");
    assert!((&b_full - &b).norm() < 1e-9, "B = {b_full}");
    // PyDMD DMDc(svd_rank=-1, svd_rank_omega=-1).fit(X, I)
    let input = json!({ "cases": [{
        "kind": "dmdc_unknown", "snapshots": rows_json(&x), "inputs": rows_json(&u),
        "svd_rank": -1, "svd_rank_omega": -1
    }]});
    if let Some(r) = common::run_reference("residual_dmd.py", &input) {
        let r = &r["results"][0];
        let theirs: Vec<[f64; 2]> = serde_json::from_value(r["eigenvalues"].clone()).unwrap();
        assert_eq!(theirs.len(), 3);
        for (o, t) in sorted(fit.eigenvalues.clone()).iter().zip(&theirs) {
            assert!(
                (o - Complex64::new(t[0], t[1])).norm() < 1e-8,
                "{o} vs {t:?}"
            );
        }
        let their_b = matrix_from_json(&r["b"]);
        assert!((&b_full - their_b).norm() < 1e-8);
    }
}

#[test]
fn delay_embedded_dmdc_reproduces_a_second_order_response() {
    // y(k+1) = 1.6 y(k) − 0.8 y(k−1) + 0.5 u(k): one channel, two delays (from memory: a
    // lightly damped second-order difference equation)
    let samples = 60;
    let mut rng = ChaCha8Rng::seed_from_u64(3);
    let u = DMatrix::from_fn(1, samples, |_, _| gaussian(&mut rng));
    let mut y = DMatrix::zeros(1, samples);
    for k in 1..samples - 1 {
        y[(0, k + 1)] = 1.6 * y[(0, k)] - 0.8 * y[(0, k - 1)] + 0.5 * u[(0, k)];
    }
    let embedded = delay_embed(&y, &u, 2, 1).unwrap();
    let fit = fit_dmdc(&embedded.states, &embedded.inputs, 0.01, &full_rank()).unwrap();
    let eig = sorted(fit.eigenvalues.clone());
    // characteristic roots of z² − 1.6 z + 0.8: 0.8 ± 0.4i
    assert!(
        (eig[0] - Complex64::new(0.8, -0.4)).norm() < 1e-9,
        "{eig:?}"
    );
    assert!((eig[1] - Complex64::new(0.8, 0.4)).norm() < 1e-9, "{eig:?}");
}

// ------------------------------------------------------------------------ hard threshold

#[test]
fn optimal_hard_threshold_finds_rank_three_in_noise() {
    // Gavish & Donoho 2014: λ*(1) = 4/√3
    assert!((hard_threshold_known_noise(1.0) - 4.0 / 3f64.sqrt()).abs() < 1e-14);
    // numerical ω(β) against the cubic approximation (Gavish & Donoho 2014)
    for beta in [0.1, 0.5, 1.0] {
        let d = hard_threshold_unknown_noise(beta) - hard_threshold_unknown_noise_approx(beta);
        assert!(d.abs() < 0.02, "β = {beta}: {d}");
    }
    let mut rng = ChaCha8Rng::seed_from_u64(42);
    let (rows, cols) = (500, 250);
    let left = random_matrix(&mut rng, rows, 3).qr().q();
    let right = random_matrix(&mut rng, cols, 3).qr().q();
    let signal = &left
        * DMatrix::from_diagonal(&DVector::from_vec(vec![30.0, 20.0, 12.0]))
        * right.transpose();
    let sigma = 0.1;
    let noisy = signal + random_matrix(&mut rng, rows, cols) * sigma;
    let s: Vec<f64> = noisy.singular_values().iter().copied().collect();
    let mut s = s;
    s.sort_by(|a, b| b.total_cmp(a));
    let known = select_rank(
        &s,
        rows,
        cols,
        RankSelection::HardThreshold { noise: Some(sigma) },
        "rank",
    )
    .unwrap();
    let unknown = select_rank(
        &s,
        rows,
        cols,
        RankSelection::HardThreshold { noise: None },
        "rank",
    )
    .unwrap();
    assert_eq!(known, 3);
    assert_eq!(unknown, 3);
    // energy fraction, the rule of PyDMD's compute_rank: σ = (3, 2, 1) carry 9/14, 13/14, 1
    let small = [3.0, 2.0, 1.0];
    assert_eq!(
        select_rank(&small, 3, 10, RankSelection::Energy(0.9), "rank").unwrap(),
        2
    );
    assert_eq!(
        select_rank(&small, 3, 10, RankSelection::Energy(0.95), "rank").unwrap(),
        3
    );
    assert_eq!(
        select_rank(&small, 3, 10, RankSelection::Energy(0.5), "rank").unwrap(),
        1
    );
}

// ------------------------------------------------- continuous time and stability enforcement

#[test]
fn continuous_time_conversion_round_trips_a_zoh_discretisation() {
    let mut rng = ChaCha8Rng::seed_from_u64(17);
    let n = 3;
    // modes −1 ± 2i and −0.5 (analytic), in a random basis
    let d = DMatrix::from_row_slice(3, 3, &[-1.0, 2.0, 0.0, -2.0, -1.0, 0.0, 0.0, 0.0, -0.5]);
    let q = DMatrix::identity(n, n) + 0.3 * random_matrix(&mut rng, n, n);
    let a_c = &q * d * q.clone().try_inverse().unwrap();
    let b_c = random_matrix(&mut rng, n, 2);
    let dt = 0.05;
    let continuous = ContinuousModel {
        a: a_c.clone(),
        b: b_c.clone(),
        c: DMatrix::identity(n, n),
    };
    let mut discrete = continuous.discretise(dt);
    // scipy.signal.cont2discrete(method="zoh")
    if let Some(r) = common::run_reference(
        "residual_zoh.py",
        &json!({"a": rows_json(&a_c), "b": rows_json(&b_c), "dt": dt}),
    ) {
        let (a_d, b_d) = (matrix_from_json(&r["a"]), matrix_from_json(&r["b"]));
        assert!((&discrete.a - &a_d).norm() < 1e-12);
        assert!((&discrete.b - &b_d).norm() < 1e-12);
        discrete = LinearModel {
            a: a_d,
            b: b_d,
            c: DMatrix::identity(n, n),
            dt_s: dt,
        };
    }
    let back = discrete.to_continuous().unwrap();
    assert!((&back.a - &a_c).norm() < 1e-9, "A_c = {}", back.a);
    assert!((&back.b - &b_c).norm() < 1e-9, "B_c = {}", back.b);
    // a host stepping with another size gets the exact discretisation of that size
    let coarse = back.discretise(0.2);
    let direct = continuous.discretise(0.2);
    assert!((coarse.a - direct.a).norm() < 1e-9);

    // an eigenvalue on the negative real axis has no real logarithm: the error names it
    let flipped = LinearModel {
        a: DMatrix::from_row_slice(2, 2, &[-0.5, 0.0, 0.0, 0.9]),
        b: DMatrix::zeros(2, 0),
        c: DMatrix::identity(2, 2),
        dt_s: dt,
    };
    let err = flipped.to_continuous().unwrap_err();
    assert!(
        matches!(err, ResidualError::NoRealLogarithm { index: 0, .. }),
        "{err}"
    );
    assert!(err.to_string().contains("negative real axis"));
}

#[test]
fn stability_enforcement_moves_only_the_unstable_eigenvalue() {
    let mut rng = ChaCha8Rng::seed_from_u64(23);
    let d = DMatrix::from_row_slice(
        4,
        4,
        &[
            1.2, 0.0, 0.0, 0.0, 0.0, 0.5, 0.0, 0.0, 0.0, 0.0, 0.3, 0.4, 0.0, 0.0, -0.4, 0.3,
        ],
    );
    let q = DMatrix::identity(4, 4) + 0.3 * random_matrix(&mut rng, 4, 4);
    let model = LinearModel {
        a: &q * d * q.clone().try_inverse().unwrap(),
        b: DMatrix::from_fn(4, 1, |i, _| i as f64),
        c: DMatrix::identity(4, 4),
        dt_s: 0.01,
    };
    let (stable, report) = model.enforce_stability(0.999).unwrap();
    assert_eq!(report.moved.len(), 1);
    assert!((report.moved[0].before - Complex64::new(1.2, 0.0)).norm() < 1e-10);
    assert!((report.moved[0].after - Complex64::new(0.999, 0.0)).norm() < 1e-10);
    assert!((report.spectral_radius - 0.999).abs() < 1e-10);
    let after = sorted(stable.eigenvalues().unwrap());
    let expected = sorted(vec![
        Complex64::new(0.999, 0.0),
        Complex64::new(0.5, 0.0),
        Complex64::new(0.3, 0.4),
        Complex64::new(0.3, -0.4),
    ]);
    for (a, e) in after.iter().zip(&expected) {
        assert!((a - e).norm() < 1e-10, "{a} vs {e}");
    }
    assert_eq!(stable.b, model.b);
}

// --------------------------------------------------------------------------------- bad input

#[test]
fn bad_input_is_rejected_naming_the_setting() {
    for bad in [0.0, 1.5] {
        let err = SparseConfig::default().with_keep_fraction(bad).unwrap_err();
        assert!(err.to_string().contains("keep_fraction"), "{err}");
        assert!(compress(&[1.0, 2.0], bad)
            .unwrap_err()
            .to_string()
            .contains("keep_fraction"));
        let err = DmdConfig::default().with_keep_modes(bad).unwrap_err();
        assert!(err.to_string().contains("keep_modes"), "{err}");
    }
    // NaN in a trace: the error names the index
    let err = compress(&[1.0, 2.0, f64::NAN], 0.5).unwrap_err();
    assert!(
        matches!(err, ResidualError::NonFinite { index: 2, .. }),
        "{err}"
    );
    let err = recover_from_samples(
        8,
        &[0, 3],
        &[1.0, f64::NAN],
        &RecoveryMethod::Omp(OmpSettings::new(1).unwrap()),
    )
    .unwrap_err();
    assert!(err.to_string().contains("index 1"), "{err}");
    // NaN in snapshots: row and column named
    let mut snapshots = DMatrix::from_fn(3, 10, |i, j| (i + j) as f64);
    snapshots[(1, 4)] = f64::NAN;
    let err = fit_dmd(&snapshots, 0.1, &DmdConfig::default()).unwrap_err();
    assert!(
        matches!(
            err,
            ResidualError::NonFiniteMatrix {
                row: 1,
                column: 4,
                ..
            }
        ),
        "{err}"
    );
    // rank larger than the data
    let snapshots = simulate(
        &DMatrix::from_row_slice(2, 2, &[0.9, -0.2, 0.2, 0.9]),
        &[1.0, 0.0],
        21,
    );
    let config = DmdConfig::default()
        .with_rank(RankSelection::Fixed(3))
        .unwrap();
    let err = fit_dmd(&snapshots, 0.1, &config).unwrap_err();
    assert!(
        matches!(
            err,
            ResidualError::RankTooLarge {
                setting: "rank",
                requested: 3,
                max: 2
            }
        ),
        "{err}"
    );
    assert!(DmdConfig::default()
        .with_rank(RankSelection::Fixed(0))
        .unwrap_err()
        .to_string()
        .contains("rank"));
    // a sample index outside the trace
    let err = recover_from_samples(
        4,
        &[1, 9],
        &[0.0, 0.0],
        &RecoveryMethod::Omp(OmpSettings::new(1).unwrap()),
    )
    .unwrap_err();
    assert!(
        matches!(
            err,
            ResidualError::SampleIndexOutOfRange { index: 9, n: 4, .. }
        ),
        "{err}"
    );
}

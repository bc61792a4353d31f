//! Dynamic mode decomposition: exact DMD and DMD with control, delay embedding, rank selection by
//! the optimal hard threshold, stability enforcement and conversion to continuous time.
//!
//! Data are snapshot matrices: one row per channel (state), one column per sample, equally spaced
//! by `dt_s` seconds. The fitted correction is a real linear system in a reduced coordinate z
//! (the POD basis of the snapshots, or the real modal basis of the kept modes):
//! `z⁺ = A z + B u`, `y = C z`, with `y` the (full) snapshot vector.
//!
//! The general (non-symmetric) eigendecomposition comes from `faer`: nalgebra offers complex
//! eigenvalues of a general matrix but no eigenvectors, and DMD needs both (modes, amplitudes,
//! and rebuilding A after moving eigenvalues). faer also supplies the thin SVD, which is much
//! faster than nalgebra's on the wide snapshot matrices of delay embeddings.

use nalgebra::{Complex, DMatrix, DVector};

use super::sparse::check_fraction;
use super::{check_finite_matrix, ResidualError};

/// Complex number type of eigenvalues and modes.
pub type Complex64 = Complex<f64>;

/// How to choose the truncation rank of an SVD.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum RankSelection {
    /// Exactly this rank (an error when the data cannot support it).
    Fixed(usize),
    /// The optimal hard threshold of Gavish & Donoho (2014), with the noise level σ of each
    /// entry when known, or estimated from the median singular value when `None`.
    HardThreshold { noise: Option<f64> },
    /// The smallest rank whose singular values carry this fraction of Σσ² (in (0, 1]).
    Energy(f64),
    /// The numerical rank of the data.
    Full,
}

/// Settings of DMD fits.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct DmdConfig {
    rank: RankSelection,
    augmented_rank: RankSelection,
    keep_modes: f64,
    stability_margin: f64,
    enforce_stability: bool,
}

impl Default for DmdConfig {
    fn default() -> Self {
        Self {
            rank: RankSelection::HardThreshold { noise: None },
            augmented_rank: RankSelection::Full,
            keep_modes: 1.0,
            stability_margin: 0.999,
            enforce_stability: true,
        }
    }
}

fn check_rank_selection(
    setting: &'static str,
    selection: RankSelection,
) -> Result<(), ResidualError> {
    match selection {
        RankSelection::Fixed(0) => Err(ResidualError::InvalidSetting {
            setting,
            value: 0.0,
            expected: "a rank of at least 1",
        }),
        RankSelection::Energy(f) => check_fraction(setting, f),
        RankSelection::HardThreshold { noise: Some(s) } if !(s.is_finite() && s > 0.0) => {
            Err(ResidualError::InvalidSetting {
                setting: "noise",
                value: s,
                expected: "a positive noise level (standard deviation per entry)",
            })
        }
        _ => Ok(()),
    }
}

impl DmdConfig {
    /// Truncation of the state basis (the SVD of X, or of Y for DMDc with unknown B).
    pub fn with_rank(mut self, rank: RankSelection) -> Result<Self, ResidualError> {
        check_rank_selection("rank", rank)?;
        self.rank = rank;
        Ok(self)
    }
    /// Truncation of the SVD of the stacked `[X; Υ]` (DMDc with unknown B only); default: full.
    pub fn with_augmented_rank(mut self, rank: RankSelection) -> Result<Self, ResidualError> {
        check_rank_selection("augmented_rank", rank)?;
        self.augmented_rank = rank;
        Ok(self)
    }
    /// Fraction of the modes (ranked by energy) kept in the model, in (0, 1]; conjugate pairs
    /// are kept together, so slightly more may be kept.
    pub fn with_keep_modes(mut self, keep_modes: f64) -> Result<Self, ResidualError> {
        check_fraction("keep_modes", keep_modes)?;
        self.keep_modes = keep_modes;
        Ok(self)
    }
    /// Largest eigenvalue modulus allowed after fitting, in (0, 1]; default 0.999.
    pub fn with_stability_margin(mut self, margin: f64) -> Result<Self, ResidualError> {
        if !(margin.is_finite() && margin > 0.0 && margin <= 1.0) {
            return Err(ResidualError::InvalidSetting {
                setting: "stability_margin",
                value: margin,
                expected: "an eigenvalue modulus in (0, 1]",
            });
        }
        self.stability_margin = margin;
        Ok(self)
    }
    /// Whether to move eigenvalues outside the margin after fitting (default true).
    pub fn with_enforce_stability(mut self, enforce: bool) -> Self {
        self.enforce_stability = enforce;
        self
    }
    pub fn rank(&self) -> RankSelection {
        self.rank
    }
    pub fn keep_modes(&self) -> f64 {
        self.keep_modes
    }
    pub fn stability_margin(&self) -> f64 {
        self.stability_margin
    }
}

// ---------------------------------------------------------------------------------------------
// Optimal hard threshold (Gavish & Donoho, IEEE Trans. Inf. Theory 60(8), 2014)
// ---------------------------------------------------------------------------------------------

/// λ*(β) = sqrt(2(β+1) + 8β / ((β+1) + sqrt(β² + 14β + 1))): the threshold coefficient for a
/// known noise level, τ = λ*(β)·√n·σ for an n×m matrix with β = m/n ≤ 1
/// (Gavish & Donoho 2014).
pub fn hard_threshold_known_noise(beta: f64) -> f64 {
    (2.0 * (beta + 1.0) + 8.0 * beta / ((beta + 1.0) + (beta * beta + 14.0 * beta + 1.0).sqrt()))
        .sqrt()
}

/// The median of the Marchenko–Pastur distribution with aspect ratio β ∈ (0, 1], found by
/// bisection on its cumulative distribution. The density
/// f(t) = sqrt((b − t)(t − a)) / (2πβt) on [a, b], a = (1 − √β)², b = (1 + √β)², is integrated
/// after the substitution t = (a+b)/2 − (b−a)/2·cos φ, which removes the square-root endpoint
/// singularities (composite Simpson, 2000 panels).
pub fn marchenko_pastur_median(beta: f64) -> f64 {
    assert!(beta > 0.0 && beta <= 1.0, "aspect ratio must be in (0, 1]");
    let a = (1.0 - beta.sqrt()).powi(2);
    let b = (1.0 + beta.sqrt()).powi(2);
    let (mid, half) = (0.5 * (a + b), 0.5 * (b - a));
    // integrand in φ: f(t(φ)) · dt/dφ = (half·sin φ)² / (2πβ t(φ))
    let integrand = |phi: f64| {
        let t = mid - half * phi.cos();
        if t <= 0.0 {
            // β = 1, φ = 0: t ≈ half·φ²/2 and (half·sin φ)² ≈ half²·φ², so the limit is
            // half / (πβ)
            return half / (std::f64::consts::PI * beta);
        }
        (half * phi.sin()).powi(2) / (2.0 * std::f64::consts::PI * beta * t)
    };
    let cdf_to = |upper: f64| {
        let panels = 2000;
        let h = upper / panels as f64;
        let mut sum = integrand(0.0) + integrand(upper);
        for i in 1..panels {
            let weight = if i % 2 == 1 { 4.0 } else { 2.0 };
            sum += weight * integrand(i as f64 * h);
        }
        sum * h / 3.0
    };
    let (mut lo, mut hi) = (0.0, std::f64::consts::PI);
    for _ in 0..60 {
        let m = 0.5 * (lo + hi);
        if cdf_to(m) < 0.5 {
            lo = m;
        } else {
            hi = m;
        }
    }
    mid - half * (0.5 * (lo + hi)).cos()
}

/// ω(β) = λ*(β) / sqrt(μ_β): the threshold coefficient for unknown noise, τ = ω(β)·median(σ_i)
/// (Gavish & Donoho 2014), with μ_β computed numerically.
pub fn hard_threshold_unknown_noise(beta: f64) -> f64 {
    hard_threshold_known_noise(beta) / marchenko_pastur_median(beta).sqrt()
}

/// The cubic approximation ω(β) ≈ 0.56β³ − 0.95β² + 1.82β + 1.43 (Gavish & Donoho 2014).
pub fn hard_threshold_unknown_noise_approx(beta: f64) -> f64 {
    0.56 * beta.powi(3) - 0.95 * beta.powi(2) + 1.82 * beta + 1.43
}

/// Pick a rank from singular values (descending) of a `rows × cols` matrix. `setting` names the
/// setting in errors.
pub fn select_rank(
    singular_values: &[f64],
    rows: usize,
    cols: usize,
    selection: RankSelection,
    setting: &'static str,
) -> Result<usize, ResidualError> {
    check_rank_selection(setting, selection)?;
    let max_rank = rows.min(cols).min(singular_values.len());
    let largest = singular_values.first().copied().unwrap_or(0.0);
    // numerical rank (common practice: as numpy.linalg.matrix_rank)
    let tiny = largest * rows.max(cols) as f64 * f64::EPSILON;
    let numerical_rank = singular_values.iter().filter(|&&s| s > tiny).count();
    if numerical_rank == 0 {
        return Err(ResidualError::TooLittleData {
            what: "snapshots (nonzero singular values)",
            got: 0,
            needed: 1,
        });
    }
    let rank = match selection {
        RankSelection::Fixed(r) => {
            if r > max_rank {
                return Err(ResidualError::RankTooLarge {
                    setting,
                    requested: r,
                    max: max_rank,
                });
            }
            if r > numerical_rank {
                return Err(ResidualError::RankTooLarge {
                    setting,
                    requested: r,
                    max: numerical_rank,
                });
            }
            r
        }
        RankSelection::Full => numerical_rank,
        RankSelection::Energy(fraction) => {
            // as PyDMD's compute_rank: first r whose cumulative energy reaches the fraction
            let total: f64 = singular_values.iter().map(|s| s * s).sum();
            let mut cumulative = 0.0;
            let mut r = singular_values.len();
            for (i, s) in singular_values.iter().enumerate() {
                cumulative += s * s / total;
                if cumulative >= fraction {
                    r = i + 1;
                    break;
                }
            }
            r.min(numerical_rank)
        }
        RankSelection::HardThreshold { noise } => {
            let (small, large) = (rows.min(cols) as f64, rows.max(cols) as f64);
            let beta = small / large;
            let threshold = match noise {
                // Gavish & Donoho 2014: τ = λ*(β) √n σ, n the larger dimension
                Some(sigma) => hard_threshold_known_noise(beta) * large.sqrt() * sigma,
                // Gavish & Donoho 2014: τ = ω(β) · median singular value
                None => {
                    let mut sorted: Vec<f64> = singular_values[..max_rank].to_vec();
                    sorted.sort_by(f64::total_cmp);
                    let k = sorted.len();
                    let median = if k % 2 == 1 {
                        sorted[k / 2]
                    } else {
                        0.5 * (sorted[k / 2 - 1] + sorted[k / 2])
                    };
                    hard_threshold_unknown_noise(beta) * median
                }
            };
            // a pure-noise matrix gives 0; keep the leading direction so a model exists
            singular_values
                .iter()
                .filter(|&&s| s > threshold)
                .count()
                .clamp(1, numerical_rank)
        }
    };
    Ok(rank)
}

// ---------------------------------------------------------------------------------------------
// Linear algebra helpers (faer for SVD and eigendecomposition)
// ---------------------------------------------------------------------------------------------

struct ThinSvd {
    u: DMatrix<f64>,
    s: Vec<f64>,
    v: DMatrix<f64>,
}

impl ThinSvd {
    fn truncate(&self, r: usize) -> (DMatrix<f64>, Vec<f64>, DMatrix<f64>) {
        (
            self.u.columns(0, r).into_owned(),
            self.s[..r].to_vec(),
            self.v.columns(0, r).into_owned(),
        )
    }
}

fn thin_svd(m: &DMatrix<f64>) -> Result<ThinSvd, ResidualError> {
    let f = faer::Mat::<f64>::from_fn(m.nrows(), m.ncols(), |i, j| m[(i, j)]);
    let svd = f.thin_svd().map_err(|_| ResidualError::Decomposition {
        what: "singular value decomposition of the snapshots",
    })?;
    let (u, v) = (svd.U(), svd.V());
    let s = svd.S().column_vector();
    Ok(ThinSvd {
        u: DMatrix::from_fn(u.nrows(), u.ncols(), |i, j| u[(i, j)]),
        s: (0..s.nrows()).map(|i| s[i]).collect(),
        v: DMatrix::from_fn(v.nrows(), v.ncols(), |i, j| v[(i, j)]),
    })
}

/// Eigendecomposition of a real square matrix, with the eigenvectors also in real block form:
/// a real eigenvalue λ keeps its (real) eigenvector; a pair a ± ib with eigenvector u ± iv keeps
/// the columns [u, v], for which A [u v] = [u v] [[a, b], [−b, a]].
struct RealEigen {
    values: Vec<Complex64>,
    /// Eigenvectors, unit 2-norm.
    vectors: DMatrix<Complex64>,
    /// Real basis [.., u, v, ..], one or two columns per block.
    basis: DMatrix<f64>,
    /// Start column of each block, and whether it is a conjugate pair.
    blocks: Vec<(usize, bool)>,
}

fn real_eigen(a: &DMatrix<f64>) -> Result<RealEigen, ResidualError> {
    let n = a.nrows();
    let f = faer::Mat::<f64>::from_fn(n, n, |i, j| a[(i, j)]);
    let eig = f.eigen().map_err(|_| ResidualError::Decomposition {
        what: "eigendecomposition of the reduced operator",
    })?;
    let (s, u) = (eig.S().column_vector(), eig.U());
    let mut values: Vec<Complex64> = (0..n).map(|i| Complex64::new(s[i].re, s[i].im)).collect();
    let mut vectors = DMatrix::from_fn(n, n, |i, j| Complex64::new(u[(i, j)].re, u[(i, j)].im));
    let mut basis = DMatrix::zeros(n, n);
    let mut blocks = Vec::new();
    let mut j = 0;
    while j < n {
        let scale = vectors.column(j).norm();
        if scale > 0.0 {
            vectors.column_mut(j).unscale_mut(scale);
        }
        if values[j].im == 0.0 {
            // faer returns real eigenvalues of a real matrix with exactly zero imaginary part
            for i in 0..n {
                basis[(i, j)] = vectors[(i, j)].re;
            }
            blocks.push((j, false));
            j += 1;
        } else {
            if j + 1 >= n {
                return Err(ResidualError::Decomposition {
                    what: "eigendecomposition (unpaired complex eigenvalue)",
                });
            }
            // faer stores a conjugate pair in consecutive columns; make them exact conjugates
            values[j + 1] = values[j].conj();
            for i in 0..n {
                let w = vectors[(i, j)];
                vectors[(i, j + 1)] = w.conj();
                basis[(i, j)] = w.re;
                basis[(i, j + 1)] = w.im;
            }
            blocks.push((j, true));
            j += 2;
        }
    }
    Ok(RealEigen {
        values,
        vectors,
        basis,
        blocks,
    })
}

fn condition_number(m: &DMatrix<f64>) -> f64 {
    let s = m.clone().svd(false, false).singular_values;
    let (max, min) = s
        .iter()
        .fold((0.0_f64, f64::INFINITY), |(a, b), &x| (a.max(x), b.min(x)));
    if min == 0.0 {
        f64::INFINITY
    } else {
        max / min
    }
}

/// Eigenvector matrices more ill-conditioned than this cannot be trusted to rebuild a matrix.
const MAX_EIGENVECTOR_CONDITION: f64 = 1e10;

impl RealEigen {
    /// V f(Λ) V⁻¹ in real arithmetic, for a function with f(conj λ) = conj f(λ).
    fn rebuild(
        &self,
        f: impl Fn(Complex64) -> Complex64,
        purpose: &'static str,
    ) -> Result<DMatrix<f64>, ResidualError> {
        let n = self.basis.nrows();
        let condition = condition_number(&self.basis);
        if condition > MAX_EIGENVECTOR_CONDITION {
            return Err(ResidualError::IllConditionedEigenvectors { purpose, condition });
        }
        let mut block = DMatrix::zeros(n, n);
        for &(j, pair) in &self.blocks {
            let value = f(self.values[j]);
            if pair {
                block[(j, j)] = value.re;
                block[(j, j + 1)] = value.im;
                block[(j + 1, j)] = -value.im;
                block[(j + 1, j + 1)] = value.re;
            } else {
                block[(j, j)] = value.re;
            }
        }
        let inverse =
            self.basis
                .clone()
                .try_inverse()
                .ok_or(ResidualError::IllConditionedEigenvectors {
                    purpose,
                    condition: f64::INFINITY,
                })?;
        Ok(&self.basis * block * inverse)
    }
}

// ---------------------------------------------------------------------------------------------
// The fitted linear system
// ---------------------------------------------------------------------------------------------

/// A discrete-time linear system `z⁺ = A z + B u`, `y = C z`, sampled every `dt_s` seconds.
#[derive(Debug, Clone, PartialEq)]
pub struct LinearModel {
    /// r × r.
    pub a: DMatrix<f64>,
    /// r × l (l = 0 without inputs).
    pub b: DMatrix<f64>,
    /// n × r: maps the reduced coordinate to the snapshot vector.
    pub c: DMatrix<f64>,
    pub dt_s: f64,
}

/// An eigenvalue moved by stability enforcement.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct MovedEigenvalue {
    pub before: Complex64,
    pub after: Complex64,
}

/// What stability enforcement did.
#[derive(Debug, Clone, PartialEq)]
pub struct StabilityReport {
    pub margin: f64,
    /// Empty when the fit was already stable (or enforcement was off).
    pub moved: Vec<MovedEigenvalue>,
    /// Largest eigenvalue modulus of the final A.
    pub spectral_radius: f64,
}

/// The continuous-time equivalent `dz/dt = A_c z + B_c u`, `y = C z` of a [`LinearModel`], with the
/// input held constant over each sample (zero-order hold).
#[derive(Debug, Clone, PartialEq)]
pub struct ContinuousModel {
    pub a: DMatrix<f64>,
    pub b: DMatrix<f64>,
    pub c: DMatrix<f64>,
}

impl LinearModel {
    /// State dimension r.
    pub fn order(&self) -> usize {
        self.a.nrows()
    }

    /// One step: returns z⁺.
    ///
    /// # Panics
    /// On dimension mismatches.
    pub fn step(&self, z: &DVector<f64>, u: &DVector<f64>) -> DVector<f64> {
        if self.b.ncols() == 0 {
            &self.a * z
        } else {
            &self.a * z + &self.b * u
        }
    }

    /// Eigenvalues of A.
    pub fn eigenvalues(&self) -> Result<Vec<Complex64>, ResidualError> {
        Ok(real_eigen(&self.a)?.values)
    }

    /// Scale every eigenvalue of modulus above `margin` radially onto `margin`, rebuild A from the
    /// modified eigendecomposition (real), and report what moved.
    pub fn enforce_stability(
        &self,
        margin: f64,
    ) -> Result<(LinearModel, StabilityReport), ResidualError> {
        if !(margin.is_finite() && margin > 0.0 && margin <= 1.0) {
            return Err(ResidualError::InvalidSetting {
                setting: "stability_margin",
                value: margin,
                expected: "an eigenvalue modulus in (0, 1]",
            });
        }
        let eig = real_eigen(&self.a)?;
        let moved: Vec<MovedEigenvalue> = eig
            .values
            .iter()
            .filter(|v| v.norm() > margin)
            .map(|&v| MovedEigenvalue {
                before: v,
                after: v * (margin / v.norm()),
            })
            .collect();
        let spectral_radius =
            |values: &[Complex64]| values.iter().map(|v| v.norm()).fold(0.0, f64::max);
        if moved.is_empty() {
            let radius = spectral_radius(&eig.values);
            return Ok((
                self.clone(),
                StabilityReport {
                    margin,
                    moved,
                    spectral_radius: radius,
                },
            ));
        }
        let a = eig.rebuild(
            |v| {
                if v.norm() > margin {
                    v * (margin / v.norm())
                } else {
                    v
                }
            },
            "stabilise the correction",
        )?;
        // check the rebuilt matrix: rounding in an ill-conditioned basis could undo the move
        let after = real_eigen(&a)?.values;
        for (index, v) in after.iter().enumerate() {
            if v.norm() > margin * (1.0 + 1e-9) {
                return Err(ResidualError::Unstabilisable {
                    index,
                    modulus: v.norm(),
                    margin,
                });
            }
        }
        Ok((
            LinearModel { a, ..self.clone() },
            StabilityReport {
                margin,
                moved,
                spectral_radius: spectral_radius(&after),
            },
        ))
    }

    /// The continuous-time equivalent: A_c = V diag(ln λ / Δt) V⁻¹ (principal logarithm, real
    /// because eigenvalues come in conjugate pairs), and, for a zero-order hold on the input,
    /// B_c from B = A_c⁻¹ (A − I) B_c, i.e. B_c = V diag(ln λ / (Δt (λ − 1))) V⁻¹ B (standard
    /// ZOH relation, e.g. Franklin, Powell & Workman, Digital Control of Dynamic Systems;
    /// the factor tends to 1/Δt as λ → 1, so an integrator is fine).
    ///
    /// Errors when an eigenvalue is zero or on the negative real axis: no real logarithm exists.
    /// Make every eigenvalue have a real logarithm, so that [`to_continuous`](Self::to_continuous)
    /// exists: a real eigenvalue λ ≤ 0 (a mode that flips sign every sample, at the Nyquist
    /// frequency, or a dead-beat one) becomes max(|λ|, `floor`), a mode that decays as fast but
    /// does not alternate. Returns the model and the moved eigenvalues (for the report).
    pub fn without_negative_real(
        &self,
        floor: f64,
    ) -> Result<(LinearModel, Vec<MovedEigenvalue>), ResidualError> {
        let eig = real_eigen(&self.a)?;
        let radius = eig.values.iter().map(|v| v.norm()).fold(0.0, f64::max);
        let bad = |v: Complex64| v.im.abs() <= 1e-12 * radius.max(1.0) && v.re <= floor;
        let moved: Vec<MovedEigenvalue> = eig
            .values
            .iter()
            .filter(|v| bad(**v))
            .map(|&v| MovedEigenvalue {
                before: v,
                after: Complex64::new(v.re.abs().max(floor), 0.0),
            })
            .collect();
        if moved.is_empty() {
            return Ok((self.clone(), moved));
        }
        let a = eig.rebuild(
            |v| {
                if bad(v) {
                    Complex64::new(v.re.abs().max(floor), 0.0)
                } else {
                    v
                }
            },
            "move eigenvalues off the negative real axis",
        )?;
        Ok((LinearModel { a, ..self.clone() }, moved))
    }

    pub fn to_continuous(&self) -> Result<ContinuousModel, ResidualError> {
        let eig = real_eigen(&self.a)?;
        let radius = eig.values.iter().map(|v| v.norm()).fold(0.0, f64::max);
        for (index, v) in eig.values.iter().enumerate() {
            let reason = if v.norm() <= 1e-12 * radius.max(1.0) {
                Some("it is zero")
            } else if v.re < 0.0 && v.im.abs() <= 1e-12 * v.norm() {
                Some("it lies on the negative real axis")
            } else {
                None
            };
            if let Some(reason) = reason {
                return Err(ResidualError::NoRealLogarithm {
                    index,
                    re: v.re,
                    im: v.im,
                    reason,
                    dt_s: self.dt_s,
                });
            }
        }
        let dt = self.dt_s;
        let a = eig.rebuild(|v| v.ln() / dt, "convert to continuous time")?;
        let b = if self.b.ncols() == 0 {
            self.b.clone()
        } else {
            let zoh = eig.rebuild(|v| log_ratio(v) / dt, "convert to continuous time")?;
            zoh * &self.b
        };
        Ok(ContinuousModel {
            a,
            b,
            c: self.c.clone(),
        })
    }
}

/// ln(λ) / (λ − 1), continued by its series 1 − h/2 + h²/3 − h³/4 near λ = 1 (h = λ − 1).
fn log_ratio(v: Complex64) -> Complex64 {
    let h = v - Complex64::new(1.0, 0.0);
    if h.norm() < 1e-5 {
        Complex64::new(1.0, 0.0) - h / 2.0 + h * h / 3.0 - h * h * h / 4.0
    } else {
        v.ln() / h
    }
}

impl ContinuousModel {
    /// The discrete system for a step of `dt_s` seconds with zero-order hold on the input:
    /// [[A_d, B_d], [0, I]] = exp([[A_c, B_c], [0, 0]]·Δt) (Van Loan, IEEE Trans. Autom. Control
    /// 1978).
    pub fn discretise(&self, dt_s: f64) -> LinearModel {
        let (r, l) = (self.a.nrows(), self.b.ncols());
        let mut augmented = DMatrix::zeros(r + l, r + l);
        augmented
            .view_mut((0, 0), (r, r))
            .copy_from(&(&self.a * dt_s));
        if l > 0 {
            augmented
                .view_mut((0, r), (r, l))
                .copy_from(&(&self.b * dt_s));
        }
        let e = expm(&augmented);
        LinearModel {
            a: e.view((0, 0), (r, r)).into_owned(),
            b: e.view((0, r), (r, l)).into_owned(),
            c: self.c.clone(),
            dt_s,
        }
    }
}

/// Matrix exponential by scaling and squaring with a degree-18 Taylor polynomial
/// (Moler & Van Loan, SIAM Review 2003; the scaled norm ≤ 1/2 bounds the truncation
/// error by 0.5¹⁹/19! ≈ 1e-23 relative).
pub fn expm(m: &DMatrix<f64>) -> DMatrix<f64> {
    let n = m.nrows();
    let norm_1 = (0..n)
        .map(|j| m.column(j).iter().map(|x| x.abs()).sum::<f64>())
        .fold(0.0, f64::max);
    let squarings = if norm_1 > 0.5 {
        (norm_1 / 0.5).log2().ceil() as i32
    } else {
        0
    };
    let scaled = m / 2f64.powi(squarings);
    let mut result = DMatrix::identity(n, n);
    let mut term = DMatrix::identity(n, n);
    for k in 1..=18 {
        term = &term * &scaled / k as f64;
        result += &term;
    }
    for _ in 0..squarings {
        result = &result * &result;
    }
    result
}

// ---------------------------------------------------------------------------------------------
// Fits
// ---------------------------------------------------------------------------------------------

/// A DMD fit: the model (after mode selection and stability enforcement) and the spectral
/// quantities of the fitted reduced operator for reports.
#[derive(Debug, Clone, PartialEq)]
pub struct DmdFit {
    pub model: LinearModel,
    /// Eigenvalues of the fitted reduced operator Ã, before mode selection and enforcement.
    pub eigenvalues: Vec<Complex64>,
    /// DMD modes Φ (n × r), one column per eigenvalue, as in exact DMD (Tu et al. 2014).
    pub modes: DMatrix<Complex64>,
    /// Amplitudes b = Φ⁺ x₀.
    pub amplitudes: Vec<Complex64>,
    /// Energy of each mode's coordinate over the snapshots: Σ_k |α_k|², α = W⁻¹ Uᵀ x_k with unit
    /// eigenvectors W; the ranking used by `keep_modes`.
    pub mode_energy: Vec<f64>,
    /// Indices (into `eigenvalues`) of the modes kept in `model`.
    pub kept_modes: Vec<usize>,
    /// Singular values of the decomposed data matrix (X, or [X; Υ] for unknown B).
    pub singular_values: Vec<f64>,
    /// The truncation rank of the state basis.
    pub rank: usize,
    pub stability: StabilityReport,
}

fn check_snapshots(snapshots: &DMatrix<f64>) -> Result<(), ResidualError> {
    check_finite_matrix("snapshots", snapshots)?;
    if snapshots.ncols() < 2 || snapshots.nrows() == 0 {
        return Err(ResidualError::TooLittleData {
            what: "snapshots (columns)",
            got: snapshots.ncols(),
            needed: 2,
        });
    }
    Ok(())
}

/// The inputs aligned with X = snapshots[:, ..T−1]: accepts l × T (last column unused) or
/// l × (T − 1).
fn aligned_inputs(inputs: &DMatrix<f64>, samples: usize) -> Result<DMatrix<f64>, ResidualError> {
    check_finite_matrix("inputs", inputs)?;
    if inputs.ncols() + 1 < samples || inputs.ncols() > samples {
        return Err(ResidualError::TooLittleData {
            what: "inputs (columns, one per snapshot or one per transition)",
            got: inputs.ncols(),
            needed: samples - 1,
        });
    }
    Ok(inputs.columns(0, samples - 1).into_owned())
}

fn check_dt(dt_s: f64) -> Result<(), ResidualError> {
    if dt_s.is_finite() && dt_s > 0.0 {
        Ok(())
    } else {
        Err(ResidualError::InvalidSetting {
            setting: "dt_s",
            value: dt_s,
            expected: "a positive sample time in seconds",
        })
    }
}

/// Exact DMD (Tu et al., J. Comput. Dyn. 2014, Algorithm 2) of `snapshots` (n × T).
pub fn fit_dmd(
    snapshots: &DMatrix<f64>,
    dt_s: f64,
    config: &DmdConfig,
) -> Result<DmdFit, ResidualError> {
    check_snapshots(snapshots)?;
    check_dt(dt_s)?;
    let t = snapshots.ncols();
    let x = snapshots.columns(0, t - 1).into_owned();
    let y = snapshots.columns(1, t - 1).into_owned();
    let svd = thin_svd(&x)?;
    let r = select_rank(&svd.s, x.nrows(), x.ncols(), config.rank, "rank")?;
    let (u, s, v) = svd.truncate(r);
    // Tu et al. 2014, Algorithm 2: Ã = Uᵀ Y V Σ⁻¹, modes Φ = Y V Σ⁻¹ W
    let y_v_sinv =
        &y * &v * DMatrix::from_diagonal(&DVector::from_iterator(r, s.iter().map(|x| 1.0 / x)));
    let a_tilde = u.transpose() * &y_v_sinv;
    let b_tilde = DMatrix::zeros(r, 0);
    finish_fit(
        snapshots, &x, u, a_tilde, b_tilde, y_v_sinv, svd.s, r, dt_s, config,
    )
}

/// DMD with control and a KNOWN input matrix `b` (n × l) (Proctor, Brunton & Kutz, SIAM J. Appl.
/// Dyn. Syst. 2016, Section 3.1): the DMD of Y − BΥ on the POD basis of X.
pub fn fit_dmdc_known_b(
    snapshots: &DMatrix<f64>,
    inputs: &DMatrix<f64>,
    b: &DMatrix<f64>,
    dt_s: f64,
    config: &DmdConfig,
) -> Result<DmdFit, ResidualError> {
    check_snapshots(snapshots)?;
    check_dt(dt_s)?;
    check_finite_matrix("b", b)?;
    let t = snapshots.ncols();
    let upsilon = aligned_inputs(inputs, t)?;
    assert_eq!(b.nrows(), snapshots.nrows(), "B needs one row per channel");
    assert_eq!(b.ncols(), upsilon.nrows(), "B needs one column per input");
    let x = snapshots.columns(0, t - 1).into_owned();
    let y_free = snapshots.columns(1, t - 1).into_owned() - b * &upsilon;
    let svd = thin_svd(&x)?;
    let r = select_rank(&svd.s, x.nrows(), x.ncols(), config.rank, "rank")?;
    let (u, s, v) = svd.truncate(r);
    // Proctor et al. 2016, Section 3.1: Ã = Uᵀ (Y − BΥ) V Σ⁻¹, B̃ = Uᵀ B
    let y_v_sinv = &y_free
        * &v
        * DMatrix::from_diagonal(&DVector::from_iterator(r, s.iter().map(|x| 1.0 / x)));
    let a_tilde = u.transpose() * &y_v_sinv;
    let b_tilde = u.transpose() * b;
    finish_fit(
        snapshots, &x, u, a_tilde, b_tilde, y_v_sinv, svd.s, r, dt_s, config,
    )
}

/// DMD with control and an UNKNOWN input matrix (Proctor, Brunton & Kutz 2016, Section 3.2): the
/// SVD of the stacked Ω = [X; Υ] (truncated by `augmented_rank`) gives [A B] ≈ Y Ṽ Σ̃⁻¹ Ũᵀ, which
/// is projected on the POD basis Û of Y (truncated by `rank`).
pub fn fit_dmdc(
    snapshots: &DMatrix<f64>,
    inputs: &DMatrix<f64>,
    dt_s: f64,
    config: &DmdConfig,
) -> Result<DmdFit, ResidualError> {
    check_snapshots(snapshots)?;
    check_dt(dt_s)?;
    let t = snapshots.ncols();
    let n = snapshots.nrows();
    let upsilon = aligned_inputs(inputs, t)?;
    let l = upsilon.nrows();
    let x = snapshots.columns(0, t - 1).into_owned();
    let y = snapshots.columns(1, t - 1).into_owned();
    let mut omega = DMatrix::zeros(n + l, t - 1);
    omega.rows_mut(0, n).copy_from(&x);
    omega.rows_mut(n, l).copy_from(&upsilon);
    let svd_omega = thin_svd(&omega)?;
    let p = select_rank(
        &svd_omega.s,
        omega.nrows(),
        omega.ncols(),
        config.augmented_rank,
        "augmented_rank",
    )?;
    let (u_omega, s_omega, v_omega) = svd_omega.truncate(p);
    let u1 = u_omega.rows(0, n).into_owned();
    let u2 = u_omega.rows(n, l).into_owned();
    let svd_y = thin_svd(&y)?;
    let r = select_rank(&svd_y.s, y.nrows(), y.ncols(), config.rank, "rank")?;
    let u_hat = svd_y.u.columns(0, r).into_owned();
    // Proctor et al. 2016, Section 3.2: Ã = Ûᵀ Y Ṽ Σ̃⁻¹ Ũ₁ᵀ Û, B̃ = Ûᵀ Y Ṽ Σ̃⁻¹ Ũ₂ᵀ
    let y_v_sinv = &y
        * &v_omega
        * DMatrix::from_diagonal(&DVector::from_iterator(p, s_omega.iter().map(|x| 1.0 / x)));
    let a_full_on_u = &y_v_sinv * u1.transpose() * &u_hat; // n × r
    let a_tilde = u_hat.transpose() * &a_full_on_u;
    let b_tilde = u_hat.transpose() * &y_v_sinv * u2.transpose();
    // modes Φ = Y Ṽ Σ̃⁻¹ Ũ₁ᵀ Û W (Proctor et al. 2016, Section 3.2)
    finish_fit(
        snapshots,
        &x,
        u_hat,
        a_tilde,
        b_tilde,
        a_full_on_u,
        svd_omega.s,
        r,
        dt_s,
        config,
    )
}

/// Shared tail of the fits: eigendecomposition, modes, amplitudes, mode energies, mode
/// selection, stability enforcement. `mode_map` is the n × r matrix M with Φ = M W.
#[allow(clippy::too_many_arguments)]
fn finish_fit(
    snapshots: &DMatrix<f64>,
    x: &DMatrix<f64>,
    basis: DMatrix<f64>,
    a_tilde: DMatrix<f64>,
    b_tilde: DMatrix<f64>,
    mode_map: DMatrix<f64>,
    singular_values: Vec<f64>,
    rank: usize,
    dt_s: f64,
    config: &DmdConfig,
) -> Result<DmdFit, ResidualError> {
    let eig = real_eigen(&a_tilde)?;
    let n = snapshots.nrows();
    let modes = mode_map.map(|v| Complex64::new(v, 0.0)) * &eig.vectors;
    // amplitudes b = Φ⁺ x₀ (least squares, as PyDMD)
    let x0 = DVector::from_iterator(
        n,
        snapshots.column(0).iter().map(|&v| Complex64::new(v, 0.0)),
    );
    let amplitudes: Vec<Complex64> = modes
        .clone()
        .svd(true, true)
        .solve(&x0, 1e-14)
        .map(|b| b.iter().copied().collect())
        .unwrap_or_else(|_| vec![Complex64::new(0.0, 0.0); rank]);
    // modal coordinates of the projected snapshots: α = W⁻¹ Uᵀ X, via the real basis
    let projected = basis.transpose() * x;
    let basis_inverse = eig.basis.clone().try_inverse();
    let mode_energy: Vec<f64> = match &basis_inverse {
        Some(inverse) => {
            let real_coordinates = inverse * &projected; // rows: [Re α_j ; −Im α_j ...] per block
            let mut energy = vec![0.0; rank];
            for &(j, pair) in &eig.blocks {
                if pair {
                    // w = u + iv, α_j = (c_u − i c_v)/2 ⇒ |α_j|² = (c_u² + c_v²)/4, same for the partner
                    let e = (real_coordinates.row(j).norm_squared()
                        + real_coordinates.row(j + 1).norm_squared())
                        / 4.0;
                    energy[j] = e;
                    energy[j + 1] = e;
                } else {
                    energy[j] = real_coordinates.row(j).norm_squared();
                }
            }
            energy
        }
        None => amplitudes.iter().map(|a| a.norm_sqr()).collect(),
    };
    // mode selection: the most energetic ceil(keep·r) modes, conjugate partners kept together
    let keep = ((config.keep_modes * rank as f64).ceil() as usize).clamp(1, rank);
    let mut block_order: Vec<usize> = (0..eig.blocks.len()).collect();
    block_order
        .sort_by(|&p, &q| mode_energy[eig.blocks[q].0].total_cmp(&mode_energy[eig.blocks[p].0]));
    let mut kept_blocks = Vec::new();
    let mut kept_count = 0;
    for &k in &block_order {
        if kept_count >= keep {
            break;
        }
        kept_blocks.push(k);
        kept_count += if eig.blocks[k].1 { 2 } else { 1 };
    }
    let mut model = if kept_count == rank {
        LinearModel {
            a: a_tilde,
            b: b_tilde,
            c: basis,
            dt_s,
        }
    } else {
        // restrict to the kept modal subspace (spectral projection): z' = rows of V⁻¹ for the
        // kept blocks, A' = the real block-diagonal of their eigenvalues
        let inverse = basis_inverse.ok_or(ResidualError::IllConditionedEigenvectors {
            purpose: "select modes",
            condition: f64::INFINITY,
        })?;
        kept_blocks.sort_unstable();
        let columns: Vec<usize> = kept_blocks
            .iter()
            .flat_map(|&k| {
                let (j, pair) = eig.blocks[k];
                if pair {
                    vec![j, j + 1]
                } else {
                    vec![j]
                }
            })
            .collect();
        let q = columns.len();
        let t_right = DMatrix::from_fn(rank, q, |i, c| eig.basis[(i, columns[c])]);
        let t_left = DMatrix::from_fn(q, rank, |c, i| inverse[(columns[c], i)]);
        LinearModel {
            a: &t_left * &a_tilde * &t_right,
            b: &t_left * &b_tilde,
            c: basis * &t_right,
            dt_s,
        }
    };
    let mut kept_modes: Vec<usize> = kept_blocks
        .iter()
        .flat_map(|&k| {
            let (j, pair) = eig.blocks[k];
            if pair {
                vec![j, j + 1]
            } else {
                vec![j]
            }
        })
        .collect();
    kept_modes.sort_unstable();
    let stability = if config.enforce_stability {
        let (stable, report) = model.enforce_stability(config.stability_margin)?;
        model = stable;
        report
    } else {
        StabilityReport {
            margin: config.stability_margin,
            moved: Vec::new(),
            spectral_radius: real_eigen(&model.a)?
                .values
                .iter()
                .map(|v| v.norm())
                .fold(0.0, f64::max),
        }
    };
    Ok(DmdFit {
        model,
        eigenvalues: eig.values,
        modes,
        amplitudes,
        mode_energy,
        kept_modes,
        singular_values,
        rank,
        stability,
    })
}

// ---------------------------------------------------------------------------------------------
// Delay embedding
// ---------------------------------------------------------------------------------------------

/// Delay-embedded (Hankel) snapshots of a multichannel series with inputs.
#[derive(Debug, Clone, PartialEq)]
pub struct DelayEmbedding {
    /// (channels·delays) × (T − delays + 1): column k stacks x(k), x(k+1), …, x(k+delays−1)
    /// (oldest block first, newest block last).
    pub states: DMatrix<f64>,
    /// (inputs·input_delays) × (T − delays + 1): column k stacks u(k+delays−1), u(k+delays−2), …
    /// (newest first), i.e. the input acting on the transition from column k to k + 1.
    pub inputs: DMatrix<f64>,
    pub channels: usize,
    pub delays: usize,
    pub input_delays: usize,
}

impl DelayEmbedding {
    /// The rows of `states` that hold the newest sample, x(k + delays − 1).
    pub fn newest_rows(&self) -> std::ops::Range<usize> {
        (self.delays - 1) * self.channels..self.delays * self.channels
    }
}

/// Delay-embed `series` (channels × T) and `inputs` (l × T; l may be 0) with `delays` ≥ 1 state
/// delays and `input_delays` in 1..=delays input delays.
pub fn delay_embed(
    series: &DMatrix<f64>,
    inputs: &DMatrix<f64>,
    delays: usize,
    input_delays: usize,
) -> Result<DelayEmbedding, ResidualError> {
    check_finite_matrix("series", series)?;
    check_finite_matrix("inputs", inputs)?;
    let (channels, t) = series.shape();
    if delays == 0 {
        return Err(ResidualError::InvalidSetting {
            setting: "delays",
            value: 0.0,
            expected: "at least 1 delay",
        });
    }
    if input_delays == 0 || input_delays > delays {
        return Err(ResidualError::InvalidSetting {
            setting: "input_delays",
            value: input_delays as f64,
            expected: "between 1 and `delays`",
        });
    }
    if inputs.ncols() != t && inputs.nrows() > 0 {
        return Err(ResidualError::TooLittleData {
            what: "inputs (columns, one per sample of the series)",
            got: inputs.ncols(),
            needed: t,
        });
    }
    if t < delays + 1 {
        return Err(ResidualError::TooLittleData {
            what: "series (samples)",
            got: t,
            needed: delays + 1,
        });
    }
    let columns = t - delays + 1;
    let l = inputs.nrows();
    let states = DMatrix::from_fn(channels * delays, columns, |row, k| {
        let (block, channel) = (row / channels, row % channels);
        series[(channel, k + block)]
    });
    let embedded_inputs = DMatrix::from_fn(l * input_delays, columns, |row, k| {
        let (block, input) = (row / l, row % l);
        inputs[(input, k + delays - 1 - block)]
    });
    Ok(DelayEmbedding {
        states,
        inputs: embedded_inputs,
        channels,
        delays,
        input_delays,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn marchenko_pastur_median_of_the_square_case() {
        // Gavish & Donoho 2014: ω(1) ≈ 2.858 for square matrices
        let omega = hard_threshold_unknown_noise(1.0);
        assert!((omega - 2.858).abs() < 1e-3, "{omega}");
        // the Marchenko–Pastur median for β = 1 is ≈ 0.6528 (from memory); the CDF integrates
        // to 1 over the whole support, so the median lies strictly inside [a, b]
        let median = marchenko_pastur_median(1.0);
        assert!((median - 0.6528).abs() < 1e-3, "{median}");
        let m_small = marchenko_pastur_median(0.25);
        assert!(m_small > 0.25 && m_small < 2.25, "{m_small}");
        // the cubic approximation of Gavish & Donoho 2014 is a close fit; 0.02 is our tolerance
        for i in 1..=20 {
            let beta = i as f64 / 20.0;
            let d = hard_threshold_unknown_noise(beta) - hard_threshold_unknown_noise_approx(beta);
            assert!(d.abs() < 0.02, "β = {beta}: {d}");
        }
    }

    #[test]
    fn expm_of_a_rotation() {
        let m = DMatrix::from_row_slice(2, 2, &[0.0, -2.0, 2.0, 0.0]);
        let e = expm(&m);
        let expected =
            DMatrix::from_row_slice(2, 2, &[2f64.cos(), -(2f64.sin()), 2f64.sin(), 2f64.cos()]);
        assert!((e - expected).norm() < 1e-14);
    }

    #[test]
    #[allow(clippy::float_cmp)] // delay embedding copies samples: exact equality is the point
    fn delay_embedding_layout() {
        let series = DMatrix::from_fn(2, 6, |c, k| (10 * c + k) as f64);
        let inputs = DMatrix::from_fn(1, 6, |_, k| 100.0 + k as f64);
        let e = delay_embed(&series, &inputs, 3, 2).unwrap();
        assert_eq!(e.states.shape(), (6, 4));
        // column 1: x(1), x(2), x(3); channel 1 of block 2 is 10 + 3
        assert_eq!(e.states[(5, 1)], 13.0);
        assert_eq!(e.states[(0, 1)], 1.0);
        // inputs of column 1: u(3), u(2)
        assert_eq!(e.inputs[(0, 1)], 103.0);
        assert_eq!(e.inputs[(1, 1)], 102.0);
        assert_eq!(e.newest_rows(), 4..6);
    }

    #[test]
    fn mode_selection_keeps_the_energetic_pair() {
        // block-diagonal: a lightly damped oscillation carrying most energy + a weak real mode
        let a = DMatrix::from_row_slice(3, 3, &[0.95, -0.2, 0.0, 0.2, 0.95, 0.0, 0.0, 0.0, 0.5]);
        let mut snapshots = DMatrix::zeros(3, 30);
        let mut z = DVector::from_vec(vec![1.0, 0.0, 0.01]);
        for k in 0..30 {
            snapshots.set_column(k, &z);
            z = &a * &z;
        }
        let config = DmdConfig::default()
            .with_rank(RankSelection::Fixed(3))
            .unwrap()
            .with_keep_modes(0.5)
            .unwrap();
        let fit = fit_dmd(&snapshots, 0.01, &config).unwrap();
        assert_eq!(fit.model.order(), 2);
        let mut kept = fit.model.eigenvalues().unwrap();
        kept.sort_by(|p, q| p.im.total_cmp(&q.im));
        assert!((kept[0] - Complex64::new(0.95, -0.2)).norm() < 1e-9);
        assert!((kept[1] - Complex64::new(0.95, 0.2)).norm() < 1e-9);
    }
}

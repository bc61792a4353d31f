//! The data-driven correction of the hybrid surrogate: a continuous-time linear system
//!
//! ```text
//! dz/dt = A z + B u,    Δy = C z + D u
//! ```
//!
//! stepped exactly over any host step h by its zero-order-hold discretisation
//! (Φ = e^{Ah}, Γ = ∫₀ʰ e^{As} ds B; the input is held over the step, as a co-simulation host
//! holds it). Per unit on the unit rating throughout.
//!
//! Input u (all relative to the pre-fault operating point fixed at initialisation, so a model at
//! its steady state sees u = 0 and keeps z = 0): the terminal voltage in the frame of the
//! pre-fault voltage angle θ₀ minus its pre-fault value, (v_d − |v₀|, v_q), the grid frequency
//! minus its pre-fault value, the voltage-magnitude deviation scaled by the pre-fault active
//! and reactive power (so one linear system serves different operating points), the dip
//! depth below 0.9 pu, max(0, 0.9 − |v|), minus its pre-fault value, and the physics' own
//! current in the same frame minus its pre-fault value (i_d − p₀/|v₀|, i_q + q₀/|v₀|). Why the
//! dip depth: a converter changes its behaviour when the voltage falls below its ride-through
//! threshold (current limits, reactive-current injection; 0.9 pu is the usual threshold,
//! common practice in grid codes), which a linear function of the voltage cannot express;
//! given as an input feature computed from the terminal voltage, the correction stays a linear
//! system. Why the physics' current: the reduced physics already carries the unit's
//! nonlinearities (limits, ride-through logic, the PLL), so what it misses is often a filtered
//! or rescaled version of what it does (e.g. an active current that recovers more slowly in the
//! detailed unit); the physics does not see the correction, so there is no loop.
//!
//! Each input is held inside the range seen in training before it reaches the correction
//! (`input_range`): a linear map fitted on some faults is not extrapolated to voltages or
//! currents it never saw. The output map may have a second part, C_dip and D_dip, added while
//! the terminal voltage is below 0.9 pu ([`in_dip`]): the same states read differently during a
//! dip than outside one (a switched output map; the dynamics stay linear and stable).
//!
//! Output Δy: the correction of the injected current (Δi_d, Δi_q) in the same pre-fault frame.
//! Why the current and why that frame: the frame is fixed, so the correction does not depend on
//! the phasor angle the host happens to use (a rotated grid gives the same model), and it stays
//! defined when the voltage collapses to zero in a fault (a frame on the present voltage would
//! not). P and Q are then recomputed from the corrected current, S = v·conj(i), so the four
//! outputs stay consistent with each other.

use nalgebra::DMatrix;
use serde::{Deserialize, Serialize};

/// The inputs of the correction, in order (see the module doc).
pub const CORRECTION_INPUTS: [&str; 8] = [
    "v_d - |v0|",
    "v_q",
    "f_grid - f0",
    "p0 * (|v| - |v0|)",
    "q0 * (|v| - |v0|)",
    "max(0, 0.9 - |v|) - max(0, 0.9 - |v0|)",
    "physics i_d - p0/|v0|",
    "physics i_q + q0/|v0|",
];

/// The inputs that carry the physics' current (the rest are terminal quantities).
pub const PHYSICS_INPUTS: std::ops::Range<usize> = 6..8;

/// Number of correction inputs.
pub const N_INPUTS: usize = CORRECTION_INPUTS.len();

/// Ride-through threshold of the dip-depth input (pu; 0.9 pu, common practice in grid codes).
pub const DIP_THRESHOLD_PU: f64 = 0.9;

/// The outputs of the correction, in order: current in the pre-fault voltage frame (pu).
pub const CORRECTION_OUTPUTS: [&str; 2] = ["delta_i_d", "delta_i_q"];

/// The pre-fault operating point the correction's inputs are measured from.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct PreFault {
    /// |v₀| (pu) and the angle θ₀ (rad) of the terminal voltage.
    pub u0: f64,
    pub theta0: f64,
    pub f0: f64,
    pub p0: f64,
    pub q0: f64,
}

impl PreFault {
    /// This operating point with its rotation evaluated once (what a runtime steps with).
    pub fn frame(&self) -> PreFaultFrame {
        let (sin, cos) = self.theta0.sin_cos();
        PreFaultFrame {
            pre_fault: *self,
            sin,
            cos,
        }
    }

    /// The correction's input vector for terminal voltage (v_re, v_im) and frequency f_grid
    /// (see [`PreFaultFrame::input`], THE one definition).
    pub fn input(&self, v_re: f64, v_im: f64, f_grid: f64, physics: (f64, f64)) -> [f64; N_INPUTS] {
        self.frame().input(v_re, v_im, f_grid, physics)
    }

    /// A current correction (Δi_d, Δi_q) in the pre-fault frame, rotated to the network frame.
    pub fn to_network(&self, di_d: f64, di_q: f64) -> (f64, f64) {
        self.frame().to_network(di_d, di_q)
    }

    /// A network-frame current (re, im) in the pre-fault frame (inverse of `to_network`).
    pub fn from_network(&self, i_re: f64, i_im: f64) -> (f64, f64) {
        self.frame().from_network(i_re, i_im)
    }
}

/// A [`PreFault`] with sin θ₀ and cos θ₀ computed once.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct PreFaultFrame {
    pub pre_fault: PreFault,
    sin: f64,
    cos: f64,
}

impl PreFaultFrame {
    /// The correction's input vector for terminal voltage (v_re, v_im) and frequency f_grid.
    /// THE one definition, used by the tool when fitting and by the runtime when stepping.
    pub fn input(&self, v_re: f64, v_im: f64, f_grid: f64, physics: (f64, f64)) -> [f64; N_INPUTS] {
        let (s, c) = (self.sin, self.cos);
        let pf = &self.pre_fault;
        // v·e^{−jθ₀}
        let v_d = v_re * c + v_im * s;
        let v_q = -v_re * s + v_im * c;
        // |v| as √(re² + im²), not hypot: per-unit magnitudes cannot overflow, and hypot's
        // care costs more than the rest of this function
        let u = (v_re * v_re + v_im * v_im).sqrt();
        let du = u - pf.u0;
        let dip = |x: f64| (DIP_THRESHOLD_PU - x).max(0.0);
        [
            v_d - pf.u0,
            v_q,
            f_grid - pf.f0,
            pf.p0 * du,
            pf.q0 * du,
            dip(u) - dip(pf.u0),
            physics.0 * c + physics.1 * s - pf.p0 / pf.u0,
            -physics.0 * s + physics.1 * c + pf.q0 / pf.u0,
        ]
    }

    /// A current correction (Δi_d, Δi_q) in the pre-fault frame, rotated to the network frame.
    pub fn to_network(&self, di_d: f64, di_q: f64) -> (f64, f64) {
        let (s, c) = (self.sin, self.cos);
        (di_d * c - di_q * s, di_d * s + di_q * c)
    }

    /// A network-frame current (re, im) in the pre-fault frame (inverse of `to_network`).
    pub fn from_network(&self, i_re: f64, i_im: f64) -> (f64, f64) {
        let (s, c) = (self.sin, self.cos);
        (i_re * c + i_im * s, -i_re * s + i_im * c)
    }
}

/// A continuous-time correction as stored in a model file (row-major matrices).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Correction {
    /// A: order × order (1/s).
    pub a: Vec<Vec<f64>>,
    /// B: order × inputs (1/s), columns as [`CORRECTION_INPUTS`].
    pub b: Vec<Vec<f64>>,
    /// C: 2 × order, rows as [`CORRECTION_OUTPUTS`].
    pub c: Vec<Vec<f64>>,
    /// D: 2 × inputs (direct feedthrough); absent (empty) means zero.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub d: Vec<Vec<f64>>,
    /// C_dip: 2 × order, added to C while the terminal voltage is below
    /// [`DIP_THRESHOLD_PU`] (see [`in_dip`]); absent (empty) means zero.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub c_dip: Vec<Vec<f64>>,
    /// D_dip: 2 × inputs, added to D in a dip likewise; absent (empty) means zero.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub d_dip: Vec<Vec<f64>>,
    /// Per input, the [min, max] seen in training: inputs are held inside it before they
    /// reach the correction, so it never extrapolates its linear map beyond its data;
    /// absent (empty) means unbounded.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub input_range: Vec<[f64; 2]>,
}

/// Whether the terminal voltage (v_re, v_im) is in a dip: |v| below [`DIP_THRESHOLD_PU`], where
/// the output map C_dip, D_dip is added to C, D.
pub fn in_dip(v_re: f64, v_im: f64) -> bool {
    v_re * v_re + v_im * v_im < DIP_THRESHOLD_PU * DIP_THRESHOLD_PU
}

/// Inputs of a correction written before the physics' current became an input (the first
/// six of [`CORRECTION_INPUTS`]); its B and D are read with zero columns for the rest, which
/// is the same model.
pub const LEGACY_INPUTS: usize = 6;

/// The checked (A, B, C, D) of a correction.
pub type Matrices = (DMatrix<f64>, DMatrix<f64>, DMatrix<f64>, DMatrix<f64>);

/// A correction's matrices do not fit together or are not finite.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("correction matrix `{matrix}`: {message}")]
pub struct CorrectionError {
    pub matrix: &'static str,
    pub message: String,
}

fn to_matrix(
    name: &'static str,
    rows: &[Vec<f64>],
    r: usize,
    c: usize,
) -> Result<DMatrix<f64>, CorrectionError> {
    if rows.len() != r || rows.iter().any(|row| row.len() != c) {
        return Err(CorrectionError {
            matrix: name,
            message: format!(
                "expected {r} rows of {c} entries, found {} rows of lengths {:?}",
                rows.len(),
                rows.iter().map(Vec::len).collect::<Vec<_>>()
            ),
        });
    }
    let m = DMatrix::from_fn(r, c, |i, j| rows[i][j]);
    if let Some(k) = m.iter().position(|v| !v.is_finite()) {
        return Err(CorrectionError {
            matrix: name,
            message: format!("entry {k} (column-major) is not finite"),
        });
    }
    Ok(m)
}

/// Row-major rows of a matrix (for the model file).
pub fn rows_of(m: &DMatrix<f64>) -> Vec<Vec<f64>> {
    (0..m.nrows())
        .map(|i| m.row(i).iter().copied().collect())
        .collect()
}

impl Correction {
    /// A correction of order 0 (no correction at all).
    pub fn none() -> Self {
        Self {
            a: Vec::new(),
            b: Vec::new(),
            c: vec![Vec::new(), Vec::new()],
            d: Vec::new(),
            c_dip: Vec::new(),
            d_dip: Vec::new(),
            input_range: Vec::new(),
        }
    }

    pub fn order(&self) -> usize {
        self.a.len()
    }

    /// The checked matrices (A, B, C, D); an empty D is zero. A B or D of
    /// [`LEGACY_INPUTS`] columns gets zero columns for the inputs added since.
    pub fn matrices(&self) -> Result<Matrices, CorrectionError> {
        let n = self.order();
        let outputs = CORRECTION_OUTPUTS.len();
        Ok((
            to_matrix("a", &self.a, n, n)?,
            input_matrix("b", &self.b, n, false)?,
            to_matrix("c", &self.c, outputs, n)?,
            input_matrix("d", &self.d, outputs, true)?,
        ))
    }

    /// The checked (C_dip, D_dip), zero when absent.
    pub fn dip_matrices(&self) -> Result<(DMatrix<f64>, DMatrix<f64>), CorrectionError> {
        let outputs = CORRECTION_OUTPUTS.len();
        let c = if self.c_dip.is_empty() {
            DMatrix::zeros(outputs, self.order())
        } else {
            to_matrix("c_dip", &self.c_dip, outputs, self.order())?
        };
        Ok((c, input_matrix("d_dip", &self.d_dip, outputs, true)?))
    }
}

/// An `r` × [`N_INPUTS`] matrix from its rows: empty means zero when `empty_is_zero` (D and
/// D_dip may be left out, B may not), rows of [`LEGACY_INPUTS`] entries get zero columns for
/// the inputs added since.
fn input_matrix(
    name: &'static str,
    rows: &[Vec<f64>],
    r: usize,
    empty_is_zero: bool,
) -> Result<DMatrix<f64>, CorrectionError> {
    if rows.is_empty() && empty_is_zero {
        return Ok(DMatrix::zeros(r, N_INPUTS));
    }
    if rows.len() == r && r > 0 && rows.iter().all(|row| row.len() == LEGACY_INPUTS) {
        let m = to_matrix(name, rows, r, LEGACY_INPUTS)?;
        let mut padded = DMatrix::zeros(r, N_INPUTS);
        padded.columns_mut(0, LEGACY_INPUTS).copy_from(&m);
        return Ok(padded);
    }
    to_matrix(name, rows, r, N_INPUTS)
}

/// Exact zero-order-hold discretisation of (A, B) over h: Φ = e^{Ah}, Γ = ∫₀ʰ e^{As} ds · B,
/// both read off one exponential of the augmented matrix [[A, B], [0, 0]]·h (Van Loan,
/// IEEE Trans. Autom. Control 23(3), 1978).
pub fn zoh(a: &DMatrix<f64>, b: &DMatrix<f64>, h_s: f64) -> (DMatrix<f64>, DMatrix<f64>) {
    let (n, l) = (a.nrows(), b.ncols());
    let mut m = DMatrix::zeros(n + l, n + l);
    m.view_mut((0, 0), (n, n)).copy_from(&(a * h_s));
    m.view_mut((0, n), (n, l)).copy_from(&(b * h_s));
    let e = expm(&m);
    (
        e.view((0, 0), (n, n)).into_owned(),
        e.view((0, n), (n, l)).into_owned(),
    )
}

/// [`zoh`] one diagonal block of A at a time: a block-diagonal A (a modal correction: 1×1 and
/// 2×2 blocks) gives a block-diagonal Φ and a Γ whose rows of one block depend only on that
/// block, so the exponential of each small augmented matrix replaces one of order (n + inputs).
/// The same discretisation (each block is exact to rounding); far cheaper when a host's step
/// is not the one discretised at instantiation.
pub fn zoh_blockwise(a: &DMatrix<f64>, b: &DMatrix<f64>, h_s: f64) -> (DMatrix<f64>, DMatrix<f64>) {
    let (n, l) = (a.nrows(), b.ncols());
    let mut phi = DMatrix::zeros(n, n);
    let mut gamma = DMatrix::zeros(n, l);
    let mut start = 0;
    while start < n {
        // grow the block until no entry couples it to a later state
        let mut end = start;
        let mut k = start;
        while k <= end {
            for j in (end + 1..n).rev() {
                #[allow(clippy::float_cmp)] // structural zeros
                if a[(k, j)] != 0.0 || a[(j, k)] != 0.0 {
                    end = end.max(j);
                    break;
                }
            }
            k += 1;
        }
        let size = end + 1 - start;
        let (p, g) = zoh(
            &a.view((start, start), (size, size)).into_owned(),
            &b.view((start, 0), (size, l)).into_owned(),
            h_s,
        );
        phi.view_mut((start, start), (size, size)).copy_from(&p);
        gamma.view_mut((start, 0), (size, l)).copy_from(&g);
        start = end + 1;
    }
    (phi, gamma)
}

/// Matrix exponential by scaling and squaring with the diagonal [6/6] Padé approximant
/// (Moler & Van Loan, SIAM Review 45(1), 2003, "Method 3"; Golub & Van Loan, Matrix
/// Computations, Algorithm 9.3.1). Scaled to ‖X‖₁ ≤ 1/2, where the [6/6] truncation error is
/// below 1e-16 relative (Golub & Van Loan, Theorem 9.3.1).
pub fn expm(m: &DMatrix<f64>) -> DMatrix<f64> {
    let n = m.nrows();
    assert_eq!(n, m.ncols(), "expm needs a square matrix");
    if n == 0 {
        return m.clone();
    }
    let norm_1 = (0..n)
        .map(|j| m.column(j).iter().map(|x| x.abs()).sum::<f64>())
        .fold(0.0, f64::max);
    let squarings = if norm_1 > 0.5 {
        (norm_1 / 0.5).log2().ceil().max(0.0) as i32
    } else {
        0
    };
    let x = m / 2f64.powi(squarings);
    const Q: usize = 6;
    // c_k = c_{k−1}·(q − k + 1) / (k·(2q − k + 1))
    let mut c = 1.0;
    let mut numerator = DMatrix::identity(n, n);
    let mut denominator = DMatrix::identity(n, n);
    let mut power = DMatrix::identity(n, n);
    for k in 1..=Q {
        c *= (Q - k + 1) as f64 / (k * (2 * Q - k + 1)) as f64;
        power = &power * &x;
        numerator += &power * c;
        if k % 2 == 0 {
            denominator += &power * c;
        } else {
            denominator -= &power * c;
        }
    }
    let mut result = denominator
        .lu()
        .solve(&numerator)
        .expect("the Padé denominator is non-singular for ‖X‖₁ ≤ 1/2");
    for _ in 0..squarings {
        result = &result * &result;
    }
    result
}

/// A correction ready to step: its matrices and the discretisation of the last step size used.
#[derive(Debug, Clone)]
pub struct CorrectionStepper {
    a: DMatrix<f64>,
    b: DMatrix<f64>,
    /// the rows of C and D (Δi_d, Δi_q), without their exact zeros
    rows: [OutputRow; 2],
    /// the rows of C_dip and D_dip; `None` when the correction has no dip map
    dip_rows: Option<[OutputRow; 2]>,
    cache: Option<Discrete>,
    /// scratch for the next state
    next: Vec<f64>,
    range: Option<[[f64; 2]; N_INPUTS]>,
}

/// One output row (of C with D, or of C_dip with D_dip) without its exact zeros: a modal
/// realisation gives each output its own states, so most of a row of C is zero.
#[derive(Debug, Clone)]
struct OutputRow {
    /// (state, coefficient) of the nonzero entries of the row of C
    states: Vec<(usize, f64)>,
    /// (input, coefficient) of the nonzero entries of the row of D
    inputs: Vec<(usize, f64)>,
}

impl OutputRow {
    #[allow(clippy::float_cmp)] // an exact zero contributes exactly nothing (z and u are finite)
    fn new(c: &DMatrix<f64>, d: &DMatrix<f64>, k: usize) -> Self {
        let nonzero = |row: Vec<f64>| -> Vec<(usize, f64)> {
            row.into_iter()
                .enumerate()
                .filter(|(_, v)| *v != 0.0)
                .collect()
        };
        Self {
            states: nonzero(c.row(k).iter().copied().collect()),
            inputs: nonzero(d.row(k).iter().copied().collect()),
        }
    }

    fn value(&self, z: &[f64], u: &[f64; N_INPUTS]) -> f64 {
        let cz: f64 = self.states.iter().map(|&(i, c)| c * z[i]).sum();
        let du: f64 = self.inputs.iter().map(|&(j, d)| d * u[j]).sum();
        du + cz
    }
}

/// Φ(h) and Γ(h) of one step size, stored for a cheap step: Φ without its exact zeros (a
/// modal, block-diagonal A gives a block-diagonal Φ, so a step costs O(order) instead of
/// O(order²)), Γ column by column. The loops run over the states with independent sums (they
/// vectorise), not along one long chain of additions.
#[derive(Debug, Clone)]
struct Discrete {
    h: f64,
    phi: Phi,
    /// the inputs whose column of Γ is not all exact zeros (an input the correction does not
    /// use, e.g. the physics' current in a voltage-only structure, costs nothing)
    active: Vec<usize>,
    /// the k-th active input's column of Γ is `gamma_cols[k * order..(k + 1) * order]`
    gamma_cols: Vec<f64>,
}

#[derive(Debug, Clone)]
enum Phi {
    /// nonzeros only on the three central diagonals (1×1 and 2×2 modal blocks):
    /// next[i] = lower[i]·z[i−1] + diag[i]·z[i] + upper[i]·z[i+1] (lower[0] = upper[n−1] = 0)
    Tridiagonal {
        lower: Vec<f64>,
        diag: Vec<f64>,
        upper: Vec<f64>,
    },
    /// any other Φ, row by row: row k's entries are `col[row[k]..row[k + 1]]`, `val[..]`
    Sparse {
        row: Vec<usize>,
        col: Vec<usize>,
        val: Vec<f64>,
    },
}

impl Discrete {
    fn new(a: &DMatrix<f64>, b: &DMatrix<f64>, h: f64) -> Self {
        let (phi, gamma) = zoh_blockwise(a, b, h);
        let n = phi.nrows();
        // an exact zero contributes exactly nothing (the states are finite)
        #[allow(clippy::float_cmp)]
        let tridiagonal = (0..n).all(|i| (0..n).all(|j| i.abs_diff(j) <= 1 || phi[(i, j)] == 0.0));
        let phi = if tridiagonal {
            Phi::Tridiagonal {
                lower: (0..n)
                    .map(|i| if i > 0 { phi[(i, i - 1)] } else { 0.0 })
                    .collect(),
                diag: (0..n).map(|i| phi[(i, i)]).collect(),
                upper: (0..n)
                    .map(|i| if i + 1 < n { phi[(i, i + 1)] } else { 0.0 })
                    .collect(),
            }
        } else {
            let mut row = Vec::with_capacity(n + 1);
            let mut col = Vec::new();
            let mut val = Vec::new();
            row.push(0);
            for i in 0..n {
                for j in 0..n {
                    let v = phi[(i, j)];
                    if v != 0.0 {
                        col.push(j);
                        val.push(v);
                    }
                }
                row.push(col.len());
            }
            Phi::Sparse { row, col, val }
        };
        #[allow(clippy::float_cmp)] // an exact zero contributes exactly nothing
        let active: Vec<usize> = (0..N_INPUTS)
            .filter(|&j| (0..n).any(|i| gamma[(i, j)] != 0.0))
            .collect();
        let gamma_cols = active
            .iter()
            .flat_map(|&j| (0..n).map(move |i| (i, j)))
            .map(|(i, j)| gamma[(i, j)])
            .collect();
        Self {
            h,
            phi,
            active,
            gamma_cols,
        }
    }

    /// Entries of Φ a step multiplies.
    fn phi_entries(&self) -> usize {
        match &self.phi {
            #[allow(clippy::float_cmp)]
            Phi::Tridiagonal { lower, diag, upper } => [lower, diag, upper]
                .iter()
                .map(|d| d.iter().filter(|v| **v != 0.0).count())
                .sum(),
            Phi::Sparse { val, .. } => val.len(),
        }
    }
}

impl CorrectionStepper {
    pub fn new(correction: &Correction) -> Result<Self, CorrectionError> {
        let (a, b, c, d) = correction.matrices()?;
        let range = match correction.input_range.len() {
            0 => None,
            N_INPUTS => Some(std::array::from_fn(|j| correction.input_range[j])),
            n => {
                return Err(CorrectionError {
                    matrix: "input_range",
                    message: format!("expected {N_INPUTS} [min, max] pairs, found {n}"),
                })
            }
        };
        if let Some(j) = correction
            .input_range
            .iter()
            .position(|[lo, hi]| !(lo.is_finite() && hi.is_finite() && lo <= hi))
        {
            return Err(CorrectionError {
                matrix: "input_range",
                message: format!(
                    "pair {j} ({}) is {:?}: expected finite min <= max",
                    CORRECTION_INPUTS[j], correction.input_range[j]
                ),
            });
        }
        let dip_rows = if correction.c_dip.is_empty() && correction.d_dip.is_empty() {
            None
        } else {
            let (c_dip, d_dip) = correction.dip_matrices()?;
            Some([0, 1].map(|k| OutputRow::new(&c_dip, &d_dip, k)))
        };
        Ok(Self {
            range,
            dip_rows,
            next: vec![0.0; a.nrows()],
            rows: [0, 1].map(|k| OutputRow::new(&c, &d, k)),
            a,
            b,
            cache: None,
        })
    }

    pub fn order(&self) -> usize {
        self.a.nrows()
    }

    /// `u` held inside the training range of each input (unchanged when there is none).
    pub fn bounded(&self, mut u: [f64; N_INPUTS]) -> [f64; N_INPUTS] {
        if let Some(r) = &self.range {
            for (x, [lo, hi]) in u.iter_mut().zip(r) {
                *x = x.clamp(*lo, *hi);
            }
        }
        u
    }

    /// Entries of Φ stepped per step at the cached step size (order² for a dense A, about
    /// 2·order for a modal one); `None` before the first step.
    pub fn phi_entries(&self) -> Option<usize> {
        self.cache.as_ref().map(Discrete::phi_entries)
    }

    /// Discretise for steps of `h_s` now (the matrix exponential), so that the first step of
    /// that size costs no more than the others: an FMU does it at instantiation for its
    /// natural step. A later step of another size discretises again.
    pub fn prepare(&mut self, h_s: f64) {
        if self.order() == 0 {
            return;
        }
        // A host's step computed as t[k+1] − t[k] differs from step to step in the last bits;
        // recomputing the matrix exponential for each would cost far more than the step itself.
        // Steps within a relative 1e-9 of the cached one reuse it (the resulting change in Φ is
        // of the order 1e-9·‖A‖·h, far below the correction's own accuracy).
        let fresh = !matches!(&self.cache, Some(d) if (d.h - h_s).abs() <= 1e-9 * d.h.abs());
        if fresh {
            self.cache = Some(Discrete::new(&self.a, &self.b, h_s));
        }
    }

    /// z ← Φ(h) z + Γ(h) u: exact for an input held over the step. Allocates nothing once the
    /// step size is cached.
    pub fn step(&mut self, z: &mut [f64], u: &[f64; N_INPUTS], h_s: f64) {
        let mut next = std::mem::take(&mut self.next);
        self.step_from(z, &mut next, u, h_s);
        z.copy_from_slice(&next);
        self.next = next;
    }

    /// `next` ← Φ(h) z + Γ(h) u (as [`CorrectionStepper::step`], into another slice); whether
    /// every entry of `next` is finite.
    pub fn step_from(
        &mut self,
        z: &[f64],
        next: &mut [f64],
        u: &[f64; N_INPUTS],
        h_s: f64,
    ) -> bool {
        let n = self.order();
        assert_eq!(z.len(), n, "correction state length");
        assert_eq!(next.len(), n, "correction state length");
        if n == 0 {
            return true;
        }
        self.prepare(h_s);
        let d = self.cache.as_ref().expect("filled by prepare");
        match &d.phi {
            Phi::Tridiagonal { lower, diag, upper } => {
                for ((x, p), zi) in next.iter_mut().zip(diag).zip(z.iter()) {
                    *x = p * zi;
                }
                for ((x, p), zi) in next[1..].iter_mut().zip(&lower[1..]).zip(z.iter()) {
                    *x += p * zi;
                }
                for ((x, p), zi) in next.iter_mut().zip(upper.iter()).zip(&z[1..]) {
                    *x += p * zi;
                }
            }
            Phi::Sparse { row, col, val } => {
                for (x, span) in next.iter_mut().zip(row.windows(2)) {
                    *x = col[span[0]..span[1]]
                        .iter()
                        .zip(&val[span[0]..span[1]])
                        .map(|(c, v)| v * z[*c])
                        .sum();
                }
            }
        }
        // Γu, one active input's column at a time (independent sums over the states: they
        // vectorise)
        for (&j, col) in d.active.iter().zip(d.gamma_cols.chunks_exact(n)) {
            let uj = u[j];
            for (x, g) in next.iter_mut().zip(col) {
                *x += g * uj;
            }
        }
        // a mode that has died away is set to exactly zero before it reaches the subnormal
        // range, where every operation on it costs ~100 times more (the state is in per unit:
        // below 1e-150 it carries nothing)
        let mut finite = true;
        for x in next.iter_mut() {
            finite &= x.is_finite();
            if x.abs() < 1e-150 {
                *x = 0.0;
            }
        }
        finite
    }

    /// Δy = C z + D u, plus C_dip z + D_dip u when `in_dip` (see [`in_dip`]): (Δi_d, Δi_q) in
    /// the pre-fault frame.
    pub fn output(&self, z: &[f64], u: &[f64; N_INPUTS], in_dip: bool) -> (f64, f64) {
        assert_eq!(z.len(), self.order(), "correction state length");
        let [rd, rq] = &self.rows;
        let (mut d, mut q) = (rd.value(z, u), rq.value(z, u));
        if let (true, Some([dd, dq])) = (in_dip, &self.dip_rows) {
            d += dd.value(z, u);
            q += dq.value(z, u);
        }
        (d, q)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn expm_of_a_rotation_generator_is_a_rotation() {
        // e^{[[0, −ω], [ω, 0]]} = [[cos ω, −sin ω], [sin ω, cos ω]] (textbook identity)
        let w = 2.5;
        let m = DMatrix::from_row_slice(2, 2, &[0.0, -w, w, 0.0]);
        let e = expm(&m);
        let want = DMatrix::from_row_slice(2, 2, &[w.cos(), -w.sin(), w.sin(), w.cos()]);
        assert!((e - want).abs().max() < 1e-14);
    }

    #[test]
    fn zoh_of_a_scalar_lag_is_exact() {
        // dz/dt = −z/T + u/T: Φ = e^{−h/T}, Γ = 1 − e^{−h/T} (textbook ZOH of a first-order lag)
        let t = 0.02;
        let (phi, gamma) = zoh(
            &DMatrix::from_element(1, 1, -1.0 / t),
            &DMatrix::from_element(1, 1, 1.0 / t),
            1e-3,
        );
        assert!((phi[(0, 0)] - (-1e-3 / t).exp()).abs() < 1e-15);
        assert!((gamma[(0, 0)] + (-1e-3 / t).exp_m1()).abs() < 1e-15);
    }

    #[test]
    fn blockwise_zoh_equals_the_whole_exponential() {
        // a modal A (a 2×2 block, a 1×1 block, a 2×2 block) and a dense B: discretising block by
        // block gives the exponential of the whole augmented matrix to rounding (Φ is block
        // diagonal, Γ's rows of a block depend only on that block); and a coupled A is one block
        let a = DMatrix::from_row_slice(
            5,
            5,
            &[
                -3.0, 40.0, 0.0, 0.0, 0.0, //
                -40.0, -3.0, 0.0, 0.0, 0.0, //
                0.0, 0.0, -12.0, 0.0, 0.0, //
                0.0, 0.0, 0.0, -150.0, 300.0, //
                0.0, 0.0, 0.0, -300.0, -150.0,
            ],
        );
        let b = DMatrix::from_fn(5, 3, |i, j| ((i * 3 + j) as f64 * 0.7).sin());
        for (a, label) in [(a.clone(), "modal"), (a.map(|x| x + 0.5), "coupled")] {
            let (p1, g1) = zoh(&a, &b, 2e-3);
            let (p2, g2) = zoh_blockwise(&a, &b, 2e-3);
            assert!((&p1 - &p2).abs().max() < 1e-14, "{label}: Φ");
            assert!((&g1 - &g2).abs().max() < 1e-14, "{label}: Γ");
        }
    }

    #[test]
    fn frames_round_trip() {
        let pf = PreFault {
            u0: 1.02,
            theta0: 0.6,
            f0: 1.0,
            p0: 0.7,
            q0: 0.1,
        };
        let (d, q) = pf.from_network(0.3, -0.2);
        let (re, im) = pf.to_network(d, q);
        assert!((re - 0.3).abs() < 1e-15 && (im + 0.2).abs() < 1e-15);
        // at the pre-fault voltage and the pre-fault current i = (p0 − j·q0)·e^{jθ₀}/|v₀|
        // (from S = v·conj(i)) every input is zero
        let v = (1.02 * 0.6f64.cos(), 1.02 * 0.6f64.sin());
        let (s, c) = 0.6f64.sin_cos();
        let i0 = ((0.7 * c + 0.1 * s) / 1.02, (0.7 * s - 0.1 * c) / 1.02);
        let u = pf.input(v.0, v.1, 1.0, i0);
        assert!(u.iter().all(|x| x.abs() < 1e-15), "{u:?}");
        // the dip depth below 0.9 pu at |v| = 0.5: 0.4 (hand calculation)
        let dip = pf.input(0.5 * c, 0.5 * s, 1.0, i0)[5];
        assert!((dip - 0.4).abs() < 1e-15, "{dip}");
        // 0.1 pu more active current than before the disturbance: +0.1 on the physics' i_d
        let more = pf.input(v.0, v.1, 1.0, (i0.0 + 0.1 * c, i0.1 + 0.1 * s));
        assert!(
            (more[6] - 0.1).abs() < 1e-15 && more[7].abs() < 1e-15,
            "{more:?}"
        );
    }

    #[test]
    fn output_adds_the_feedthrough_and_an_empty_d_is_zero() {
        let mut corr = Correction {
            a: vec![vec![-10.0]],
            b: vec![vec![10.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0]],
            c: vec![vec![1.0], vec![2.0]],
            d: Vec::new(),
            c_dip: Vec::new(),
            d_dip: Vec::new(),
            input_range: Vec::new(),
        };
        let u = [0.5, 0.0, 0.0, 0.0, 0.0, 1.0, 0.0, 0.0];
        let s = CorrectionStepper::new(&corr).unwrap();
        assert_eq!(s.output(&[0.25], &u, false), (0.25, 0.5));
        corr.d = vec![vec![0.0; 8], vec![0.0, 0.0, 0.0, 0.0, 0.0, 3.0, 0.0, 0.0]];
        let s = CorrectionStepper::new(&corr).unwrap();
        assert_eq!(s.output(&[0.25], &u, false), (0.25, 3.5));
        // a D of the wrong shape names the matrix
        corr.d = vec![vec![0.0; 5], vec![0.0; 5]];
        let e = CorrectionStepper::new(&corr).unwrap_err();
        assert_eq!(e.matrix, "d");
    }

    #[test]
    fn the_dip_map_adds_only_in_a_dip() {
        let corr = Correction {
            a: vec![vec![-10.0]],
            b: vec![vec![10.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0]],
            c: vec![vec![1.0], vec![2.0]],
            d: Vec::new(),
            c_dip: vec![vec![4.0], vec![0.0]],
            d_dip: vec![vec![0.0; 8], vec![0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 2.0]],
            input_range: Vec::new(),
        };
        let u = [0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.5];
        let s = CorrectionStepper::new(&corr).unwrap();
        assert_eq!(s.output(&[0.25], &u, false), (0.25, 0.5));
        // C z + C_dip z = (1 + 4)·0.25; D_dip u = 2·0.5 (hand calculation)
        assert_eq!(s.output(&[0.25], &u, true), (1.25, 1.5));
        // the threshold: |v| = 0.9 pu is not a dip, just below it is
        assert!(!in_dip(0.9, 0.0) && in_dip(0.0, 0.899_999) && !in_dip(0.6, 0.8));
    }

    #[test]
    #[allow(clippy::float_cmp)] // zero columns and the outputs below are exact
    fn a_correction_of_six_inputs_reads_as_the_same_model() {
        // written before the physics' current was an input: B and D of six columns are read
        // with zero columns for inputs 7 and 8, so the physics' current changes nothing
        let corr = Correction {
            a: vec![vec![-10.0]],
            b: vec![vec![10.0, 0.0, 0.0, 0.0, 0.0, 2.0]],
            c: vec![vec![1.0], vec![2.0]],
            d: vec![vec![0.0, 0.0, 0.0, 0.0, 0.0, 3.0], vec![0.0; 6]],
            c_dip: Vec::new(),
            d_dip: Vec::new(),
            input_range: Vec::new(),
        };
        let (_, b, _, d) = corr.matrices().unwrap();
        assert_eq!((b.ncols(), d.ncols()), (N_INPUTS, N_INPUTS));
        assert_eq!(
            b.columns(6, 2).abs().sum() + d.columns(6, 2).abs().sum(),
            0.0
        );
        let mut s = CorrectionStepper::new(&corr).unwrap();
        let mut z = [0.0];
        let u = [0.0, 0.0, 0.0, 0.0, 0.0, 1.0, 7.0, -7.0];
        s.step(&mut z, &u, 1e-3);
        // exact ZOH of dz/dt = −10 z + 2 over 1 ms: z = 0.2·(1 − e^{−0.01})
        let expected = 0.2 * -(-0.01f64).exp_m1();
        assert!(
            (z[0] - expected).abs() < 1e-15 * expected,
            "{} vs {expected}",
            z[0]
        );
        assert_eq!(s.output(&z, &u, true), (z[0] + 3.0, 2.0 * z[0]));
    }

    #[test]
    #[allow(clippy::float_cmp)] // clamping is exact
    fn inputs_are_held_inside_the_training_range() {
        let mut corr = Correction {
            a: vec![vec![-10.0]],
            b: vec![vec![10.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0]],
            c: vec![vec![1.0], vec![0.0]],
            d: vec![vec![1.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0], vec![0.0; 8]],
            c_dip: Vec::new(),
            d_dip: Vec::new(),
            input_range: vec![[-0.5, 0.2]; 8],
        };
        let s = CorrectionStepper::new(&corr).unwrap();
        let u = s.bounded([0.7, -0.9, 0.1, 0.0, 0.0, 0.0, 0.0, 0.0]);
        assert_eq!(u, [0.2, -0.5, 0.1, 0.0, 0.0, 0.0, 0.0, 0.0]);
        // a range with min > max is refused, naming the input
        corr.input_range[2] = [0.3, 0.1];
        let e = CorrectionStepper::new(&corr).unwrap_err();
        assert_eq!(e.matrix, "input_range");
        assert!(e.message.contains("f_grid - f0"), "{}", e.message);
    }
}

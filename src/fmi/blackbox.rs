//! A detailed model given as a Co-Simulation FMU, used as a black-box source of traces.
//!
//! The FMU sees only its terminal: understudy sets the terminal voltage phasor (and optionally
//! the grid frequency) and reads the injected current and P, Q. The grid is the case's Thevenin
//! equivalent and disturbance ([`GridSchedule`]), algebraic as in the built-in model:
//! v = Z_f/(Z_th + Z_f)·(E(t) + Z_th·i).
//!
//! Coupling (per communication step [t, t + h], h = the trace sample step, split at the
//! disturbance's breakpoints when the FMU accepts variable steps): the FMU holds its input over
//! the step, so we give it the trapezoidal mean of the terminal voltage at both ends,
//! v̄ = (v(t) + v(t + h))/2, where v(t + h) depends on the current the step produces. When the
//! FMU can save and restore its state, we solve this by fixed-point iteration: predict
//! i(t + h) by linear extrapolation of the last two currents, step, recompute v(t + h) from the
//! new current, restore the state and repeat until the mean voltage moves by less than 1e-10 pu
//! (at most 8 passes; the last pass is kept either way and the count is reported). Without state
//! access the step is explicit (v̄ from the predicted current, one pass). The residual
//! difference to the built-in model (which solves the grid at every integrator stage) is the
//! hold over one communication step.

use crate::fmi::import::{BaseType, Fmu, ImportError, Instance};
use crate::scenario::Case;
use crate::signal::trace::{Trace, TraceMeta, FORMAT, STANDARD_CHANNELS};
use crate::simulate::RunSummary;
use crate::study::Study;
use crate::Error;
use serde::{Deserialize, Serialize};
use std::path::Path;
use understudy_runtime::unit::{terminal_voltage_for, GridSchedule, C64};

/// The FMU's names for the terminal quantities (a small TOML file; our own FMUs need none).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct VariableMap {
    /// Terminal voltage phasor inputs (pu, network frame).
    pub v_re: String,
    pub v_im: String,
    /// Injected current phasor outputs (pu, generator convention).
    pub i_re: String,
    pub i_im: String,
    /// Injected power outputs (pu).
    pub p: String,
    pub q: String,
    /// Setpoint parameters (pu).
    pub p_ref: String,
    pub q_ref: String,
    /// Grid frequency input (pu of nominal), if the FMU has one.
    #[serde(default)]
    pub f_grid: Option<String>,
}

impl Default for VariableMap {
    /// The names of understudy's own FMUs.
    fn default() -> Self {
        let s = |x: &str| x.to_string();
        Self {
            v_re: s("v_re"),
            v_im: s("v_im"),
            i_re: s("i_re"),
            i_im: s("i_im"),
            p: s("p"),
            q: s("q"),
            p_ref: s("p_ref"),
            q_ref: s("q_ref"),
            f_grid: Some(s("f_grid")),
        }
    }
}

impl VariableMap {
    pub fn load(path: &Path) -> Result<Self, Error> {
        let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, e))?;
        toml::from_str(&text).map_err(|e| Error::BadFile {
            path: path.to_path_buf(),
            message: format!("not a variable map: {e}"),
        })
    }

    /// Resolve the names to value references of Real variables of `fmu`.
    pub fn resolve(&self, fmu: &Fmu) -> Result<ResolvedMap, Error> {
        let vr = |name: &str, role: &str| -> Result<u32, Error> {
            let v = fmu.description().variable(name).ok_or_else(|| Error::BadFile {
                path: fmu.path().to_path_buf(),
                message: format!(
                    "the FMU has no variable `{name}` (mapped as {role}); give a --map file naming its variables"
                ),
            })?;
            if v.base_type != BaseType::Real {
                return Err(Error::BadFile {
                    path: fmu.path().to_path_buf(),
                    message: format!(
                        "variable `{name}` (mapped as {role}) is {:?}, expected Real",
                        v.base_type
                    ),
                });
            }
            Ok(v.value_reference)
        };
        Ok(ResolvedMap {
            v: [vr(&self.v_re, "v_re")?, vr(&self.v_im, "v_im")?],
            outputs: [
                vr(&self.i_re, "i_re")?,
                vr(&self.i_im, "i_im")?,
                vr(&self.p, "p")?,
                vr(&self.q, "q")?,
            ],
            setpoints: [vr(&self.p_ref, "p_ref")?, vr(&self.q_ref, "q_ref")?],
            f_grid: match &self.f_grid {
                Some(n) => Some(vr(n, "f_grid")?),
                None => None,
            },
        })
    }
}

/// Value references of the mapped variables.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ResolvedMap {
    pub v: [u32; 2],
    /// i_re, i_im, p, q
    pub outputs: [u32; 4],
    pub setpoints: [u32; 2],
    pub f_grid: Option<u32>,
}

/// Counters of one case run through an FMU.
#[derive(Debug, Clone, Copy, PartialEq, Default, Serialize, Deserialize)]
pub struct CouplingStats {
    pub communication_steps: usize,
    /// doStep calls including the repeated passes of the fixed-point iteration.
    pub do_step_calls: usize,
    /// Largest number of passes one step needed.
    pub max_passes: usize,
    /// Steps whose iteration stopped at the pass limit without meeting 1e-10 pu.
    pub unconverged_steps: usize,
}

const MAX_PASSES: usize = 8;
const VOLTAGE_TOLERANCE: f64 = 1e-10;

fn fmu_err(e: ImportError) -> Error {
    Error::Import(e)
}

fn read_outputs(inst: &mut Instance, map: &ResolvedMap) -> Result<[f64; 4], Error> {
    let o = inst.get_real(&map.outputs).map_err(fmu_err)?;
    Ok([o[0], o[1], o[2], o[3]])
}

/// Initial terminal voltage (on the real axis rotated so the grid source has angle 0, as the
/// built-in model does), the grid schedule of the case, and the steady injection.
fn initial_conditions(case: &Case) -> Result<(C64, GridSchedule), Error> {
    let op = &case.operating_point;
    let z = case.grid.impedance();
    let u = match op.u {
        Some(u) => u,
        None => terminal_voltage_for(op.p, op.q, z, op.grid_voltage)?,
    };
    let v0 = C64::new(u, 0.0);
    let i0 = C64::new(op.p, -op.q) / u;
    let e = v0 - z * i0;
    let rot = C64::from_polar(1.0, -e.arg());
    let schedule = GridSchedule::new(e.norm(), z, &case.disturbance)?;
    Ok((v0 * rot, schedule))
}

/// Whether a case has a steady-state power flow through its grid (the black box's own limits
/// are unknown; an FMU that cannot start there fails that case, reported as such).
pub fn feasible(case: &Case) -> bool {
    initial_conditions(case).is_ok()
}

/// Run one case through a fresh instance of `fmu`; returns its trace (standard channels) and
/// the coupling counters.
pub fn simulate_case_fmu(
    fmu: &Fmu,
    map: &ResolvedMap,
    study: &Study,
    case: &Case,
) -> Result<(Trace, CouplingStats), Error> {
    let settings = &study.simulation;
    let f_nom_hz = study.unit.params.f_nom_hz;
    let (v_init, grid) = initial_conditions(case)?;
    let mut inst = fmu.instantiate(&case.stem()).map_err(fmu_err)?;
    let with_state = fmu.description().co_simulation.can_get_and_set_fmu_state;
    let variable_steps = fmu
        .description()
        .co_simulation
        .can_handle_variable_communication_step_size;
    inst.set_real(
        &map.setpoints,
        &[case.operating_point.p, case.operating_point.q],
    )
    .map_err(fmu_err)?;
    let set_inputs = |inst: &mut Instance, v: C64, f: f64| -> Result<(), Error> {
        inst.set_real(&map.v, &[v.re, v.im]).map_err(fmu_err)?;
        if let Some(vr) = map.f_grid {
            inst.set_real(&[vr], &[f]).map_err(fmu_err)?;
        }
        Ok(())
    };
    set_inputs(&mut inst, v_init, 1.0)?;
    inst.enter_initialization(None, 0.0, Some(settings.duration_s))
        .map_err(fmu_err)?;
    set_inputs(&mut inst, v_init, 1.0)?;
    inst.exit_initialization().map_err(fmu_err)?;

    let meta = TraceMeta {
        format: FORMAT.into(),
        source: format!(
            "fmu:{} (black box through understudy's grid equivalent)",
            fmu.description().co_simulation.model_identifier
        ),
        s_base_mva: study.unit.rating_mva,
        v_base_kv: study.unit.voltage_kv,
        f_nom_hz,
        case: serde_json::to_value(case).expect("case serialises"),
    };
    let mut trace = Trace::new(
        meta,
        STANDARD_CHANNELS.iter().map(|s| s.to_string()).collect(),
    );
    let voltage = |t: f64, k: usize, i: C64| grid.terminal_voltage(k, t, f_nom_hz, i);
    let mut stats = CouplingStats::default();

    let record = |inst: &mut Instance, t: f64, trace: &mut Trace| -> Result<C64, Error> {
        let o = read_outputs(inst, map)?;
        let i = C64::new(o[0], o[1]);
        let k = grid.phase_index_at(t);
        let v = voltage(t, k, i);
        let (_, f) = grid.source(k, t, f_nom_hz);
        // P and Q as the FMU computes them at the terminal voltage of this instant
        set_inputs(inst, v, f)?;
        let o = read_outputs(inst, map)?;
        trace.push(
            t,
            &[v.re, v.im, v.norm(), v.arg(), o[0], o[1], o[2], o[3], f],
        );
        Ok(i)
    };
    let mut i_now = record(&mut inst, 0.0, &mut trace)?;
    let mut i_prev = i_now;
    let mut h_prev = settings.sample_step_s;
    let breakpoints = grid.breakpoints_s();
    let n = (settings.duration_s / settings.sample_step_s).round() as usize;
    let mut t = 0.0;
    for s in 1..=n {
        let t_sample = s as f64 * settings.sample_step_s;
        // sub-steps up to the next sample, split at breakpoints when the FMU allows it
        let mut cuts: Vec<f64> = if variable_steps {
            breakpoints
                .iter()
                .copied()
                .filter(|&b| b > t + 1e-12 && b < t_sample - 1e-12)
                .collect()
        } else {
            Vec::new()
        };
        cuts.push(t_sample);
        for t_end in cuts {
            let h = t_end - t;
            // the grid phase in force over (t, t_end)
            let k = grid.phase_index_at(t + 0.5 * h);
            let (_, f_start) = grid.source(k, t, f_nom_hz);
            let (_, f_end) = grid.source(k, t_end, f_nom_hz);
            let f_mean = 0.5 * (f_start + f_end);
            let v_start = voltage(t, k, i_now);
            // predictor: linear extrapolation of the current
            let mut i_end = i_now + (i_now - i_prev) * (h / h_prev);
            let mut v_mean = 0.5 * (v_start + voltage(t_end, k, i_end));
            let saved = if with_state {
                Some(inst.get_state().map_err(fmu_err)?)
            } else {
                None
            };
            let mut passes = 0;
            loop {
                passes += 1;
                set_inputs(&mut inst, v_mean, f_mean)?;
                inst.do_step(t, h).map_err(fmu_err)?;
                stats.do_step_calls += 1;
                let o = read_outputs(&mut inst, map)?;
                i_end = C64::new(o[0], o[1]);
                let v_next = 0.5 * (v_start + voltage(t_end, k, i_end));
                let moved = (v_next - v_mean).norm();
                v_mean = v_next;
                let Some(state) = &saved else { break };
                if moved < VOLTAGE_TOLERANCE {
                    break;
                }
                if passes >= MAX_PASSES {
                    stats.unconverged_steps += 1;
                    break;
                }
                inst.set_state(state).map_err(fmu_err)?;
            }
            if let Some(state) = saved {
                inst.free_state(state).map_err(fmu_err)?;
            }
            stats.max_passes = stats.max_passes.max(passes);
            stats.communication_steps += 1;
            i_prev = i_now;
            i_now = i_end;
            h_prev = h;
            t = t_end;
        }
        i_now = record(&mut inst, t_sample, &mut trace)?;
        t = t_sample;
    }
    inst.terminate().map_err(fmu_err)?;
    Ok((trace, stats))
}

/// Simulate every case through `fmu` into `out_dir`, in parallel (one instance per case), and
/// write `manifest.json` like [`crate::simulate::run_study`] does.
pub fn run_study_fmu(
    fmu: &Fmu,
    map: &VariableMap,
    study: &Study,
    cases: &[Case],
    redraws: usize,
    out_dir: &Path,
    progress: &(dyn Fn(usize, usize) + Sync),
) -> Result<RunSummary, Error> {
    study.validate()?;
    let resolved = map.resolve(fmu)?;
    let mut settings = study.simulation.clone();
    settings.internal_signals = false;
    let d = fmu.description();
    let source = format!(
        "fmu:{} (model identifier {}, {}; a black box)",
        fmu.path().display(),
        d.co_simulation.model_identifier,
        d.guid
    );
    crate::simulate::run_cases(
        study,
        source,
        None,
        settings,
        cases,
        redraws,
        out_dir,
        progress,
        |case| {
            let (trace, stats) = simulate_case_fmu(fmu, &resolved, study, case)?;
            // doStep calls (fixed-point passes included); no guard events are visible through
            // a black box
            Ok((trace, stats.do_step_calls, 0))
        },
    )
}

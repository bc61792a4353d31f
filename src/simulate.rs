//! Run cases through a detailed model and collect traces (parallel over cases).

use crate::scenario::Case;
use crate::signal::trace::{Trace, TraceMeta, FORMAT, STANDARD_CHANNELS};
use crate::study::{Study, UnitSpec};
use crate::Error;
use rayon::prelude::*;
use serde::{Deserialize, Serialize};
use std::path::Path;
use understudy_runtime::ode::{integrate, Method, Stats};
use understudy_runtime::unit::full_converter::{ix, FullConverter};

/// How a case is simulated.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct SimulationSettings {
    /// Simulated time of every case (s).
    pub duration_s: f64,
    /// Trace sample step (s).
    pub sample_step_s: f64,
    /// Integration method. Default: RK4 at 50 µs, the model's native step (the fastest closed
    /// loop, the 300 Hz current loop, has α·h ≈ 0.09).
    pub method: Method,
    /// Also record internal signals (PLL-frame currents, DC voltage, PLL frequency, modes).
    pub internal_signals: bool,
}

impl Default for SimulationSettings {
    fn default() -> Self {
        Self {
            duration_s: 1.5,
            sample_step_s: 1e-3,
            method: Method::Rk4 { step_s: 5e-5 },
            internal_signals: true,
        }
    }
}

impl SimulationSettings {
    pub fn validate(&self) -> Result<(), Error> {
        if !(self.duration_s.is_finite() && self.duration_s > 0.0) {
            return Err(Error::bad_input(
                "simulation.duration_s",
                self.duration_s.to_string(),
                "a duration > 0 s",
            ));
        }
        if !(self.sample_step_s.is_finite()
            && self.sample_step_s > 0.0
            && self.sample_step_s <= self.duration_s)
        {
            return Err(Error::bad_input(
                "simulation.sample_step_s",
                self.sample_step_s.to_string(),
                "a sample step > 0 s and no longer than the duration",
            ));
        }
        Ok(())
    }
}

/// Internal channels recorded on request.
pub const INTERNAL_CHANNELS: [&str; 9] = [
    "i_active",
    "i_reactive",
    "v_dc",
    "f_pll",
    "p_source",
    "p_chopper",
    "u_measured",
    "in_dip",
    "chopper_on",
];

/// The channel names of a full-converter trace.
pub fn channel_names(internal: bool) -> Vec<String> {
    let mut names: Vec<String> = STANDARD_CHANNELS.iter().map(|s| s.to_string()).collect();
    if internal {
        names.extend(INTERNAL_CHANNELS.iter().map(|s| s.to_string()));
    }
    names
}

fn sample_row(unit: &FullConverter, t_s: f64, x: &[f64], internal: bool, row: &mut Vec<f64>) {
    let s = unit.signals(t_s, x);
    let v = s.terminal_voltage;
    row.clear();
    row.extend_from_slice(&[
        v.re,
        v.im,
        v.norm(),
        v.arg(),
        s.current.re,
        s.current.im,
        s.p,
        s.q,
        s.grid_frequency_pu,
    ]);
    if internal {
        row.extend_from_slice(&[
            s.i_dq.re,
            -s.i_dq.im,
            s.dc_voltage,
            s.pll_frequency_pu,
            s.source_power,
            s.chopper_power,
            x[ix::U_MEAS],
            f64::from(u8::from(unit.modes.in_dip)),
            f64::from(u8::from(unit.modes.chopper_on)),
        ]);
    }
}

/// Simulate one case of a full-converter unit; returns its trace and the integrator's counters.
pub fn simulate_case(
    unit: &UnitSpec,
    case: &Case,
    settings: &SimulationSettings,
) -> Result<(Trace, Stats), Error> {
    let (mut model, mut x) = FullConverter::initialise(
        unit.params.clone(),
        &case.operating_point,
        &case.grid,
        &case.disturbance,
    )?;
    let meta = TraceMeta {
        format: FORMAT.into(),
        source: "full-converter (understudy built-in detailed model)".into(),
        s_base_mva: unit.rating_mva,
        v_base_kv: unit.voltage_kv,
        f_nom_hz: unit.params.f_nom_hz,
        case: serde_json::to_value(case).expect("case serialises"),
    };
    let mut trace = Trace::new(meta, channel_names(settings.internal_signals));
    let breakpoints = model.breakpoints_s();
    let mut row = Vec::new();
    let internal = settings.internal_signals;
    let stats = integrate(
        &mut model,
        &mut x,
        0.0,
        settings.duration_s,
        settings.sample_step_s,
        &breakpoints,
        &settings.method,
        |t, x, m| {
            sample_row(m, t, x, internal, &mut row);
            trace.push(t, &row);
        },
    )
    .map_err(|source| Error::Integration {
        case: case.stem(),
        source,
    })?;
    Ok((trace, stats))
}

/// Whether a case has a steady state for this unit (used to redraw infeasible design points).
pub fn feasible(unit: &UnitSpec, case: &Case) -> bool {
    FullConverter::initialise(
        unit.params.clone(),
        &case.operating_point,
        &case.grid,
        &case.disturbance,
    )
    .is_ok()
}

/// What a simulation run wrote.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct RunSummary {
    pub study: String,
    /// Where the traces came from: the built-in detailed model, or an FMU run as a black box.
    pub source: String,
    /// The built-in unit's parameters (absent when the source is an FMU: its insides are not
    /// known; the study's unit then gives only the per-unit bases and the steady-state check).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub unit: Option<UnitSpec>,
    pub settings: SimulationSettings,
    pub seed: u64,
    pub redrawn_design_points: usize,
    pub cases: Vec<CaseRecord>,
    pub failures: Vec<String>,
    /// Simulated seconds per wall-clock second over all cases (all threads).
    pub simulated_seconds_per_wall_second: f64,
}

#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct CaseRecord {
    pub file: String,
    pub disturbance: String,
    pub steps: usize,
    pub guard_events: usize,
}

/// Simulate every case of `study` into `out_dir` (created if needed), in parallel; each trace is
/// written atomically as soon as it is done and `manifest.json` last. `progress(done, total)` is
/// called after each case (from worker threads).
pub fn run_study(
    study: &Study,
    cases: &[Case],
    redraws: usize,
    out_dir: &Path,
    progress: &(dyn Fn(usize, usize) + Sync),
) -> Result<RunSummary, Error> {
    study.validate()?;
    run_cases(
        study,
        format!("built-in detailed model ({:?})", study.unit.kind),
        Some(study.unit.clone()),
        study.simulation.clone(),
        cases,
        redraws,
        out_dir,
        progress,
        |case| {
            let (trace, stats) = simulate_case(&study.unit, case, &study.simulation)?;
            Ok((trace, stats.steps, stats.guard_events))
        },
    )
}

/// The body every trace source shares: run `cases` in parallel through `one` (a case → its
/// trace, step count and guard-event count), write each trace to `out_dir`, then
/// `manifest.json` with `source`, `unit` and `settings` as the run's.
#[allow(clippy::too_many_arguments)]
pub(crate) fn run_cases(
    study: &Study,
    source: String,
    unit: Option<UnitSpec>,
    settings: SimulationSettings,
    cases: &[Case],
    redraws: usize,
    out_dir: &Path,
    progress: &(dyn Fn(usize, usize) + Sync),
    one: impl Fn(&Case) -> Result<(Trace, usize, usize), Error> + Sync,
) -> Result<RunSummary, Error> {
    std::fs::create_dir_all(out_dir).map_err(|e| Error::io(out_dir, e))?;
    let done = std::sync::atomic::AtomicUsize::new(0);
    let start = std::time::Instant::now();
    let results: Vec<Result<CaseRecord, String>> = cases
        .par_iter()
        .map(|case| {
            let r = one(case)
                .and_then(|(trace, steps, guard_events)| {
                    trace.write(out_dir, &case.stem())?;
                    Ok(CaseRecord {
                        file: format!("{}.csv", case.stem()),
                        disturbance: case.disturbance.label().into(),
                        steps,
                        guard_events,
                    })
                })
                .map_err(|e| format!("{}: {e}", case.stem()));
            let n = done.fetch_add(1, std::sync::atomic::Ordering::Relaxed) + 1;
            progress(n, cases.len());
            r
        })
        .collect();
    let wall = start.elapsed().as_secs_f64();
    let mut summary = RunSummary {
        study: study.name.clone(),
        source,
        unit,
        settings,
        seed: study.design.seed,
        redrawn_design_points: redraws,
        cases: Vec::new(),
        failures: Vec::new(),
        simulated_seconds_per_wall_second: 0.0,
    };
    for r in results {
        match r {
            Ok(c) => summary.cases.push(c),
            Err(e) => summary.failures.push(e),
        }
    }
    summary.simulated_seconds_per_wall_second =
        summary.cases.len() as f64 * study.simulation.duration_s / wall.max(1e-9);
    let manifest = out_dir.join("manifest.json");
    crate::atomic::write_atomic(
        &manifest,
        serde_json::to_string_pretty(&summary)
            .expect("summary serialises")
            .as_bytes(),
    )
    .map_err(|e| Error::io(&manifest, e))?;
    Ok(summary)
}

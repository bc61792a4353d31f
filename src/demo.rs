//! The embedded demo: the invented "Tarn Moss" plant (see `demo-models/`), carried inside the
//! binary so `understudy demo` needs no files.

use crate::study::Study;
use std::path::Path;

/// The demo study file, verbatim (it is also what `understudy init` writes).
pub const DEMO_STUDY: &str = include_str!("../demo-models/demo-plant.toml");

/// The parsed demo study.
pub fn demo_study() -> Study {
    Study::from_toml(DEMO_STUDY, Path::new("demo-models/demo-plant.toml"))
        .expect("the embedded demo study is valid (checked by a test)")
}

/// What replaying one held-out case through the stand-in FMU showed.
#[derive(Debug, Clone, serde::Serialize)]
pub struct FmuReplay {
    pub case: String,
    /// largest |FMU output − the runtime's own evaluation| over i_re, i_im, P, Q (pu): the FMU
    /// must compute exactly what was validated
    pub max_difference_to_validated: f64,
    /// NRMSE (% of rating) of the FMU's P and Q against the detailed model's trace
    pub nrmse_p_percent: f64,
    pub nrmse_q_percent: f64,
    /// simulated seconds per wall second, one thread each, measured in this run
    pub fmu_speed: f64,
    pub detailed_speed: f64,
}

/// Load the stand-in FMU back through the importer, drive it with a held-out case's recorded
/// terminal voltage (held over each sample step, setpoints from the first sample — exactly as
/// the validation drove the runtime), compare with the runtime's own evaluation and with the
/// detailed trace, and time it against the detailed model simulating the same case.
pub fn replay_through_fmu(
    fmu_path: &Path,
    model: &crate::runtime::cosim::ModelFile,
    case: &crate::hybrid::Case,
    detailed_case: &crate::scenario::Case,
    study: &Study,
) -> Result<FmuReplay, crate::Error> {
    let failed = |what: &str, e: &dyn std::fmt::Display| {
        crate::Error::Failed(format!("{}: {what}: {e}", fmu_path.display()))
    };
    let validated = crate::hybrid::evaluate(model, case).map_err(|e| failed("evaluate", &e))?;
    let fmu = crate::fmi::Fmu::load(fmu_path).map_err(|e| failed("load", &e))?;
    let mut inst = fmu
        .instantiate("demo-replay")
        .map_err(|e| failed("instantiate", &e))?;
    let d = &case.data;
    let n = d.len();
    let mut out = [
        Vec::with_capacity(n),
        Vec::with_capacity(n),
        Vec::with_capacity(n),
        Vec::with_capacity(n),
    ];
    // value references resolved once, as a host does before it runs
    let vr = |names: &[&str]| -> Result<Vec<u32>, crate::Error> {
        names
            .iter()
            .map(|n| {
                inst.value_reference(n, crate::fmi::import::BaseType::Real)
                    .map_err(|e| failed("value reference", &e))
            })
            .collect()
    };
    let setpoints_and_inputs = vr(&["p_ref", "q_ref", "v_re", "v_im"])?;
    let inputs = vr(&["v_re", "v_im"])?;
    let outputs = vr(&["i_re", "i_im", "p", "q"])?;
    let start = std::time::Instant::now();
    inst.set_real(
        &setpoints_and_inputs,
        &[d.p[0], d.q[0], d.v_re[0], d.v_im[0]],
    )
    .map_err(|e| failed("set start values", &e))?;
    inst.enter_initialization(None, case.time_s[0], None)
        .map_err(|e| failed("enter initialization", &e))?;
    inst.exit_initialization()
        .map_err(|e| failed("exit initialization", &e))?;
    for k in 0..n {
        inst.set_real(&inputs, &[d.v_re[k], d.v_im[k]])
            .map_err(|e| failed("set inputs", &e))?;
        let y = inst
            .get_real(&outputs)
            .map_err(|e| failed("get outputs", &e))?;
        for (o, v) in out.iter_mut().zip(y) {
            o.push(v);
        }
        if k + 1 < n {
            inst.do_step(case.time_s[k], case.time_s[k + 1] - case.time_s[k])
                .map_err(|e| failed("doStep", &e))?;
        }
    }
    let fmu_wall = start.elapsed().as_secs_f64();
    let _ = inst.terminate();
    let max_difference_to_validated = out
        .iter()
        .zip([&validated.i_re, &validated.i_im, &validated.p, &validated.q])
        .flat_map(|(a, b)| a.iter().zip(b.iter()).map(|(x, y)| (x - y).abs()))
        .fold(0.0, f64::max);
    let rms = |a: &[f64], b: &[f64]| {
        (a.iter().zip(b).map(|(x, y)| (x - y).powi(2)).sum::<f64>() / a.len() as f64).sqrt()
    };
    let duration = case.time_s[n - 1] - case.time_s[0];
    let start = std::time::Instant::now();
    crate::simulate::simulate_case(&study.unit, detailed_case, &study.simulation)?;
    let detailed_wall = start.elapsed().as_secs_f64();
    Ok(FmuReplay {
        case: case.name.clone(),
        max_difference_to_validated,
        nrmse_p_percent: 100.0 * rms(&out[2], &d.p),
        nrmse_q_percent: 100.0 * rms(&out[3], &d.q),
        fmu_speed: duration / fmu_wall.max(1e-9),
        detailed_speed: duration / detailed_wall.max(1e-9),
    })
}

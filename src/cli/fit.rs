use std::path::{Path, PathBuf};
use understudy::hybrid::{
    fit_hybrid, read_reduced, write_report_with, HybridConfig, HybridError, Physics,
};
use understudy::signal::trace::read_folder;
use understudy::Error;

pub struct Request {
    pub traces: PathBuf,
    pub reduced: Option<PathBuf>,
    pub template: Option<PathBuf>,
    pub out: PathBuf,
    pub held_out: f64,
    pub keep_fraction: f64,
    pub no_reduce: bool,
    pub quiet: bool,
}

fn map(e: HybridError) -> Error {
    if e.is_bad_input() {
        Error::bad_input("fit", e.to_string(), "valid traces and settings")
    } else {
        Error::Failed(e.to_string())
    }
}

pub fn run(req: Request) -> Result<i32, Error> {
    let config = HybridConfig::default()
        .with_held_out_fraction(req.held_out)
        .map_err(|_| {
            Error::bad_input(
                "--held-out",
                req.held_out.to_string(),
                "a fraction in (0, 0.5]",
            )
        })?
        .with_keep_fraction(req.keep_fraction)
        .map_err(|_| {
            Error::bad_input(
                "--keep-fraction",
                req.keep_fraction.to_string(),
                "a fraction in (0, 1]",
            )
        })?;
    // the physics part: a given reduction (or template with fitted values), or the template
    // reduced here on the same traces with the same held-out rule (written beside the model)
    let mut reduction = None;
    let physics = match (&req.reduced, &req.template) {
        (Some(p), _) => {
            reduction = understudy::reduce::read_reduced(p).ok();
            Physics::Reduced(read_reduced(p).map_err(map)?)
        }
        (None, template_path) => {
            let template = match template_path {
                Some(t) => understudy::greybox::read_template(t).map_err(|e| Error::BadFile {
                    path: t.clone(),
                    message: e.to_string(),
                })?,
                None => understudy::greybox::generic_converter(),
            };
            if req.no_reduce {
                Physics::FitTemplate(template)
            } else {
                let file = super::reduce::reduce_folder(
                    &req.traces,
                    &template,
                    template_path.as_deref(),
                    req.held_out,
                    &understudy::reduce::ReductionConfig::default(),
                    req.quiet,
                )?;
                let path = reduced_path(&req.out);
                understudy::reduce::write_reduced(&path, &file)
                    .map_err(|e| Error::Failed(e.to_string()))?;
                if !req.quiet {
                    eprintln!("fit: reduced physics written to {}", path.display());
                }
                let template = file.template.clone();
                reduction = Some(file);
                Physics::Reduced(template)
            }
        }
    };
    let traces: Vec<(String, understudy::signal::trace::Trace)> = read_folder(&req.traces)?
        .into_iter()
        .map(|(p, t)| {
            let name = p
                .file_stem()
                .map_or_else(|| p.display().to_string(), |s| s.to_string_lossy().into());
            (name, t)
        })
        .collect();
    if traces.is_empty() {
        return Err(Error::BadFile {
            path: req.traces.clone(),
            message: "no traces (*.csv) found".into(),
        });
    }
    let quiet = req.quiet;
    let outcome = fit_hybrid(&traces, &physics, &config, |line| {
        if !quiet {
            eprintln!("fit: {line}");
        }
    })
    .map_err(|e| match &e {
        HybridError::Residual(_) | HybridError::NonFiniteResidual { .. } => Error::BadFile {
            path: req.traces.clone(),
            message: e.to_string(),
        },
        _ => map(e),
    })?;
    understudy::atomic::write_atomic(&req.out, outcome.model.to_json().as_bytes())
        .map_err(|e| Error::io(&req.out, e))?;
    let report = report_path(&req.out);
    write_report_with(&outcome, reduction.as_ref(), &report).map_err(|e| Error::io(&report, e))?;
    let (mean_reduced, mean_hybrid) = outcome.mean_nrmse();
    let (p_red, p_hyb) = outcome.median_nrmse("p");
    let (q_red, q_hyb) = outcome.median_nrmse("q");
    println!(
        "hybrid: correction order {} (fitted per input at order {}; {} delays, rank {}), {} eigenvalue(s) moved for stability, {} off the negative real axis",
        outcome.order,
        outcome.fitted_order,
        outcome.delays,
        outcome.rank,
        outcome.stability.moved.len(),
        outcome.moved_to_real_axis.len()
    );
    println!(
        "compressed sensing: kept {:.1} % of DCT coefficients, reconstruction error {:.4}",
        100.0 * outcome.compression.keep_fraction,
        outcome.compression.relative_error
    );
    if let Some(cv) = &outcome.cross_validation {
        println!("{}", cv.summary());
    }
    println!(
        "held-out ({} cases) NRMSE % of rating: mean reduced {mean_reduced:.3} → hybrid {mean_hybrid:.3}; median P {p_red:.3} → {p_hyb:.3}; median Q {q_red:.3} → {q_hyb:.3}",
        outcome.validation.len()
    );
    println!("wrote {} and {}", req.out.display(), report.display());
    if outcome.passes() {
        Ok(0)
    } else {
        println!("validation FAILED: some held-out cases are outside the tolerance (see the report's error table)");
        Ok(1)
    }
}

/// `<stem>.reduced.json` next to the model file: the reduction `fit` made.
pub fn reduced_path(out: &Path) -> PathBuf {
    let stem = out
        .file_stem()
        .map_or_else(|| "model".into(), |s| s.to_string_lossy().into_owned());
    out.with_file_name(format!("{stem}.reduced.json"))
}

/// `report.html` next to the model file.
pub fn report_path(out: &Path) -> PathBuf {
    out.parent()
        .filter(|p| !p.as_os_str().is_empty())
        .map_or_else(|| PathBuf::from("report.html"), |p| p.join("report.html"))
}

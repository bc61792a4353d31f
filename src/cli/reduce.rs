//! `understudy reduce`: traces + template → reduced template + reduction log.

use std::path::{Path, PathBuf};
use understudy::greybox::{generic_converter, read_template, FitTrace};
use understudy::reduce::reduction::{split_traces, ReductionEvent};
use understudy::reduce::{
    reduce_template, write_reduced, ReducedFile, ReductionConfig, ReductionError,
};
use understudy::signal::trace::read_folder;
use understudy::Error;

pub struct Request {
    pub traces: PathBuf,
    pub template: Option<PathBuf>,
    pub out: PathBuf,
    pub held_out: f64,
    pub tolerance: Option<f64>,
    pub tolerance_margin: Option<f64>,
    pub min_parameters: Option<usize>,
    pub max_steps: Option<usize>,
    pub decimation: Option<usize>,
    pub geodesic_traces: Option<usize>,
    pub quiet: bool,
}

fn load_traces(dir: &Path) -> Result<Vec<FitTrace>, Error> {
    if !dir.is_dir() {
        return Err(Error::bad_input(
            "--traces",
            dir.display().to_string(),
            "a folder of *.csv traces",
        ));
    }
    read_folder(dir)?
        .into_iter()
        .map(|(path, trace)| {
            trace.check_usable(&path)?;
            let name = path
                .file_stem()
                .map(|s| s.to_string_lossy().into_owned())
                .unwrap_or_default();
            FitTrace::from_trace(&trace, &name).map_err(|e| Error::BadFile {
                path: path.clone(),
                message: e.to_string(),
            })
        })
        .collect()
}

fn config(req: &Request) -> Result<ReductionConfig, Error> {
    let bad = |flag: &str, value: String, e: understudy::fit::ConfigError| {
        Error::bad_input(flag, value, e.to_string())
    };
    let mut c = ReductionConfig::default();
    let (factor, margin) = c.tolerance();
    let (factor, margin) = (
        req.tolerance.unwrap_or(factor),
        req.tolerance_margin.unwrap_or(margin),
    );
    c = c
        .with_tolerance(factor, margin)
        .map_err(|e| bad("--tolerance", format!("{factor} (margin {margin})"), e))?;
    if let Some(n) = req.min_parameters {
        c = c
            .with_min_parameters(n)
            .map_err(|e| bad("--min-parameters", n.to_string(), e))?;
    }
    if let Some(n) = req.max_steps {
        c = c
            .with_max_steps(n)
            .map_err(|e| bad("--max-steps", n.to_string(), e))?;
    }
    if let Some(k) = req.decimation {
        c = c
            .with_decimation(k)
            .map_err(|e| bad("--decimation", k.to_string(), e))?;
    }
    if let Some(n) = req.geodesic_traces {
        c = c
            .with_geodesic_traces(n)
            .map_err(|e| bad("--geodesic-traces", n.to_string(), e))?;
    }
    Ok(c)
}

/// Reduce `template` on the traces in `traces_dir` (split by the shared held-out rule),
/// showing progress on stderr unless `quiet`: the reduced file, not yet written.
pub fn reduce_folder(
    traces_dir: &Path,
    template: &understudy::runtime::block::Template,
    template_path: Option<&Path>,
    held_out_fraction: f64,
    config: &ReductionConfig,
    quiet: bool,
) -> Result<ReducedFile, Error> {
    let traces = load_traces(traces_dir)?;
    let (training, held_out, split) = split_traces(traces, held_out_fraction).map_err(|e| {
        Error::bad_input("--held-out", held_out_fraction.to_string(), e.to_string())
    })?;
    if !quiet {
        eprintln!(
            "reducing `{}` on {} training traces ({} held out)…",
            template.name,
            training.len(),
            held_out.len()
        );
    }
    let outcome = reduce_template(template, &training, &held_out, config, |event| {
        if quiet {
            return;
        }
        match event {
            ReductionEvent::FullFitted { parameters, errors } => eprintln!(
                "  full template fitted: {parameters} parameters, held-out NRMSE P {:.2} %, Q {:.2} %",
                100.0 * errors.held_out.p,
                100.0 * errors.held_out.q
            ),
            ReductionEvent::Step(s) => eprintln!(
                "  step {}: {} — {} → {} parameters, held-out NRMSE P {:.2} %, Q {:.2} %{}",
                s.index,
                s.sentence,
                s.parameters_before,
                s.parameters_after,
                100.0 * s.errors_after.held_out.p,
                100.0 * s.errors_after.held_out.q,
                if s.accepted { "" } else { " (beyond the tolerance: not kept)" }
            ),
            ReductionEvent::FinalRefit => eprintln!("  refit at the full sample rate…"),
        }
    })
    .map_err(|e| match &e {
        ReductionError::Template { .. } => Error::BadFile {
            path: template_path
                .map(Path::to_path_buf)
                .unwrap_or_else(|| PathBuf::from("(built-in template)")),
            message: e.to_string(),
        },
        e if e.is_bad_input() => Error::BadFile {
            path: traces_dir.to_path_buf(),
            message: e.to_string(),
        },
        e => Error::Failed(e.to_string()),
    })?;
    Ok(ReducedFile::new(outcome, split, config))
}

pub fn run(req: Request) -> Result<i32, Error> {
    let config = config(&req)?;
    let template = match &req.template {
        Some(p) => read_template(p).map_err(|e| Error::BadFile {
            path: p.clone(),
            message: e.to_string(),
        })?,
        None => generic_converter(),
    };
    let file = reduce_folder(
        &req.traces,
        &template,
        req.template.as_deref(),
        req.held_out,
        &config,
        req.quiet,
    )?;
    let log = write_reduced(&req.out, &file).map_err(|e| Error::Failed(e.to_string()))?;
    let free =
        |t: &understudy::runtime::block::Template| t.parameters.iter().filter(|p| !p.fixed).count();
    println!(
        "reduced `{}`: {} → {} free parameters, {} → {} states in {} steps; held-out NRMSE \
         P {:.2} % → {:.2} %, Q {:.2} % → {:.2} %\nstopped: {}\nwritten: {} and {}",
        file.full_template.name,
        free(&file.full_template),
        free(&file.template),
        file.full_template.state_count(),
        file.template.state_count(),
        file.steps.iter().filter(|s| s.accepted).count(),
        100.0 * file.errors.full.held_out.p,
        100.0 * file.errors.reduced.held_out.p,
        100.0 * file.errors.full.held_out.q,
        100.0 * file.errors.reduced.held_out.q,
        file.stop.describe(),
        req.out.display(),
        log.display()
    );
    Ok(0)
}

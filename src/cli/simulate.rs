use std::path::PathBuf;
use understudy::study::{Study, UnitKind};
use understudy::{demo, simulate, Error};

pub struct Request {
    pub study: Option<PathBuf>,
    pub unit: Option<String>,
    pub cases: Option<usize>,
    pub seed: Option<u64>,
    pub out: PathBuf,
    pub quiet: bool,
}

pub fn run(req: Request) -> Result<i32, Error> {
    let mut study = match &req.study {
        Some(p) => Study::load(p)?,
        None => demo::demo_study(),
    };
    if let Some(unit) = &req.unit {
        if let Some(path) = unit.strip_prefix("fmu:") {
            return Err(Error::bad_input(
                "--unit",
                unit.clone(),
                format!(
                    "`full-converter`: FMU sources (here {path}) are not available in this version"
                ),
            ));
        }
        study.unit.kind = unit.parse::<UnitKind>()?;
    }
    if let Some(n) = req.cases {
        study.design.cases = n;
    }
    if let Some(s) = req.seed {
        study.design.seed = s;
    }
    study.validate()?;
    let unit = study.unit.clone();
    let (cases, redraws) = study.design.generate(|c| simulate::feasible(&unit, c))?;
    let bar = super::progress_bar(cases.len(), "simulate", req.quiet);
    let summary = simulate::run_study(&study, &cases, redraws, &req.out, &|_, _| bar.inc(1))?;
    bar.finish_and_clear();
    eprintln!(
        "{} traces written to {} ({} failed); {:.1} simulated s per wall s",
        summary.cases.len(),
        req.out.display(),
        summary.failures.len(),
        summary.simulated_seconds_per_wall_second
    );
    for f in &summary.failures {
        eprintln!("  failed: {f}");
    }
    Ok(if summary.failures.is_empty() { 0 } else { 1 })
}

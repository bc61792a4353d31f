use std::path::PathBuf;
use understudy::fmi::blackbox::{self, VariableMap};
use understudy::fmi::import::{Fmu, LoadOptions};
use understudy::study::{Study, UnitKind};
use understudy::{demo, simulate, Error};

pub struct Request {
    pub study: Option<PathBuf>,
    pub unit: Option<String>,
    pub cases: Option<usize>,
    pub seed: Option<u64>,
    pub out: PathBuf,
    pub quiet: bool,
    pub map: Option<PathBuf>,
    pub preload: Vec<PathBuf>,
}

pub fn run(req: Request) -> Result<i32, Error> {
    let mut study = match &req.study {
        Some(p) => Study::load(p)?,
        None => demo::demo_study(),
    };
    let mut fmu_path = None;
    if let Some(unit) = &req.unit {
        match unit.strip_prefix("fmu:") {
            Some(path) => fmu_path = Some(PathBuf::from(path)),
            None => study.unit.kind = unit.parse::<UnitKind>()?,
        }
    }
    if fmu_path.is_none() && (req.map.is_some() || !req.preload.is_empty()) {
        return Err(Error::bad_input(
            "--map/--preload",
            "given",
            "only together with --unit fmu:PATH",
        ));
    }
    if let Some(n) = req.cases {
        study.design.cases = n;
    }
    if let Some(s) = req.seed {
        study.design.seed = s;
    }
    study.validate()?;
    let unit = study.unit.clone();
    let summary = match &fmu_path {
        None => {
            let (cases, redraws) = study.design.generate(|c| simulate::feasible(&unit, c))?;
            let bar = super::progress_bar(cases.len(), "simulate", req.quiet);
            let s = simulate::run_study(&study, &cases, redraws, &req.out, &|_, _| bar.inc(1))?;
            bar.finish_and_clear();
            s
        }
        Some(path) => {
            let map = match &req.map {
                Some(m) => VariableMap::load(m)?,
                None => VariableMap::default(),
            };
            let mut options = LoadOptions::default();
            for p in &req.preload {
                options = options.with_preload(p);
            }
            let fmu = Fmu::load_with(path, &options)?;
            for w in fmu.warnings() {
                eprintln!("warning: {}: {w}", path.display());
            }
            let (cases, redraws) = study.design.generate(blackbox::feasible)?;
            let bar = super::progress_bar(cases.len(), "simulate", req.quiet);
            let s =
                blackbox::run_study_fmu(&fmu, &map, &study, &cases, redraws, &req.out, &|_, _| {
                    bar.inc(1)
                })?;
            bar.finish_and_clear();
            s
        }
    };
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

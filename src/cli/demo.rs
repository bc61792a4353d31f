use std::collections::BTreeMap;
use std::path::Path;
use understudy::fmi::export::{export_fmu, FmiVersion};
use understudy::{demo, simulate, Error};

pub fn run(out: &Path, quiet: bool, json: bool) -> Result<i32, Error> {
    let study = demo::demo_study();
    let unit = study.unit.clone();
    let (cases, redraws) = study.design.generate(|c| simulate::feasible(&unit, c))?;
    if !quiet && !json {
        eprintln!(
            "understudy demo: {} ({} MVA full-converter unit), {} cases",
            study.name,
            study.unit.rating_mva,
            cases.len()
        );
    }
    let traces = out.join("traces");
    let bar = super::progress_bar(cases.len(), "simulate", quiet || json);
    let summary = simulate::run_study(&study, &cases, redraws, &traces, &|_, _| bar.inc(1))?;
    bar.finish_and_clear();
    // the detailed unit as an FMU (the stand-in's FMU follows once the surrogate stages exist)
    let fmu = out.join(format!("{}-detailed.fmu", study.name));
    let exported = export_fmu(&study.detailed_model_file(), &fmu, FmiVersion::V2)?;
    let mut by_kind: BTreeMap<&str, usize> = BTreeMap::new();
    for c in &summary.cases {
        *by_kind.entry(c.disturbance.as_str()).or_default() += 1;
    }
    if json {
        let report = serde_json::json!({
            "study": summary.study,
            "traces": traces,
            "cases": summary.cases.len(),
            "failures": summary.failures,
            "by_disturbance": by_kind,
            "simulated_seconds_per_wall_second": summary.simulated_seconds_per_wall_second,
            "detailed_fmu": exported.path,
            "stages_done": ["traces", "detailed-model fmu"],
            "stages_not_yet_available": ["reduce", "correction", "validation report", "surrogate fmu", "grid sweep"],
        });
        println!("{}", serde_json::to_string_pretty(&report).expect("json"));
    } else {
        println!(
            "traces: {} cases written to {}",
            summary.cases.len(),
            traces.display()
        );
        for (k, n) in &by_kind {
            println!("  {k:<15} {n}");
        }
        println!(
            "detailed model speed: {:.1} simulated s per wall s (all cores)",
            summary.simulated_seconds_per_wall_second
        );
        for f in &summary.failures {
            println!("  failed: {f}");
        }
        println!(
            "detailed unit as an FMI 2.0 Co-Simulation FMU: {} ({} bytes)",
            exported.path.display(),
            exported.bytes
        );
        println!(
            "not yet available in this version: reduction, correction, validation report, stand-in FMU, grid sweep"
        );
    }
    Ok(if summary.failures.is_empty() { 0 } else { 1 })
}

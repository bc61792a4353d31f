use std::path::PathBuf;
use understudy::signal::recording::{ingest_all, Mapping};
use understudy::Error;

pub struct Request {
    pub map: PathBuf,
    pub out: PathBuf,
    pub step_s: Option<f64>,
}

/// Errors of the recordings are reported here (they name the file themselves), with exit code 2
/// for bad input and 1 for I/O failures, as `main` does for the library's `Error`.
pub fn run(req: Request) -> Result<i32, Error> {
    let manifest = match Mapping::load(&req.map).and_then(|m| ingest_all(&m, &req.out, req.step_s))
    {
        Ok(m) => m,
        Err(e) => {
            eprintln!("error: {e}");
            return Ok(e.exit_code());
        }
    };
    eprintln!(
        "{} trace(s) written to {}",
        manifest.traces.len(),
        req.out.display()
    );
    for t in &manifest.traces {
        eprintln!(
            "  {}: {} samples, step {} s, {} s to {} s; phasors: {}",
            t.file, t.samples, t.step_s, t.start_s, t.end_s, t.phasors
        );
        match &t.fault {
            Some(f) => eprintln!("    fault {} s to {} s ({})", f.start_s, f.end_s, f.how),
            None => eprintln!("    no fault window given or detected"),
        }
        if t.filled.is_empty() {
            eprintln!("    no gaps");
        }
        for w in &t.filled {
            let spans: Vec<String> = w
                .spans_s
                .iter()
                .map(|[a, b]| format!("{a}–{b} s"))
                .collect();
            eprintln!(
                "    filled {} sample(s) of `{}` at {} ({} atoms from {} known samples; fit \
                 residual RMS {:.3e} pu, {:.3e} relative)",
                w.samples.len(),
                w.channel,
                spans.join(", "),
                w.atoms,
                w.known_samples,
                w.fit_rms,
                w.fit_relative
            );
        }
    }
    Ok(0)
}

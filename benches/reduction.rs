//! The reduction of the built-in generic template on a demo-like training set, as a plain bench
//! binary that prints measured numbers (one reduction takes minutes, too long for criterion's
//! repeated samples). Run with `cargo bench --bench reduction`.
//!
//! Prints: the wall time of the whole reduction with the default `ReductionConfig`, model
//! evaluations (trace simulations) per second, and the Jacobian's wall time on 1 and on 2
//! threads side by side (rayon pools of each size, in one run).
//!
//! `UNDERSTUDY_BENCH_CASES` (default 24, the demo's count) and `UNDERSTUDY_BENCH_DURATION_S`
//! (default 1.5 s, the demo's) choose the data set.

use std::time::Instant;
use understudy::fit::LeastSquaresModel;
use understudy::greybox::{generic_converter, FitTrace, SignalWeights, TemplateFit};
use understudy::reduce::reduction::{decimate, split_traces, ReductionEvent};
use understudy::reduce::{reduce_template, ReductionConfig};
use understudy::runtime::block::EvalConfig;
use understudy::scenario::ScenarioDesign;
use understudy::simulate::{feasible, simulate_case, SimulationSettings};

fn env_or<T: std::str::FromStr>(name: &str, default: T) -> T {
    std::env::var(name)
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(default)
}

/// The machine's load averages (1, 5, 15 min) from /proc/loadavg, for reading the times.
fn load() -> String {
    std::fs::read_to_string("/proc/loadavg")
        .map(|s| s.split_whitespace().take(3).collect::<Vec<_>>().join(" "))
        .unwrap_or_else(|_| "unknown".into())
}

fn main() {
    println!("load average at start: {}", load());
    let cases_n: usize = env_or("UNDERSTUDY_BENCH_CASES", 24);
    let duration_s: f64 = env_or("UNDERSTUDY_BENCH_DURATION_S", 1.5);
    let study = understudy::demo::demo_study();
    let design = ScenarioDesign {
        cases: cases_n,
        ..study.design.clone()
    };
    let unit = study.unit.clone();
    let (cases, _) = design
        .generate(|c| feasible(&unit, c))
        .expect("demo design");
    let settings = SimulationSettings {
        duration_s,
        internal_signals: false,
        ..SimulationSettings::default()
    };
    let t0 = Instant::now();
    let traces: Vec<FitTrace> = cases
        .iter()
        .filter_map(|case| {
            let (trace, _) = simulate_case(&study.unit, case, &settings).ok()?;
            FitTrace::from_trace(&trace, &case.stem()).ok()
        })
        .collect();
    println!(
        "data: {} traces of {duration_s} s from the detailed model in {:.1} s",
        traces.len(),
        t0.elapsed().as_secs_f64()
    );
    let (training, held_out, _) = split_traces(traces, 0.25).expect("split");
    let config = ReductionConfig::default();
    let template = generic_converter();

    // model evaluations per second, on the decimated training set the loop works on
    let decimated: Vec<FitTrace> = training
        .iter()
        .map(|t| decimate(t, config.decimation()))
        .collect();
    let samples: usize = decimated.iter().map(FitTrace::len).sum();
    let problem = TemplateFit::new(
        &template,
        decimated,
        SignalWeights::default(),
        EvalConfig::default(),
    )
    .expect("template");
    let start = problem.start_log_params();
    let mut r = vec![0.0; problem.residual_count()];
    let repeats = 5;
    let t0 = Instant::now();
    for _ in 0..repeats {
        problem.residuals(&start, &mut r).expect("residuals");
    }
    let per_eval = t0.elapsed().as_secs_f64() / repeats as f64;
    println!(
        "model evaluations: {:.0} trace simulations/s ({:.2e} samples/s; one residual vector of \
         {} traces = {:.1} ms)",
        training.len() as f64 / per_eval,
        samples as f64 / per_eval,
        training.len(),
        1e3 * per_eval
    );

    // the Jacobian on 1 and 2 threads
    let mut times = Vec::new();
    for threads in [1, 2] {
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(threads)
            .build()
            .expect("pool");
        let t0 = Instant::now();
        for _ in 0..3 {
            pool.install(|| problem.jacobian(&start).expect("exact").expect("jacobian"));
        }
        let t = t0.elapsed().as_secs_f64() / 3.0;
        println!(
            "jacobian ({} × {}): {:.1} ms on {threads} thread(s)",
            problem.residual_count(),
            start.len(),
            1e3 * t
        );
        times.push(t);
    }
    println!(
        "jacobian speed-up 1 → 2 threads: {:.2}×",
        times[0] / times[1]
    );

    // the whole reduction
    let t0 = Instant::now();
    let outcome = reduce_template(&template, &training, &held_out, &config, |e| match e {
        ReductionEvent::FullFitted { parameters, errors } => println!(
            "  [{:6.1} s] full fit: {parameters} parameters, held-out NRMSE P {:.2} % Q {:.2} %",
            t0.elapsed().as_secs_f64(),
            100.0 * errors.held_out.p,
            100.0 * errors.held_out.q
        ),
        ReductionEvent::Step(s) => println!(
            "  [{:6.1} s] step {}: {} ({}), held-out P {:.2} % Q {:.2} %",
            t0.elapsed().as_secs_f64(),
            s.index,
            s.sentence,
            if s.accepted { "kept" } else { "not kept" },
            100.0 * s.errors_after.held_out.p,
            100.0 * s.errors_after.held_out.q
        ),
        ReductionEvent::FinalRefit => println!(
            "  [{:6.1} s] final refit at the full sample rate",
            t0.elapsed().as_secs_f64()
        ),
    })
    .expect("reduction");
    let free =
        |t: &understudy::runtime::block::Template| t.parameters.iter().filter(|p| !p.fixed).count();
    println!(
        "reduction: {:.1} s wall on {} threads; {} → {} parameters; held-out NRMSE P {:.2} % → \
         {:.2} %, Q {:.2} % → {:.2} %; stopped: {}",
        t0.elapsed().as_secs_f64(),
        rayon::current_num_threads(),
        free(&outcome.full_template),
        free(&outcome.template),
        100.0 * outcome.full_errors.held_out.p,
        100.0 * outcome.reduced_errors.held_out.p,
        100.0 * outcome.full_errors.held_out.q,
        100.0 * outcome.reduced_errors.held_out.q,
        outcome.stop.describe()
    );
    println!("load average at the end: {}", load());
}

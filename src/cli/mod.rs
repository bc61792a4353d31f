//! Subcommands, one file each; each is thin and calls one library function.

mod check;
mod demo;
mod export;
mod fit;
mod ingest;
mod init;
mod reduce;
mod simulate;

use clap::{Parser, Subcommand};
use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
use std::path::PathBuf;
use understudy::Error;

#[derive(Debug, Parser)]
#[command(
    name = "understudy",
    version,
    about = "Fast, validated stand-in models of converter-connected generators for grid studies"
)]
pub struct Cli {
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Debug, Subcommand)]
pub enum Command {
    /// Run the main job on the embedded demo plant.
    Demo {
        /// Output folder.
        #[arg(long, default_value = "understudy-demo")]
        out: PathBuf,
        /// No progress bar, only the summary.
        #[arg(long)]
        quiet: bool,
        /// Print the summary as JSON.
        #[arg(long)]
        json: bool,
    },
    /// Write a commented study file.
    Init {
        /// Where to write it.
        #[arg(default_value = "study.toml")]
        file: PathBuf,
        /// Replace an existing file.
        #[arg(long)]
        force: bool,
    },
    /// Package a model as an FMI Co-Simulation FMU. MODEL is a model file (JSON,
    /// understudy-model/1) or a study file (TOML), whose detailed unit is exported.
    Export {
        model: PathBuf,
        /// The FMU to write.
        #[arg(long)]
        out: PathBuf,
        /// FMI version: 2 (FMI 2.0 Co-Simulation) or 3 (FMI 3.0 Co-Simulation).
        #[arg(long, default_value = "2")]
        fmi: u8,
        /// Target platforms (comma-separated); only linux64 (FMI 3.0: x86_64-linux) is available.
        #[arg(long, default_value = "linux64")]
        platforms: String,
    },
    /// Fit a grey-box template to traces and reduce it (manifold boundary approximation);
    /// writes the reduced model (JSON, understudy-reduced/1) and a plain-text log beside it.
    Reduce {
        /// Folder of traces (*.csv).
        #[arg(long)]
        traces: PathBuf,
        /// Template file (TOML or JSON; default: the built-in generic converter).
        #[arg(long)]
        template: Option<PathBuf>,
        /// The reduced-model file to write.
        #[arg(long)]
        out: PathBuf,
        /// Fraction of the traces held out for the tolerance check.
        #[arg(long, default_value = "0.25")]
        held_out: f64,
        /// Held-out NRMSE of the reduced model may reach this factor × the full template's
        /// (+ the margin); default 1.5.
        #[arg(long)]
        tolerance: Option<f64>,
        /// Absolute slack of the tolerance (fraction of the data range); default 0.005.
        #[arg(long)]
        tolerance_margin: Option<f64>,
        /// Stop at this many free parameters.
        #[arg(long)]
        min_parameters: Option<usize>,
        /// At most this many reductions.
        #[arg(long)]
        max_steps: Option<usize>,
        /// Keep every k-th sample while reducing (default 2).
        #[arg(long)]
        decimation: Option<usize>,
        /// How many training traces the geodesics use (default 6; refits use all).
        #[arg(long)]
        geodesic_traces: Option<usize>,
        /// No progress lines, only the summary.
        #[arg(long)]
        quiet: bool,
    },
    /// Fit the hybrid surrogate (physics + data-driven correction) to traces and validate it on
    /// held-out ones; writes the model file and report.html next to it. Exit 1 when the
    /// validation fails the tolerance.
    Fit {
        /// Folder of traces (CSV + sidecar, as `simulate` writes).
        #[arg(long)]
        traces: PathBuf,
        /// The reduction's result (understudy-reduced/1 JSON) or a template file with fitted
        /// values, used as the physics part as it is.
        #[arg(long)]
        reduced: Option<PathBuf>,
        /// Template to fit as the physics part when --reduced is not given (default: the
        /// built-in generic converter).
        #[arg(long)]
        template: Option<PathBuf>,
        /// The model file to write (JSON).
        #[arg(long)]
        out: PathBuf,
        /// Fraction of traces held out for validation, in (0, 0.5].
        #[arg(long, default_value = "0.25")]
        held_out: f64,
        /// Fraction of DCT coefficients kept per residual trace, in (0, 1].
        #[arg(long, default_value = "0.05")]
        keep_fraction: f64,
        /// Fit the template as it is, without reducing it first.
        #[arg(long)]
        no_reduce: bool,
        /// No progress lines, only the summary.
        #[arg(long)]
        quiet: bool,
    },
    /// Turn recordings (CSV or COMTRADE) into traces, as a mapping file describes.
    Ingest {
        /// The mapping file (TOML).
        #[arg(long)]
        map: PathBuf,
        /// Output folder for the traces.
        #[arg(long)]
        out: PathBuf,
        /// Output sample step in seconds (default: the mapping's, else the recording's).
        #[arg(long)]
        step: Option<f64>,
    },
    /// Generate fault-response traces from a detailed model.
    Simulate {
        /// Study file (default: the embedded demo study).
        #[arg(long)]
        study: Option<PathBuf>,
        /// `full-converter`, `doubly-fed` or `fmu:PATH` (default: the study's unit).
        #[arg(long)]
        unit: Option<String>,
        /// Number of cases (overrides the study).
        #[arg(long)]
        cases: Option<usize>,
        /// Seed of the scenario design (overrides the study).
        #[arg(long)]
        seed: Option<u64>,
        /// Output folder for the traces.
        #[arg(long)]
        out: PathBuf,
        /// No progress bar.
        #[arg(long)]
        quiet: bool,
        /// With `--unit fmu:PATH`: a TOML file naming the FMU's terminal variables
        /// (v_re, v_im, i_re, i_im, p, q, p_ref, q_ref, optional f_grid).
        #[arg(long)]
        map: Option<PathBuf>,
        /// With `--unit fmu:PATH`: a shared library to load with RTLD_GLOBAL before the FMU
        /// (e.g. libpython3.x.so for FMUs made with pythonfmu). Repeatable.
        #[arg(long)]
        preload: Vec<PathBuf>,
    },
    /// Check an FMU: what it declares, FMI conformance, and (with --traces) its errors against
    /// recorded traces. The FMU runs in a child process. Exit 0 all pass, 1 a finding, 2 bad input.
    Check {
        fmu: PathBuf,
        /// A folder of traces to replay (terminal voltage in, current and P, Q compared).
        #[arg(long)]
        traces: Option<PathBuf>,
        /// Print the report as JSON.
        #[arg(long)]
        json: bool,
        /// A TOML file naming the FMU's terminal variables (default: understudy's names).
        #[arg(long)]
        map: Option<PathBuf>,
        /// A shared library to load with RTLD_GLOBAL before the FMU. Repeatable.
        #[arg(long)]
        preload: Vec<PathBuf>,
    },
    /// (internal) the child process of `check`.
    #[command(name = "__check-worker", hide = true)]
    CheckWorker {
        fmu: PathBuf,
        #[arg(long)]
        traces: Option<PathBuf>,
        #[arg(long)]
        map: Option<PathBuf>,
        #[arg(long)]
        preload: Vec<PathBuf>,
    },
}

pub fn run(cli: Cli) -> Result<i32, Error> {
    match cli.command {
        Command::Demo { out, quiet, json } => demo::run(&out, quiet, json),
        Command::Init { file, force } => init::run(&file, force),
        Command::Export {
            model,
            out,
            fmi,
            platforms,
        } => export::run(&model, &out, fmi, &platforms),
        Command::Reduce {
            traces,
            template,
            out,
            held_out,
            tolerance,
            tolerance_margin,
            min_parameters,
            max_steps,
            decimation,
            geodesic_traces,
            quiet,
        } => reduce::run(reduce::Request {
            traces,
            template,
            out,
            held_out,
            tolerance,
            tolerance_margin,
            min_parameters,
            max_steps,
            decimation,
            geodesic_traces,
            quiet,
        }),
        Command::Ingest { map, out, step } => ingest::run(ingest::Request {
            map,
            out,
            step_s: step,
        }),
        Command::Fit {
            traces,
            reduced,
            template,
            out,
            held_out,
            keep_fraction,
            no_reduce,
            quiet,
        } => fit::run(fit::Request {
            traces,
            reduced,
            template,
            out,
            held_out,
            keep_fraction,
            no_reduce,
            quiet,
        }),
        Command::Simulate {
            study,
            unit,
            cases,
            seed,
            out,
            quiet,
            map,
            preload,
        } => simulate::run(simulate::Request {
            study,
            unit,
            cases,
            seed,
            out,
            quiet,
            map,
            preload,
        }),
        Command::Check {
            fmu,
            traces,
            json,
            map,
            preload,
        } => check::run(check::Request {
            fmu,
            traces,
            map,
            preload,
            json,
        }),
        Command::CheckWorker {
            fmu,
            traces,
            map,
            preload,
        } => check::worker(&fmu, traces.as_deref(), map.as_deref(), &preload),
    }
}

/// A progress bar on stderr (hidden when quiet or when stderr is not a terminal).
pub fn progress_bar(total: usize, label: &str, quiet: bool) -> ProgressBar {
    let bar = ProgressBar::new(total as u64);
    if quiet {
        bar.set_draw_target(ProgressDrawTarget::hidden());
    }
    bar.set_style(
        ProgressStyle::with_template("{prefix:>10} [{bar:30}] {pos}/{len} {elapsed_precise}")
            .expect("static template")
            .progress_chars("=> "),
    );
    bar.set_prefix(label.to_string());
    bar
}

//! Subcommands, one file each; each is thin and calls one library function.

mod check;
mod demo;
mod export;
mod init;
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
        /// FMI version: 2 (3 is not available yet).
        #[arg(long, default_value = "2")]
        fmi: u8,
        /// Target platforms (comma-separated); only linux64 is available.
        #[arg(long, default_value = "linux64")]
        platforms: String,
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

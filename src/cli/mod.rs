//! Subcommands, one file each; each is thin and calls one library function.

mod demo;
mod export;
mod fit;
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
        /// No progress lines, only the summary.
        #[arg(long)]
        quiet: bool,
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
        Command::Fit {
            traces,
            reduced,
            template,
            out,
            held_out,
            keep_fraction,
            quiet,
        } => fit::run(fit::Request {
            traces,
            reduced,
            template,
            out,
            held_out,
            keep_fraction,
            quiet,
        }),
        Command::Simulate {
            study,
            unit,
            cases,
            seed,
            out,
            quiet,
        } => simulate::run(simulate::Request {
            study,
            unit,
            cases,
            seed,
            out,
            quiet,
        }),
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

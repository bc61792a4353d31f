//! The hybrid's validation report (self-contained HTML, written atomically).

use super::HybridOutcome;
use crate::reduce::reduction::{fisher_spectrum_svg, geodesic_path_svg};
use crate::reduce::ReducedFile;
use crate::validate::metrics::Window;
use crate::validate::plot::{eigenvalue_plot, heat_map, line_chart, log_spectrum, Series};
use crate::validate::report::{Report, CAUTION};
use std::path::Path;

/// Write `report.html` for `outcome` to `path` (atomically).
pub fn write_report(outcome: &HybridOutcome, path: &Path) -> std::io::Result<()> {
    write_report_with(outcome, None, path)
}

/// As [`write_report`], with the reduction that made the physics part (its log, the Fisher
/// eigen-spectra and the geodesic parameter paths) when there was one.
pub fn write_report_with(
    outcome: &HybridOutcome,
    reduction: Option<&ReducedFile>,
    path: &Path,
) -> std::io::Result<()> {
    let mut r = Report::new("understudy — hybrid surrogate validation");
    r.paragraph(CAUTION);
    let (mean_reduced, mean_hybrid) = outcome.mean_nrmse();
    r.heading("Summary").paragraph(&format!(
        "Trained on {} traces, validated on {} held-out traces (never used in fitting). \
         Correction: poles from DMD with control on {} delays (rank {}), realised per input \
         with its output map fitted for free run (order {}), then realised exactly with one \
         state per output (of each output map: the dip map, when chosen, has its own) and \
         pole: order {} (continuous time, modal, block diagonal); its inputs are held inside \
         the range seen in training. \
         Mean NRMSE over held-out cases and signals: reduced {:.3} %, hybrid {:.3} % of rating. \
         Verdict: {}.",
        outcome.training.len(),
        outcome.validation.len(),
        outcome.delays,
        outcome.rank,
        outcome.fitted_order,
        outcome.order,
        mean_reduced,
        mean_hybrid,
        if outcome.passes() {
            "every held-out case within tolerance"
        } else {
            "some held-out cases are OUTSIDE the tolerance"
        }
    ));
    if let Some(cv) = &outcome.cross_validation {
        r.paragraph(&format!("Correction chosen by {}.", cv.summary()));
    }
    r.heading("Compressed sensing").paragraph(&format!(
        "Residual set compressed with the orthonormal DCT-II keeping {:.1} % of the \
         coefficients per trace (ramp removed first); relative reconstruction error \
         ‖x − x̂‖/‖x‖ = {:.4}. The correction is fitted on the raw residuals, not on this \
         compression.",
        100.0 * outcome.compression.keep_fraction,
        outcome.compression.relative_error
    ));
    r.heading("Kept DCT coefficients");
    r.figure(
        &log_spectrum(
            "Kept DCT coefficients (first training trace, Δi_d)",
            "|coefficient|",
            &outcome.compression.example_kept,
        ),
        "Magnitudes of the kept coefficients, largest first.",
    );
    let rows: Vec<Vec<f64>> = outcome
        .residual_rows
        .iter()
        .map(|(_, r)| r.clone())
        .collect();
    let labels: Vec<String> = outcome
        .residual_rows
        .iter()
        .map(|(n, _)| n.clone())
        .collect();
    let n = rows.iter().map(Vec::len).min().unwrap_or(0);
    let rows: Vec<Vec<f64>> = rows.into_iter().map(|r| r[..n].to_vec()).collect();
    r.heading("Residuals across cases");
    r.figure(
        &heat_map(
            "Residual Δi_d (detailed − reduced) across training cases",
            &outcome.residual_time_s[..n.min(outcome.residual_time_s.len())],
            &labels,
            &rows,
        ),
        "Time (s) across, one row per training case; pu on the rating.",
    );
    let s = &outcome.stability;
    r.heading("Correction stability").paragraph(&format!(
        "Stability margin {}: {} eigenvalue(s) moved onto the margin; spectral radius after \
         enforcement {:.6}.{}",
        s.margin,
        s.moved.len(),
        s.spectral_radius,
        s.moved
            .iter()
            .map(|m| format!(
                " {:.6}{:+.6}i → {:.6}{:+.6}i.",
                m.before.re, m.before.im, m.after.re, m.after.im
            ))
            .collect::<String>()
    ));
    r.paragraph(&format!(
        "{} real eigenvalue(s) ≤ 0 (no continuous-time form at this sample step) moved to \
         their modulus:{}",
        outcome.moved_to_real_axis.len(),
        outcome
            .moved_to_real_axis
            .iter()
            .map(|m| format!(" {:.4} → {:.4}.", m.before.re, m.after.re))
            .collect::<String>()
    ));
    let eig: Vec<(f64, f64)> = outcome
        .discrete_eigenvalues
        .iter()
        .map(|v| (v.re, v.im))
        .collect();
    r.heading("DMD eigenvalues");
    r.figure(
        &eigenvalue_plot("DMD eigenvalues of the correction", &eig),
        "Discrete-time eigenvalues at the sample step, with the unit circle.",
    );

    r.heading("Held-out cases");
    for (c, case) in outcome
        .validation
        .iter()
        .zip(&outcome.held_out_cases)
        .take(3)
    {
        for (label, detailed, reduced, hybrid) in [
            ("P", &case.data.p, &c.reduced_outputs.p, &c.hybrid_outputs.p),
            ("Q", &case.data.q, &c.reduced_outputs.q, &c.hybrid_outputs.q),
        ] {
            r.figure(
                &line_chart(
                    &format!("{} — {label}", c.name),
                    "t (s)",
                    &format!("{label} (pu)"),
                    &[
                        Series {
                            name: "detailed",
                            x: &case.time_s,
                            y: detailed,
                            dashed: false,
                        },
                        Series {
                            name: "reduced",
                            x: &case.time_s,
                            y: reduced,
                            dashed: true,
                        },
                        Series {
                            name: "hybrid",
                            x: &case.time_s,
                            y: hybrid,
                            dashed: false,
                        },
                    ],
                ),
                "Detailed vs reduced vs hybrid.",
            );
        }
    }

    let w = &outcome.windows;
    r.heading("Tolerances").table(
        &["window kind", "|ME| ≤", "MAE ≤", "MXE ≤", "origin"],
        &[
            vec![
                "quasi-steady".into(),
                w.steady.mean.to_string(),
                w.steady.mean_abs.to_string(),
                w.steady.max_abs.to_string(),
                "IEC 61400-27-1/-2 validation defaults (from memory; check the edition in force)"
                    .into(),
            ],
            vec![
                "transient".into(),
                w.transient.mean.to_string(),
                w.transient.mean_abs.to_string(),
                w.transient.max_abs.to_string(),
                "only the mean error is bounded by that method".into(),
            ],
            vec![
                "whole record NRMSE (% of rating)".into(),
                w.nrmse_percent.to_string(),
                String::new(),
                String::new(),
                "common practice; our default".into(),
            ],
        ],
    );

    let mut rows = Vec::new();
    for c in &outcome.validation {
        for (red, hyb) in c.reduced.iter().zip(&c.hybrid) {
            let worst = |s: &crate::validate::metrics::SignalComparison| {
                s.windows
                    .iter()
                    .filter(|e| e.window != Window::PreFault)
                    .map(|e| e.max_abs)
                    .fold(0.0, f64::max)
            };
            rows.push(vec![
                c.name.clone(),
                red.signal.clone(),
                format!("{:.3}", red.nrmse_percent),
                format!("{:.3}", hyb.nrmse_percent),
                format!("{:.4}", worst(red)),
                format!("{:.4}", worst(hyb)),
                if hyb.within_tolerance { "yes" } else { "NO" }.into(),
            ]);
        }
    }
    r.heading("Error table").table(
        &[
            "case",
            "signal",
            "NRMSE reduced (%)",
            "NRMSE hybrid (%)",
            "MXE reduced (pu)",
            "MXE hybrid (pu)",
            "hybrid within tolerance",
        ],
        &rows,
    );
    let mut windows_rows = Vec::new();
    for c in &outcome.validation {
        for hyb in &c.hybrid {
            for e in &hyb.windows {
                windows_rows.push(vec![
                    c.name.clone(),
                    hyb.signal.clone(),
                    e.window.label().into(),
                    format!("{:.4}", e.mean),
                    format!("{:.4}", e.mean_abs),
                    format!("{:.4}", e.max_abs),
                ]);
            }
        }
    }
    r.heading("Window errors of the hybrid (IEC 61400-27-2 window method)")
        .table(
            &["case", "signal", "window", "ME", "MAE", "MXE"],
            &windows_rows,
        );
    if let Some(red) = reduction {
        reduction_section(&mut r, red);
    }
    r.paragraph(CAUTION);
    crate::atomic::write_atomic(path, r.to_html().as_bytes())
}

/// The reduction behind the physics part: each step in words, its Fisher eigen-spectrum (the
/// sloppiness picture) and the parameters along the geodesic that reached the boundary.
fn reduction_section(r: &mut Report, red: &ReducedFile) {
    r.heading("Reduction of the physics (manifold boundary approximation)");
    r.paragraph(&format!(
        "Template `{}` reduced to {} free parameters ({} states); stopped: {}",
        red.full_template.name,
        red.template.parameters.iter().filter(|p| !p.fixed).count(),
        red.template.state_count(),
        red.stop.describe()
    ));
    let rows: Vec<Vec<String>> = red
        .steps
        .iter()
        .map(|s| {
            vec![
                s.index.to_string(),
                s.sentence.clone(),
                if s.accepted { "kept" } else { "not kept" }.to_string(),
                format!("{} → {}", s.parameters_before, s.parameters_after),
                format!("{} → {}", s.states_before, s.states_after),
                format!(
                    "{:.2} / {:.2}",
                    100.0 * s.errors_after.held_out.p,
                    100.0 * s.errors_after.held_out.q
                ),
            ]
        })
        .collect();
    r.table(
        &[
            "step",
            "limit taken",
            "verdict",
            "parameters",
            "states",
            "held-out NRMSE P / Q (%)",
        ],
        &rows,
    );
    for s in red.steps.iter().filter(|s| s.accepted) {
        r.figure(
            &fisher_spectrum_svg(s),
            &format!(
                "Step {}: eigenvalues of the Fisher information JᵀJ in log-parameters before the step.",
                s.index
            ),
        );
        r.figure(
            &geodesic_path_svg(s),
            &format!(
                "Step {}: log-parameters along the geodesic that reached the boundary.",
                s.index
            ),
        );
    }
}

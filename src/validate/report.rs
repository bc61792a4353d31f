//! A self-contained HTML report: sections of text, tables and inline SVG figures, with the
//! caution every report carries. Written atomically.

use crate::atomic::write_atomic;
use std::fmt::Write as _;
use std::path::Path;

/// The caution printed at the top of every report.
pub const CAUTION: &str = "Results support, and do not replace, studies under local grid codes \
and licensed engineering practice. A stand-in model is only as good as the faults it was trained \
and validated on: check its validity envelope before relying on it.";

/// Escape text for HTML.
pub fn escape(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}

/// An HTML report under construction.
pub struct Report {
    title: String,
    body: String,
}

impl Report {
    pub fn new(title: &str) -> Self {
        Self {
            title: title.to_string(),
            body: String::new(),
        }
    }

    pub fn heading(&mut self, text: &str) -> &mut Self {
        let _ = writeln!(self.body, "<h2>{}</h2>", escape(text));
        self
    }

    pub fn paragraph(&mut self, text: &str) -> &mut Self {
        let _ = writeln!(self.body, "<p>{}</p>", escape(text));
        self
    }

    /// A figure from SVG text produced by [`super::plot`].
    pub fn figure(&mut self, svg: &str, caption: &str) -> &mut Self {
        let _ = writeln!(
            self.body,
            "<figure>{svg}<figcaption>{}</figcaption></figure>",
            escape(caption)
        );
        self
    }

    /// A table; cells are escaped. Rows whose last cell starts with "✗" are highlighted.
    pub fn table(&mut self, header: &[&str], rows: &[Vec<String>]) -> &mut Self {
        self.body.push_str("<table><thead><tr>");
        for h in header {
            let _ = write!(self.body, "<th>{}</th>", escape(h));
        }
        self.body.push_str("</tr></thead><tbody>\n");
        for r in rows {
            let bad = r.last().is_some_and(|c| c.starts_with('✗'));
            self.body
                .push_str(if bad { "<tr class=\"bad\">" } else { "<tr>" });
            for c in r {
                let _ = write!(self.body, "<td>{}</td>", escape(c));
            }
            self.body.push_str("</tr>\n");
        }
        self.body.push_str("</tbody></table>\n");
        self
    }

    pub fn to_html(&self) -> String {
        format!(
            "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\"><title>{t}</title>\n\
<style>body{{font-family:sans-serif;max-width:980px;margin:2em auto;color:#222}}\
table{{border-collapse:collapse;margin:1em 0;font-size:13px}}td,th{{border:1px solid #ccc;padding:3px 8px;text-align:right}}\
th{{background:#f3f3f3}}tr.bad td{{background:#fde8e8}}figure{{margin:1em 0}}figcaption{{font-size:13px;color:#555}}\
.caution{{border-left:4px solid #d9822b;background:#fff6ea;padding:.6em 1em}}</style></head>\n\
<body><h1>{t}</h1>\n<p class=\"caution\"><strong>Caution.</strong> {c}</p>\n{b}</body></html>\n",
            t = escape(&self.title),
            c = escape(CAUTION),
            b = self.body
        )
    }

    /// Write the report atomically.
    pub fn write(&self, path: &Path) -> std::io::Result<()> {
        write_atomic(path, self.to_html().as_bytes())
    }
}

#[cfg(test)]
mod tests {
    use super::super::plot;
    use super::*;

    #[test]
    fn report_is_self_contained_with_figures_and_caution() {
        let x: Vec<f64> = (0..200).map(|k| k as f64 * 0.01).collect();
        let y: Vec<f64> = x.iter().map(|t| (3.0 * t).sin()).collect();
        let z: Vec<f64> = x.iter().map(|t| (3.0 * t).cos()).collect();
        let mut r = Report::new("check <report>");
        r.heading("traces")
            .figure(
                &plot::line_chart(
                    "p",
                    "t (s)",
                    "pu",
                    &[
                        plot::Series {
                            name: "a",
                            x: &x,
                            y: &y,
                            dashed: false,
                        },
                        plot::Series {
                            name: "b",
                            x: &x,
                            y: &z,
                            dashed: true,
                        },
                    ],
                ),
                "two lines",
            )
            .figure(
                &plot::heat_map(
                    "residuals",
                    &x,
                    &["c1".into(), "c2".into()],
                    &[y.clone(), z.clone()],
                ),
                "heat",
            )
            .figure(
                &plot::eigenvalue_plot("eig", &[(0.9, 0.2), (0.9, -0.2)]),
                "eig",
            )
            .figure(
                &plot::log_spectrum("fim", "λ", &[1e-6, 1e-2, 3.0]),
                "spectrum",
            )
            .table(
                &["a", "ok"],
                &[
                    vec!["1".into(), "✓".into()],
                    vec!["2".into(), "✗ no".into()],
                ],
            );
        let html = r.to_html();
        assert_eq!(html.matches("<svg").count(), 4, "four inline figures");
        assert!(!html.contains("plot failed"));
        assert!(html.contains("check &lt;report&gt;"));
        assert!(html.contains("do not replace"));
        assert!(html.contains("class=\"bad\""));
        assert!(
            !html.contains("src=\"http"),
            "self-contained: no external resources"
        );
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("r.html");
        r.write(&path).unwrap();
        assert_eq!(std::fs::read_to_string(path).unwrap(), html);
    }
}

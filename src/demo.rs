//! The embedded demo: the invented "Tarn Moss" plant (see `demo-models/`), carried inside the
//! binary so `understudy demo` needs no files.

use crate::study::Study;
use std::path::Path;

/// The demo study file, verbatim (it is also what `understudy init` writes).
pub const DEMO_STUDY: &str = include_str!("../demo-models/demo-plant.toml");

/// The parsed demo study.
pub fn demo_study() -> Study {
    Study::from_toml(DEMO_STUDY, Path::new("demo-models/demo-plant.toml"))
        .expect("the embedded demo study is valid (checked by a test)")
}

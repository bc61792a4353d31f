use std::path::Path;
use understudy::fmi::export::{export_fmu, FmiVersion};
use understudy::runtime::cosim::ModelFile;
use understudy::study::Study;
use understudy::Error;

pub fn run(model: &Path, out: &Path, fmi: u8, platforms: &str) -> Result<i32, Error> {
    let version = match fmi {
        2 => FmiVersion::V2,
        3 => FmiVersion::V3,
        other => return Err(Error::bad_input("--fmi", other.to_string(), "2 or 3")),
    };
    for p in platforms.split(',').map(str::trim) {
        if p != "linux64" && p != "x86_64-linux" {
            return Err(Error::bad_input(
                "--platforms",
                p,
                "linux64 or x86_64-linux (other platforms are not available yet)",
            ));
        }
    }
    let file = if model.extension().is_some_and(|e| e == "toml") {
        Study::load(model)?.detailed_model_file()
    } else {
        let bytes = std::fs::read(model).map_err(|e| Error::io(model, e))?;
        ModelFile::from_json(&bytes).map_err(|e| Error::BadFile {
            path: model.to_path_buf(),
            message: e.to_string(),
        })?
    };
    let report = export_fmu(&file, out, version)?;
    eprintln!(
        "wrote {} ({} bytes, model identifier {}, guid {})",
        report.path.display(),
        report.bytes,
        report.model_identifier,
        report.guid
    );
    Ok(0)
}

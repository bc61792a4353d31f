use std::path::Path;
use understudy::{demo::DEMO_STUDY, Error};

pub fn run(file: &Path, force: bool) -> Result<i32, Error> {
    if file.exists() && !force {
        return Err(Error::bad_input(
            "FILE",
            file.display().to_string(),
            "a path that does not exist yet (or pass --force to replace it)",
        ));
    }
    understudy::atomic::write_atomic(file, DEMO_STUDY.as_bytes())
        .map_err(|e| Error::io(file, e))?;
    eprintln!(
        "wrote {} (the demo plant's study; edit it for your unit)",
        file.display()
    );
    Ok(0)
}

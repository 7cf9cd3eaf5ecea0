//! `gibbsline config check`: validate a configuration file as a start
//! would, without starting anything.

use super::UsageError;
use std::path::Path;

/// The file alone: this machine's environment is not the one the file is
/// meant for, so `GIBBSLINE_*` variables are not applied.
pub(crate) fn run(file: &Path, no_files: bool) -> anyhow::Result<()> {
    let label = file.display().to_string();
    let text = std::fs::read_to_string(file).map_err(|e| UsageError(format!("{label}: {e}")))?;
    let config = gibbsline::config::load(&label, &text, &Default::default()).map_err(|e| {
        // A rig agent's file given here by mistake: say what it is.
        let agent = ["connect", "spool", "source"]
            .iter()
            .any(|key| e.to_string().contains(&format!("unknown field `{key}`")));
        let hint = if agent {
            format!(" — this looks like a rig agent's file: `gibbsline rig check {label}`")
        } else {
            String::new()
        };
        UsageError(format!("{e}{hint}"))
    })?;
    config
        .check_exposure()
        .map_err(|e| UsageError(format!("{}: {e}", file.display())))?;
    if !no_files {
        config
            .read_tls()
            .map_err(|e| UsageError(format!("{}: {e}", file.display())))?;
    }
    let chemistries = match config.chemistry.len() {
        1 => "1 chemistry".to_string(),
        n => format!("{n} chemistries"),
    };
    let channels = match config.channel.len() {
        1 => "1 channel".to_string(),
        n => format!("{n} channels"),
    };
    println!("{}: ok ({channels}, {chemistries})", file.display());
    Ok(())
}

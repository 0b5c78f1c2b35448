//! The desktop app (egui). The only part of ductline that touches the GUI.

use std::path::PathBuf;

pub fn run(_path: Option<PathBuf>) -> anyhow::Result<()> {
    anyhow::bail!("app not built yet")
}

//! The project file: versioned JSON with the stack reference, voxel size, landmarks, settings and
//! per-section overrides. Saves are atomic (write a temporary file, flush it to disk, rename).

use crate::centreline::FitSettings;
use crate::landmarks::Landmark;
use crate::measure::{MeasureSettings, Override};
use crate::{Error, Result};
use serde::{Deserialize, Serialize};
use std::io::Write;
use std::path::{Path, PathBuf};

/// The format version this build writes; older ones are migrated on load, newer ones refused.
pub const FORMAT_VERSION: u32 = 2;

/// Writes `bytes` to `path` atomically: a temporary file beside it, fsync, rename over.
/// A crash at any point leaves either the old file or the new one, never a mix.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> Result<()> {
    let dir = path.parent().filter(|p| !p.as_os_str().is_empty()).unwrap_or(Path::new("."));
    let name = path.file_name().map(|n| n.to_string_lossy().to_string()).unwrap_or_else(|| "out".into());
    let tmp = dir.join(format!(".{name}.{}.partial", std::process::id()));
    let res = (|| -> std::io::Result<()> {
        let mut f = std::fs::File::create(&tmp)?;
        f.write_all(bytes)?;
        f.sync_all()?;
        std::fs::rename(&tmp, path)?;
        if let Ok(d) = std::fs::File::open(dir) {
            let _ = d.sync_all();
        }
        Ok(())
    })();
    res.map_err(|e| {
        let _ = std::fs::remove_file(&tmp);
        Error::io(path, e)
    })
}

/// The stack a project refers to.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct StackRef {
    /// Path relative to the project file's folder (or absolute when on another drive).
    pub path: String,
    /// Bytes on disk (all files of a slice folder).
    pub bytes: u64,
    /// Content fingerprint (FNV-1a 64 over the bytes; files over 256 MB: over 64 spread 1 MB blocks).
    pub hash: String,
}

/// Everything the user made for one specimen.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Project {
    pub format: String,
    pub version: u32,
    pub stack: StackRef,
    /// Voxel size the user gave (µm), when the file has none or it was overridden.
    pub voxel_um: Option<[f64; 3]>,
    pub species: String,
    pub landmarks: Vec<Landmark>,
    pub fit: FitSettings,
    pub measure: MeasureSettings,
    #[serde(default)]
    pub overrides: Vec<Override>,
    /// Landmarks proposed by the tracer and not yet reviewed (accepted or discarded in the app).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub proposals: Vec<crate::trace::Proposed>,
}

impl Project {
    /// A new project for a stack at `stack_path`, to be saved at `project_path`.
    pub fn new(stack_path: &Path, project_path: &Path) -> Result<Project> {
        Ok(Project { stack: stack_ref(stack_path, project_path)?, ..Project::unsaved(stack_path) })
    }

    /// Default settings for a stack, with no fingerprint (for runs that save no project).
    pub fn unsaved(stack_path: &Path) -> Project {
        Project {
            format: "ductline-project".into(),
            version: FORMAT_VERSION,
            stack: StackRef { path: stack_path.to_string_lossy().to_string(), bytes: 0, hash: String::new() },
            voxel_um: None,
            species: "human".into(),
            landmarks: vec![],
            fit: FitSettings::default(),
            measure: MeasureSettings::default(),
            overrides: vec![],
            proposals: vec![],
        }
    }

    /// The stack path resolved against the project file's folder.
    pub fn stack_path(&self, project_path: &Path) -> PathBuf {
        let p = Path::new(&self.stack.path);
        if p.is_absolute() { p.to_path_buf() } else { project_path.parent().unwrap_or(Path::new(".")).join(p) }
    }

    /// JSON text exactly as saved (stable: save → load → save is byte-identical).
    pub fn to_json(&self) -> String {
        let mut s = serde_json::to_string_pretty(self).unwrap_or_default();
        s.push('\n');
        s
    }

    pub fn save(&self, path: &Path) -> Result<()> {
        write_atomic(path, self.to_json().as_bytes())
    }

    /// Loads and migrates a project; refuses a newer format.
    pub fn load(path: &Path) -> Result<Project> {
        let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, e))?;
        Self::parse(&text, path)
    }

    pub fn parse(text: &str, path: &Path) -> Result<Project> {
        let mut v: serde_json::Value = serde_json::from_str(text).map_err(|e| Error::format(path, format!("not a project file (JSON error: {e})")))?;
        if v.get("format").and_then(|f| f.as_str()) != Some("ductline-project") {
            return Err(Error::format(path, "not a ductline project (no \"format\": \"ductline-project\")"));
        }
        let version = v.get("version").and_then(|x| x.as_u64()).ok_or_else(|| Error::format(path, "project has no version number"))? as u32;
        if version > FORMAT_VERSION {
            return Err(Error::format(path, format!("project format {version} is newer than this ductline reads ({FORMAT_VERSION}); update ductline")));
        }
        if version < 2 {
            migrate_v1(&mut v);
        }
        serde_json::from_value(v).map_err(|e| Error::format(path, format!("project file is damaged: {e}")))
    }

    /// Warning text when the stack on disk differs from the one the project was made on.
    pub fn stack_changed(&self, project_path: &Path) -> Option<String> {
        let p = self.stack_path(project_path);
        match stack_ref(&p, project_path) {
            Ok(now) if now.bytes == self.stack.bytes && now.hash == self.stack.hash => None,
            Ok(_) => Some(format!("{}: the stack changed since the project was saved (size or content differ); check the landmarks", p.display())),
            Err(e) => Some(e.to_string()),
        }
    }
}

/// Format 1 kept the voxel size in mm under `voxel_mm` and had no overrides.
fn migrate_v1(v: &mut serde_json::Value) {
    if let Some(obj) = v.as_object_mut() {
        if let Some(mm) = obj.remove("voxel_mm") {
            let um = mm.as_array().map(|a| a.iter().map(|x| x.as_f64().unwrap_or(0.0) * 1000.0).collect::<Vec<_>>());
            obj.insert("voxel_um".into(), um.map(serde_json::Value::from).unwrap_or(serde_json::Value::Null));
        }
        obj.entry("overrides").or_insert(serde_json::json!([]));
        obj.insert("version".into(), serde_json::json!(FORMAT_VERSION));
    }
}

/// Size and fingerprint of a stack file or slice folder, with its path relative to the project.
pub fn stack_ref(stack_path: &Path, project_path: &Path) -> Result<StackRef> {
    let (bytes, hash) = fingerprint(stack_path)?;
    Ok(StackRef { path: relative(stack_path, project_path), bytes, hash })
}

/// Bytes on disk and content fingerprint of a stack file or slice folder (reads up to 256 MB a
/// file, 64 spread 1 MB blocks beyond; a slice folder reads all its files: compute it once).
pub fn fingerprint(stack_path: &Path) -> Result<(u64, String)> {
    let files: Vec<PathBuf> = if stack_path.is_dir() { crate::stack::folder_files(stack_path)? } else { vec![stack_path.to_path_buf()] };
    let mut h = Fnv::new();
    let mut bytes = 0;
    for f in &files {
        let meta = std::fs::metadata(f).map_err(|e| Error::io(f, e))?;
        bytes += meta.len();
        h.feed(f.file_name().map(|n| n.to_string_lossy().to_string()).unwrap_or_default().as_bytes());
        fingerprint_file(f, meta.len(), &mut h)?;
    }
    Ok((bytes, format!("{:016x}", h.0)))
}

fn fingerprint_file(f: &Path, len: u64, h: &mut Fnv) -> Result<()> {
    use std::io::{Read, Seek, SeekFrom};
    let mut file = std::fs::File::open(f).map_err(|e| Error::io(f, e))?;
    const BLOCK: u64 = 1 << 20;
    if len <= 256 * BLOCK {
        let mut buf = vec![];
        file.read_to_end(&mut buf).map_err(|e| Error::io(f, e))?;
        h.feed(&buf);
    } else {
        let mut buf = vec![0u8; BLOCK as usize];
        for i in 0..64u64 {
            let at = (len - BLOCK) * i / 63;
            file.seek(SeekFrom::Start(at)).map_err(|e| Error::io(f, e))?;
            file.read_exact(&mut buf).map_err(|e| Error::io(f, e))?;
            h.feed(&buf);
        }
    }
    Ok(())
}

struct Fnv(u64);
impl Fnv {
    fn new() -> Self {
        Fnv(0xcbf2_9ce4_8422_2325)
    }
    fn feed(&mut self, b: &[u8]) {
        for x in b {
            self.0 ^= *x as u64;
            self.0 = self.0.wrapping_mul(0x0100_0000_01b3);
        }
    }
}

/// `target` relative to the folder of `project`, falling back to the absolute path.
pub fn relative(target: &Path, project: &Path) -> String {
    let abs = |p: &Path| std::path::absolute(p).unwrap_or_else(|_| p.to_path_buf());
    let t = abs(target);
    let base = abs(project.parent().filter(|p| !p.as_os_str().is_empty()).unwrap_or(Path::new(".")));
    let tc: Vec<_> = t.components().collect();
    let bc: Vec<_> = base.components().collect();
    let common = tc.iter().zip(&bc).take_while(|(a, b)| a == b).count();
    if common == 0 {
        return t.to_string_lossy().to_string();
    }
    let mut rel = PathBuf::new();
    for _ in common..bc.len() {
        rel.push("..");
    }
    for c in &tc[common..] {
        rel.push(c.as_os_str());
    }
    rel.to_string_lossy().replace('\\', "/")
}

//! The open specimen: the stack, the landmarks with their history, settings and results.
//! Serialisable state lives in [`ductline::project::Project`]; this adds what is derived.

use ductline::centreline::{Centreline, FitSettings};
use ductline::landmarks::LandmarkSet;
use ductline::measure::{MeasureSettings, Override};
use ductline::pipeline::{self, Outcome};
use ductline::project::Project;
use ductline::stack::{Stack, VoxelSize};
use std::path::{Path, PathBuf};
use std::sync::Arc;

pub struct Doc {
    pub stack: Arc<Stack>,
    pub stack_path: PathBuf,
    pub project_path: Option<PathBuf>,
    pub lms: LandmarkSet,
    pub fit: FitSettings,
    pub measure: MeasureSettings,
    pub species: String,
    pub overrides: Vec<Override>,
    /// The centreline fitted to the current landmarks, or why it cannot be.
    pub fitted: Result<Centreline, String>,
    pub outcome: Option<Outcome>,
    /// Landmarks or settings changed since the last measure.
    pub stale: bool,
    /// Unsaved changes.
    pub dirty: bool,
    pub range: (f32, f32),
    /// Display window: grey values mapped to black and white.
    pub window: [f32; 2],
    /// The voxel size was given by the user (kept in the project).
    pub user_voxel: bool,
    /// A block-averaged copy for zoomed-out views of large stacks (built in the background).
    pub overview: Option<Arc<Stack>>,
    /// Size and fingerprint of the stack on disk, taken once when it was loaded (for saves).
    pub fingerprint: Option<(u64, String)>,
    /// The folder unsaved work is kept in (the user's data folder; never beside the stack, which
    /// may be read-only or the bundled sample in the install).
    pub autosave_dir: PathBuf,
    /// Landmarks the last trace proposed, for review: drawn apart until accepted (see [`Doc::pending`]).
    pub proposals: Vec<ductline::trace::Proposed>,
    /// Counts refit requests: a background refit's answer is taken only if no later one was made.
    pub fit_gen: u64,
}

impl Doc {
    /// The proposals not settled yet, with their index: a proposal is settled while a placed
    /// landmark of its kind lies within one voxel of it (accepted, then maybe nudged; or placed
    /// there by hand; neighbouring proposals lie farther apart), so undoing an acceptance shows it
    /// again.
    pub fn pending(&self) -> Vec<(usize, ductline::trace::Proposed)> {
        let near = self.stack.voxel.as_ref().map_or(0.0, |v| v.max());
        self.proposals
            .iter()
            .copied()
            .enumerate()
            .filter(|(_, pr)| !self.lms.items.iter().any(|l| l.kind == pr.lm.kind && ductline::frame::v3::dist(l.p, pr.lm.p) <= near.max(1e-9)))
            .collect()
    }

    /// A document for a loaded stack; `range` and `window` come from [`looks`] (computed off the
    /// UI thread, since they read the whole stack).
    pub fn new(stack: Stack, stack_path: PathBuf, (range, window): ((f32, f32), [f32; 2])) -> Doc {
        let mut d = Doc {
            stack: Arc::new(stack),
            stack_path,
            project_path: None,
            lms: LandmarkSet::default(),
            fit: FitSettings::default(),
            measure: MeasureSettings::default(),
            species: "human".into(),
            overrides: vec![],
            fitted: Err(String::new()),
            outcome: None,
            stale: true,
            dirty: false,
            range,
            window,
            user_voxel: false,
            overview: None,
            autosave_dir: default_autosave_dir(),
            fingerprint: None,
            proposals: vec![],
            fit_gen: 0,
        };
        d.refit();
        d
    }

    /// Takes landmarks and settings from a project.
    pub fn with_project(mut self, p: Project, path: Option<PathBuf>) -> Doc {
        self.lms = LandmarkSet::new(p.landmarks);
        self.fit = p.fit;
        self.measure = p.measure;
        self.species = p.species;
        self.overrides = p.overrides;
        self.proposals = p.proposals;
        self.user_voxel = p.voxel_um.is_some();
        self.project_path = path;
        self.refit();
        self
    }

    pub fn to_project(&self, project_path: &Path) -> ductline::Result<Project> {
        let mut p = Project::unsaved(&self.stack_path);
        let (bytes, hash) = match &self.fingerprint {
            Some(f) => f.clone(),
            None => ductline::project::fingerprint(&self.stack_path)?,
        };
        p.stack = ductline::project::StackRef { path: ductline::project::relative(&self.stack_path, project_path), bytes, hash };
        p.voxel_um = if self.user_voxel { self.stack.voxel.as_ref().map(|v| v.mm.map(|x| x * 1000.0)) } else { None };
        p.species = self.species.clone();
        p.landmarks = self.lms.items.clone();
        p.fit = self.fit.clone();
        p.measure = self.measure.clone();
        p.overrides = self.overrides.clone();
        // proposals still awaiting review (accepted ones are landmarks now)
        p.proposals = self.pending().into_iter().map(|(_, pr)| pr).collect();
        Ok(p)
    }

    /// Refits the centreline now, on this thread (tens of milliseconds on a full specimen; after
    /// an edit in the app the refit runs in the background instead). A refit still running in
    /// the background for an earlier state is then dropped when it answers.
    pub fn refit(&mut self) {
        self.fit_gen += 1;
        self.fitted = pipeline::fit(&self.lms.items, &self.fit, self.voxel_mm()).map_err(|e| e.to_string());
        self.stale = true;
    }

    /// The largest voxel side (mm), 0 when unknown.
    pub fn voxel_mm(&self) -> f64 {
        self.stack.voxel.as_ref().map(|v| v.max()).unwrap_or(0.0)
    }

    pub fn set_voxel(&mut self, v: VoxelSize) {
        // a copy only when a background job still holds the stack (memory maps are shared)
        // the overview keeps its blocks; its voxels are b times larger
        if let Some(ov) = &mut self.overview {
            let b = (self.stack.dims[0] as f64 / ov.dims[0] as f64).round().max(1.0);
            Arc::make_mut(ov).voxel = Some(VoxelSize { mm: v.mm.map(|x| x * b), ..v.clone() });
        }
        Arc::make_mut(&mut self.stack).voxel = Some(v);
        self.user_voxel = true;
        self.dirty = true;
        self.outcome = None;
    }

    /// The overview's block size for a stack: none under 512 MB, else the smallest power of two that
    /// brings it (as f32) under 256 MB.
    pub fn overview_factor(stack: &Stack) -> Option<usize> {
        let bytes = stack.samples.len() as f64 * 4.0;
        if stack.bytes() < (512 << 20) {
            return None;
        }
        let mut b = 2;
        while bytes / (b * b * b) as f64 > (256 << 20) as f64 {
            b *= 2;
        }
        Some(b)
    }

    /// Where unsaved work is kept every 30 s (see [`autosave_path`]).
    pub fn autosave_path(&self) -> PathBuf {
        autosave_path(&self.autosave_dir, self.project_path.as_deref(), &self.stack_path)
    }
}

/// The per-user folder for autosaves: the platform's data folder (on Linux
/// `$XDG_DATA_HOME/ductline/autosave`, else `~/.local/share/ductline/autosave`), else the
/// temporary folder.
pub fn default_autosave_dir() -> PathBuf {
    directories::ProjectDirs::from("", "", "ductline").map(|d| d.data_dir().join("autosave")).unwrap_or_else(|| std::env::temp_dir().join("ductline-autosave"))
}

/// The autosave file of a project (or of a stack opened without one) in `dir`: its name and a
/// hash of its absolute path, so two specimens of the same name never share one.
pub fn autosave_path(dir: &Path, project: Option<&Path>, stack: &Path) -> PathBuf {
    let of = project.unwrap_or(stack);
    let abs = std::path::absolute(of).unwrap_or_else(|_| of.to_path_buf());
    // FNV-1a, 64 bits (a stable hash: the name must be the same in the next session)
    let h = abs.to_string_lossy().bytes().fold(0xcbf2_9ce4_8422_2325u64, |h, b| (h ^ b as u64).wrapping_mul(0x0100_0000_01b3));
    let stem = of.file_name().map(|s| s.to_string_lossy().replace(".ductline.json", "").replace(".json", "")).unwrap_or_else(|| "stack".into());
    dir.join(format!("{stem}-{h:016x}.autosave.json"))
}

/// Value range and automatic window of a stack (reads it all: call it off the UI thread).
pub fn looks(stack: &Stack) -> ((f32, f32), [f32; 2]) {
    (stack.value_range(), auto_window(stack))
}

/// Window from the 0.5 and 99.5 percentiles of a sample of the voxels.
pub fn auto_window(stack: &Stack) -> [f32; 2] {
    let n = stack.samples.len();
    let step = (n / 200_000).max(1);
    let mut v: Vec<f32> = (0..n).step_by(step).map(|i| stack.samples.get(i)).filter(|x| x.is_finite()).collect();
    if v.is_empty() {
        return [0.0, 1.0];
    }
    v.sort_by(f32::total_cmp);
    let lo = v[v.len() / 200];
    let hi = v[v.len() - 1 - v.len() / 200];
    if hi > lo { [lo, hi] } else { [lo, lo + 1.0] }
}

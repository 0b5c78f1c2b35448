//! The desktop app (egui/eframe): the only part of ductline that touches the GUI.
//!
//! Layout: a menu bar; the specimen panel on the left; the tracing view in the middle; the plan
//! map and the section inspector on the right; the duct profile along the bottom; a status bar.
//! Panels only emit [`Cmd`]s; [`DuctApp::apply`] is the one place that changes the document,
//! so undo/redo and "unsaved changes" work the same for every edit.

pub mod doc;
mod inspector;
mod jobs;
mod plan;
mod profile;
mod side;
#[cfg(test)]
mod tests;
pub mod tracing;

use doc::Doc;
use ductline::cochlea::Greenwood;
use ductline::landmarks::{Edit, Kind, Landmark};
use ductline::measure::Override;
use ductline::pipeline::Outcome;
use ductline::project::{self, Project};
use ductline::stack::{self, LoadOptions, Stack, VoxelSize};
use jobs::Job;
use std::path::{Path, PathBuf};
use std::sync::mpsc::Receiver;
use std::time::{Duration, Instant};

/// The status line's colour: errors red, warnings and stops amber, the rest plain.
pub fn status_colour(status: &str, plain: egui::Color32) -> egui::Color32 {
    let s = status.to_lowercase();
    if s.starts_with("error") || s.contains("failed") || s.contains("cannot") {
        palette::FLAG
    } else if s.starts_with("warning") || s.contains("stopped") || s.contains("below confidence") {
        palette::WARN
    } else {
        plain
    }
}

/// Colours of the app (its own palette).
pub mod palette {
    use ductline::landmarks::Kind;
    use egui::Color32;
    pub const VIEW_BG: Color32 = Color32::from_rgb(18, 22, 28);
    pub const PANEL_BG: Color32 = Color32::from_rgb(24, 29, 36);
    pub const LAMINA: Color32 = Color32::from_rgb(232, 163, 61);
    pub const LIGAMENT: Color32 = Color32::from_rgb(43, 179, 163);
    pub const AXIS: Color32 = Color32::from_rgb(156, 124, 240);
    pub const WINDOW: Color32 = Color32::from_rgb(242, 107, 91);
    pub const CENTRE: Color32 = Color32::from_rgb(215, 227, 107);
    pub const CUT: Color32 = Color32::from_rgb(120, 200, 255);
    pub const FLAG: Color32 = Color32::from_rgb(255, 70, 70);
    /// The ring round a landmark the fit leaves out (magenta: apart from the window mark's red).
    pub const OUTLIER: Color32 = Color32::from_rgb(235, 90, 235);
    pub const WARN: Color32 = Color32::from_rgb(240, 190, 80);
    pub const SERIES: [Color32; 5] = [
        Color32::from_rgb(110, 198, 255),
        Color32::from_rgb(255, 143, 179),
        Color32::from_rgb(150, 220, 120),
        Color32::from_rgb(214, 196, 160),
        Color32::from_rgb(190, 160, 255),
    ];
    pub fn kind(k: Kind) -> Color32 {
        match k {
            Kind::AxisBase | Kind::AxisApex => AXIS,
            Kind::Window => WINDOW,
            Kind::Lamina => LAMINA,
            Kind::Ligament => LIGAMENT,
        }
    }
}

/// Everything a panel can ask for.
#[derive(Clone, Debug)]
pub enum Cmd {
    Open(PathBuf),
    OpenDialog,
    /// Ask for a slice folder or DICOM series folder.
    OpenFolderDialog,
    /// Quit, asking first when there is unsaved work.
    Quit,
    /// Quit now: after a save (only if it left nothing unsaved), or dropping the unsaved work
    /// (`discard`: its autosave too).
    QuitNow {
        discard: bool,
    },
    /// Ask for a landmark CSV; `true`: its points are in the file's world frame.
    ImportLandmarksDialog(bool),
    /// Import a landmark CSV; `true`: its points are in the file's world frame.
    ImportLandmarks(PathBuf, bool),
    ExportLandmarksDialog,
    ExportLandmarks(PathBuf),
    Save,
    SaveAsDialog,
    SaveAs(PathBuf),
    ExportTableDialog,
    ExportTable(PathBuf),
    ExportStlDialog,
    ExportStl(PathBuf),
    SaveFigureDialog,
    /// Propose lamina and ligament landmarks along the spiral from those placed (seeds).
    Trace,
    /// Accept the pending proposals up to this angle (degrees; infinity: all), as one step.
    AcceptProposals(f64),
    /// Accept one pending proposal (its index in the proposals).
    AcceptProposal(usize),
    /// Drop the proposals not accepted.
    DiscardProposals,
    /// Place axis_base and axis_apex from the window and the lamina points (one step).
    ProposeAxis,
    /// The duct-profile figure, as .svg or .png by the name.
    SaveFigure(PathBuf),
    Edit(Edit),
    Undo,
    Redo,
    Refit,
    Measure,
    Cancel,
    GoToAngle(f64),
    SelectRow(Option<usize>),
    SetOverride(Override),
    ClearOverride(f64),
    SetVoxel(Vec<f64>),
    Status(String),
    Recover,
    DiscardRecovery,
}

/// A trace's proposed landmarks and its one-line summary.
/// A trace's proposals, its summary, and the angle (degrees) up to which the proposals already
/// held stay (a trace resumed beyond a moved point; None: all are replaced).
type Proposals = (Vec<ductline::trace::Proposed>, String, Option<f64>);

/// A stack (and maybe its project) read in the background.
pub struct Loaded {
    stack: Stack,
    stack_path: PathBuf,
    project: Option<(Project, PathBuf)>,
    looks: ((f32, f32), [f32; 2]),
    fingerprint: Option<(u64, String)>,
    /// Set when a project's stack changed since it was saved.
    changed: Option<String>,
}

#[derive(Clone, Copy, Debug)]
pub enum Pending {
    Open,
    OpenFolder,
    ImportLandmarks(bool),
    ExportLandmarks,
    SaveAs,
    ExportTable,
    ExportStl,
    SaveFigure,
}

pub struct DuctApp {
    pub doc: Option<Doc>,
    pub view: Option<tracing::View>,
    pub side: side::Side,
    profile: profile::ProfileState,
    inspector: inspector::Inspector,
    pub selected_row: Option<usize>,
    load: Option<Job<Result<Loaded, String>>>,
    run: Option<Job<Result<Outcome, String>>>,
    /// Proposed landmarks and the trace's summary, computed in the background.
    tracing: Option<Job<Result<Proposals, String>>>,
    overview: Option<Job<Stack>>,
    /// The centreline refitted after an edit, off the UI thread, with the document's fit
    /// generation it answers (an answer to an older request is dropped).
    refit: Option<(u64, Job<Result<ductline::centreline::Centreline, String>>)>,
    /// After an edit of a measured specimen, the profile follows in the background: first at a
    /// coarse step (a preview within tens of milliseconds), then at the document's step. The
    /// fit generation it answers for, the job, and whether it is the full one.
    live: Option<(u64, Job<MeasureAnswer>, bool)>,
    /// The system file dialog, running on its own thread, and when it was opened.
    dialog: Option<(Pending, Receiver<Option<PathBuf>>, Instant)>,
    /// ductline's own file dialog: used when the system one is unavailable or fails.
    pub in_app: Option<(Pending, egui_file::FileDialog)>,
    /// Try the system file dialog first (it needs a desktop portal on Linux).
    pub native_dialogs: bool,
    /// Asked to quit with unsaved work: the prompt is showing.
    pub confirm_quit: bool,
    /// Quitting: the window closes this frame.
    pub quit: bool,
    /// The window title last sent: "FILE — ductline", with * after FILE while unsaved.
    pub title: String,
    pub status: String,
    show_help: bool,
    show_about: bool,
    recovery: Option<PathBuf>,
    last_autosave: Instant,
    recent: Vec<PathBuf>,
    /// Where the recent-files list is kept (None: not kept, as in tests).
    recent_file: Option<PathBuf>,
    /// Where autosaves go (the user's data folder; tests give a temporary one).
    pub autosave_dir: PathBuf,
    /// Binning (1, 2 or 4) and crop box (`I0:I1,J0:J1,K0:K1`, empty = whole) for the next open.
    pub load_bin: usize,
    pub load_crop: String,
    show_load_opts: bool,
}

/// The bundled sample project (next to the sources, or below the working folder).
pub fn sample_path() -> PathBuf {
    let rel = Path::new("sample_stacks/cochlea_phantom/phantom.ductline.json");
    let built = Path::new(env!("CARGO_MANIFEST_DIR")).join(rel);
    if built.exists() { built } else { rel.to_path_buf() }
}

fn config_file() -> Option<PathBuf> {
    let base = std::env::var_os("XDG_CONFIG_HOME").map(PathBuf::from).or_else(|| std::env::var_os("HOME").map(|h| PathBuf::from(h).join(".config")))?;
    Some(base.join("ductline").join("recent.json"))
}

/// Opens the app window; `path` (stack, folder or project) or the bundled sample.
pub fn run(path: Option<PathBuf>) -> anyhow::Result<()> {
    if std::env::var_os("DISPLAY").is_none() && std::env::var_os("WAYLAND_DISPLAY").is_none() {
        anyhow::bail!(
            "no display (DISPLAY/WAYLAND_DISPLAY unset): the desktop app needs X11 or Wayland; the command line (inspect, phantom, measure) works without one"
        );
    }
    let path = path.unwrap_or_else(sample_path);
    let options = eframe::NativeOptions {
        viewport: egui::ViewportBuilder::default().with_inner_size([1480.0, 920.0]).with_min_inner_size([900.0, 600.0]).with_title("ductline"),
        ..Default::default()
    };
    eframe::run_native("ductline", options, Box::new(move |_cc| Ok(Box::new(DuctApp::new(Some(path), config_file())))))
        .map_err(|e| anyhow::anyhow!("cannot open the app window: {e}"))
}

impl DuctApp {
    pub fn new(open: Option<PathBuf>, recent_file: Option<PathBuf>) -> DuctApp {
        let recent = recent_file.as_ref().and_then(|f| std::fs::read_to_string(f).ok()).and_then(|t| serde_json::from_str(&t).ok()).unwrap_or_default();
        let mut app = DuctApp {
            doc: None,
            view: None,
            side: side::Side::default(),
            profile: profile::ProfileState::default(),
            inspector: inspector::Inspector::default(),
            selected_row: None,
            load: None,
            run: None,
            tracing: None,
            overview: None,
            refit: None,
            live: None,
            dialog: None,
            in_app: None,
            // the system dialog talks to the desktop portal over the session bus
            native_dialogs: cfg!(not(target_os = "linux")) || std::env::var_os("DBUS_SESSION_BUS_ADDRESS").is_some(),
            confirm_quit: false,
            quit: false,
            title: String::new(),
            status: "Ready. Open a stack, slice folder or project (ctrl+O, or drop it here).".into(),
            show_help: false,
            show_about: false,
            recovery: None,
            last_autosave: Instant::now(),
            recent,
            recent_file,
            autosave_dir: doc::default_autosave_dir(),
            load_bin: 1,
            load_crop: String::new(),
            show_load_opts: false,
        };
        if let Some(p) = open {
            app.apply(Cmd::Open(p));
        }
        app
    }

    /// True while loading or measuring.
    pub fn busy(&self) -> bool {
        self.load.is_some() || self.run.is_some() || self.tracing.is_some()
    }

    /// Whether a refit after an edit is still running.
    pub fn fitting(&self) -> bool {
        self.refit.is_some()
    }

    /// Refits the document's centreline off the UI thread (a drag's refit takes tens of
    /// milliseconds on a full specimen); until it answers the views keep the previous fit.
    fn request_refit(&mut self) {
        let Some(d) = &mut self.doc else { return };
        d.fit_gen += 1;
        d.stale = true;
        let (items, fit, voxel) = (d.lms.items.clone(), d.fit.clone(), d.voxel_mm());
        self.refit = Some((d.fit_gen, Job::spawn("fitting", move |_| ductline::pipeline::fit(&items, &fit, voxel).map_err(|e| e.to_string()))));
    }

    /// Re-measures the document in the background after an edit (`full`: at the document's
    /// step; else a preview at five times it, at least 0.5 mm), replacing any earlier one.
    fn live_measure(&mut self, full: bool) {
        let Some(doc) = &self.doc else { return };
        let Ok(gw) = Greenwood::preset(&doc.species) else { return };
        if let Some((_, j, _)) = &self.live {
            j.progress.cancel();
        }
        let Ok(cl) = doc.fitted.clone() else { return };
        let (st, mut ms, ov) = (doc.stack.clone(), doc.measure.clone(), doc.overrides.clone());
        if !full {
            ms.step_mm = (5.0 * ms.step_mm).max(0.5);
        }
        let label = if full { "measuring" } else { "previewing" };
        self.live =
            Some((doc.fit_gen, Job::spawn(label, move |p| ductline::pipeline::measure_fitted(&st, cl, &ms, &ov, &gw, p).map_err(|e| e.to_string())), full));
    }

    /// Finishes background work whose result has arrived.
    pub fn poll(&mut self) {
        if let Some((generation, res)) = self.refit.as_ref().and_then(|(g, j)| j.poll().map(|r| (*g, r))) {
            self.refit = None;
            if let Some(d) = self.doc.as_mut().filter(|d| d.fit_gen == generation) {
                let fitted = res.is_ok();
                d.fitted = res;
                d.stale = true;
                if fitted && d.outcome.is_some() && self.run.is_none() {
                    self.live_measure(false);
                }
            }
        }
        if let Some((generation, res, full)) = self.live.as_ref().and_then(|(g, j, f)| j.poll().map(|r| (*g, r, *f))) {
            self.live = None;
            if let (Some(d), Ok(out)) = (self.doc.as_mut().filter(|d| d.fit_gen == generation && self.run.is_none()), res) {
                let s_sel = self.selected_row.and_then(|i| d.outcome.as_ref()?.rows.get(i).map(|r| r.s_mm));
                self.selected_row = s_sel.map(|s| nearest_row(&out.rows, s));
                d.outcome = Some(out);
                if full {
                    d.stale = false;
                    self.status = d.outcome.as_ref().map(|o| o.summary()).unwrap_or_default();
                } else {
                    self.status = "profile previewed at a coarse step; measuring every section…".into();
                    self.live_measure(true);
                }
            }
        }
        if let Some(res) = self.load.as_ref().and_then(|j| j.poll()) {
            self.load = None;
            match res {
                Ok(l) => self.loaded(l),
                Err(e) => {
                    // too large to hold: offer binning and cropping
                    if e.contains("may be used") {
                        self.show_load_opts = true;
                    }
                    self.status = format!("error: {e}");
                }
            }
        }
        if let Some(res) = self.run.as_ref().and_then(|j| j.poll()) {
            self.run = None;
            match (res, &mut self.doc) {
                (Ok(out), Some(doc)) => {
                    self.status = out.summary();
                    doc.outcome = Some(out);
                    doc.stale = false;
                    self.selected_row = self.selected_row.or(Some(0));
                }
                (Err(e), _) => self.status = format!("measure stopped: {e}"),
                _ => {}
            }
        }
        if let Some(res) = self.tracing.as_ref().and_then(|j| j.poll()) {
            self.tracing = None;
            match (res, &mut self.doc) {
                (Ok((proposed, summary, keep)), Some(doc)) => {
                    // held apart for review: nothing counts until accepted (kept in the project)
                    match keep {
                        Some(at) => doc.proposals.retain(|p| p.angle_deg <= at),
                        None => doc.proposals.clear(),
                    }
                    doc.proposals.extend(proposed);
                    doc.dirty = true;
                    self.status = summary;
                }
                (Err(e), _) => self.status = format!("error: {e}"),
                _ => {}
            }
        }
        if let Some(ov) = self.overview.as_ref().and_then(|j| j.poll()) {
            self.overview = None;
            if let Some(doc) = &mut self.doc
                && doc.stack.dims.iter().zip(ov.dims).all(|(a, b)| b <= *a)
            {
                doc.overview = Some(std::sync::Arc::new(ov));
            }
        }
        if let Some((what, rx, opened)) = &self.dialog
            && let Ok(res) = rx.try_recv()
        {
            let (what, quick) = (*what, opened.elapsed() < Duration::from_millis(400));
            self.dialog = None;
            match res {
                Some(p) => self.apply(chosen(what, p)),
                // back at once with nothing: no dialog service answered (a person takes longer
                // to cancel); ductline's own dialog from now on
                None if quick => {
                    self.native_dialogs = false;
                    self.status = "The system file dialog is not available here (no desktop portal): using ductline's own.".into();
                    self.ask(what);
                }
                None => {}
            }
        }
    }

    fn loaded(&mut self, l: Loaded) {
        // background answers for the document being replaced are dropped with it
        if let Some((_, j, _)) = self.live.take() {
            j.progress.cancel();
        }
        self.refit = None;
        let mut doc = Doc::new(l.stack, l.stack_path.clone(), l.looks);
        doc.fingerprint = l.fingerprint;
        doc.autosave_dir = self.autosave_dir.clone();
        let mut msg = format!("opened {}", l.stack_path.display());
        if let Some(w) = l.changed {
            msg = format!("warning: {w}");
        }
        if let Some((p, path)) = l.project {
            doc = doc.with_project(p, Some(path));
        }
        for w in &doc.stack.warnings {
            msg = format!("warning: {w}");
        }
        if doc.stack.voxel.is_none() {
            msg = "The file gives no voxel size: enter it in the specimen panel.".into();
        }
        let auto = doc.autosave_path();
        let newer = |a: &Path, b: &Path| match (std::fs::metadata(a).and_then(|m| m.modified()), std::fs::metadata(b).and_then(|m| m.modified())) {
            (Ok(x), Ok(y)) => x > y,
            (Ok(_), Err(_)) => true,
            _ => false,
        };
        if auto.exists() && doc.project_path.as_deref().is_none_or(|p| newer(&auto, p)) {
            self.recovery = Some(auto);
        }
        self.view = Some(tracing::View::new(&doc.stack));
        if let Some(b) = Doc::overview_factor(&doc.stack) {
            let st = doc.stack.clone();
            self.overview = Some(Job::spawn("overview", move |_| ductline::display::overview(&st, b)));
        }
        self.doc = Some(doc);
        self.selected_row = None;
        self.status = msg;
    }

    fn remember(&mut self, p: &Path) {
        let p = std::path::absolute(p).unwrap_or_else(|_| p.to_path_buf());
        self.recent.retain(|x| x != &p);
        self.recent.insert(0, p);
        self.recent.truncate(10);
        if let Some(f) = &self.recent_file {
            if let Some(d) = f.parent() {
                let _ = std::fs::create_dir_all(d);
            }
            let _ = project::write_atomic(f, serde_json::to_string_pretty(&self.recent).unwrap_or_default().as_bytes());
        }
    }

    fn ask(&mut self, what: Pending) {
        if self.dialog.is_some() || self.in_app.is_some() {
            return;
        }
        let start = self.doc.as_ref().and_then(|d| d.project_path.clone().or(Some(d.stack_path.clone()))).and_then(|p| p.parent().map(Path::to_path_buf));
        let name = match what {
            Pending::ExportLandmarks => "landmarks.csv",
            Pending::SaveAs => "specimen.ductline.json",
            Pending::ExportTable => "geometry.csv",
            Pending::SaveFigure => "duct-profile.svg",
            _ => "",
        };
        if !self.native_dialogs {
            use egui_file::FileDialog as F;
            let mut d = match what {
                Pending::Open | Pending::ImportLandmarks(_) => F::open_file(),
                Pending::OpenFolder | Pending::ExportStl => F::select_folder(),
                Pending::ExportLandmarks | Pending::SaveAs | Pending::ExportTable | Pending::SaveFigure => F::save_file().default_filename(name),
            };
            if let Some(s) = start {
                d = d.initial_path(s);
            }
            let title = match what {
                Pending::Open => "Open a stack, volume or project",
                Pending::OpenFolder => "Open a slice folder or DICOM series",
                Pending::ImportLandmarks(_) => "Import landmarks (CSV)",
                Pending::ExportLandmarks => "Export landmarks (CSV)",
                Pending::SaveAs => "Save the project as",
                Pending::ExportTable => "Export the geometry table (.csv or .json)",
                Pending::ExportStl => "Folder for the lumen surfaces (STL)",
                Pending::SaveFigure => "Save the duct-profile figure (.svg or .png)",
            };
            let mut d = d.title(title).id(egui::Id::unique("in-app-file-dialog"));
            d.open();
            self.in_app = Some((what, d));
            return;
        }
        let rx = jobs::dialog(move || {
            let mut d = rfd::FileDialog::new();
            if let Some(s) = start {
                d = d.set_directory(s);
            }
            match what {
                Pending::Open => {
                    d.add_filter("stack or project", &["tif", "tiff", "nii", "gz", "nrrd", "nhdr", "mha", "mhd", "dcm", "json", "png"]).pick_file()
                }
                Pending::OpenFolder | Pending::ExportStl => d.pick_folder(),
                Pending::ImportLandmarks(_) => d.add_filter("landmarks", &["csv"]).pick_file(),
                Pending::ExportLandmarks | Pending::SaveAs => d.set_file_name(name).save_file(),
                Pending::ExportTable => d.set_file_name(name).add_filter("CSV or JSON table", &["csv", "json"]).save_file(),
                Pending::SaveFigure => d.set_file_name(name).add_filter("SVG or PNG figure", &["svg", "png"]).save_file(),
            }
        });
        self.dialog = Some((what, rx, Instant::now()));
    }

    /// ductline's own file dialog, while one is open: what it gives becomes a command.
    fn in_app_dialog_ui(&mut self, ctx: &egui::Context) -> Option<Cmd> {
        let (what, d) = self.in_app.as_mut()?;
        d.show(ctx);
        let what = *what;
        if d.selected() {
            let p = d.path().map(Path::to_path_buf);
            self.in_app = None;
            return p.map(|p| chosen(what, p));
        }
        if matches!(d.state(), egui_file::State::Cancelled | egui_file::State::Closed) {
            self.in_app = None;
        }
        None
    }

    /// The one place that changes the document.
    pub fn apply(&mut self, cmd: Cmd) {
        match cmd {
            Cmd::Open(p) => {
                if self.busy() {
                    self.status = "busy: wait for the running work or cancel it".into();
                    return;
                }
                self.remember(&p);
                self.status = format!("loading {}", p.display());
                let crop = match crate::cli::crop_arg(&Some(self.load_crop.clone()).filter(|c| !c.trim().is_empty())) {
                    Ok(c) => c,
                    Err(e) => {
                        self.status = format!("error: {e}");
                        return;
                    }
                };
                let opts = LoadOptions { bin: self.load_bin, crop, ..Default::default() };
                self.load = Some(Job::spawn("loading", move |prog| load(&p, opts, prog)));
            }
            Cmd::OpenDialog => self.ask(Pending::Open),
            Cmd::OpenFolderDialog => self.ask(Pending::OpenFolder),
            Cmd::Quit => {
                if self.doc.as_ref().is_some_and(|d| d.dirty) {
                    self.confirm_quit = true;
                } else {
                    self.quit = true;
                }
            }
            Cmd::QuitNow { discard } => {
                self.confirm_quit = false;
                match &self.doc {
                    Some(d) if d.dirty && !discard => {} // the save failed: its error is in the status bar
                    Some(d) => {
                        if discard {
                            let _ = std::fs::remove_file(d.autosave_path());
                            if let Some(d) = self.doc.as_mut() {
                                d.dirty = false;
                            }
                        }
                        self.quit = true;
                    }
                    None => self.quit = true,
                }
            }
            Cmd::ImportLandmarksDialog(world) => self.ask(Pending::ImportLandmarks(world)),
            Cmd::ExportLandmarksDialog => self.ask(Pending::ExportLandmarks),
            Cmd::SaveAsDialog => self.ask(Pending::SaveAs),
            Cmd::ExportTableDialog => self.ask(Pending::ExportTable),
            Cmd::ExportStlDialog => self.ask(Pending::ExportStl),
            Cmd::SaveFigureDialog => self.ask(Pending::SaveFigure),
            Cmd::Status(s) => self.status = s,
            Cmd::GoToAngle(a) => {
                if let Some(v) = &mut self.view {
                    v.plane = tracing::Plane::Radial;
                    v.angle_deg = a;
                }
            }
            Cmd::Cancel => {
                for p in [self.load.as_ref().map(|j| &j.progress), self.run.as_ref().map(|j| &j.progress)].into_iter().flatten() {
                    p.cancel();
                }
            }
            Cmd::Recover => {
                if let (Some(path), Some(doc)) = (self.recovery.take(), self.doc.take()) {
                    match Project::load(&path) {
                        Ok(p) => {
                            let keep = doc.project_path.clone();
                            let mut d = doc.with_project(p, keep);
                            d.dirty = true;
                            self.doc = Some(d);
                            self.status = format!("recovered unsaved work from {}", path.display());
                        }
                        Err(e) => {
                            self.doc = Some(doc);
                            self.status = format!("error: {e}");
                        }
                    }
                }
            }
            Cmd::DiscardRecovery => {
                if let Some(p) = self.recovery.take() {
                    let _ = std::fs::remove_file(p);
                }
            }
            Cmd::Edit(Edit::Move { index, to }) => {
                self.apply_doc(Cmd::Edit(Edit::Move { index, to }));
                // a point moved among the proposals: the trace runs again beyond it (on the
                // fit with the point moved; without proposals the frame refits as after any edit)
                if let Some(d) = self.doc.as_mut().filter(|d| !d.pending().is_empty()) {
                    d.refit();
                    self.retrace_beyond(index);
                }
            }
            other => self.apply_doc(other),
        }
    }

    /// After landmark `i` (a lamina or ligament point) was moved where proposals still wait
    /// beyond it, the trace runs again from the landmarks up to it (the axis and window with
    /// them) and its proposals replace those beyond.
    fn retrace_beyond(&mut self, i: usize) {
        let Some(doc) = &self.doc else { return };
        let (Some(lm), Ok(cl)) = (doc.lms.items.get(i).copied(), &doc.fitted) else { return };
        if !matches!(lm.kind, Kind::Lamina | Kind::Ligament) || self.tracing.is_some() {
            return;
        }
        let angle = |p: [f64; 3]| {
            let [r, a, h] = cl.frame.to_cochlear(p);
            cl.unwrap_deg(r, a, h)
        };
        let at = angle(lm.p);
        if !doc.pending().iter().any(|(_, p)| p.angle_deg > at) {
            return;
        }
        let seeds: Vec<Landmark> =
            doc.lms.items.iter().filter(|l| !matches!(l.kind, Kind::Lamina | Kind::Ligament) || angle(l.p) <= at + 1e-6).copied().collect();
        self.tracing = Some(trace_job(doc, seeds, Some(at)));
        self.status = format!("a point moved at {at:.0}°: tracing again beyond it…");
    }

    fn apply_doc(&mut self, cmd: Cmd) {
        let Some(doc) = self.doc.as_mut() else {
            self.status = "open a stack first".into();
            return;
        };
        let result: Result<String, String> = match cmd {
            Cmd::Edit(e) => doc.lms.apply(e).map(|_| String::new()).map_err(|e| e.to_string()),
            Cmd::AcceptProposals(up_to) => {
                let lms: Vec<Landmark> = doc.pending().into_iter().filter(|(_, p)| p.angle_deg <= up_to).map(|(_, p)| p.lm).collect();
                let n = lms.len();
                if n == 0 {
                    self.status = "no proposal up to that angle".into();
                    return;
                }
                // one step: a single undo takes them back (and shows them as proposals again)
                doc.lms.append(lms).map(|_| format!("accepted {n} proposed landmarks")).map_err(|e| e.to_string())
            }
            Cmd::AcceptProposal(k) => match doc.proposals.get(k) {
                Some(p) => {
                    let lm = p.lm;
                    doc.lms.append(vec![lm]).map(|_| format!("accepted a proposed {} point", lm.kind.as_str())).map_err(|e| e.to_string())
                }
                None => Err("no such proposal".into()),
            },
            Cmd::ProposeAxis => {
                let items = doc.lms.items.clone();
                let window = items.iter().find(|l| l.kind == Kind::Window).map(|l| l.p);
                // the lamina points as placed (base toward apex), the first dozen: the basal turn
                let lamina: Vec<[f64; 3]> = items.iter().filter(|l| l.kind == Kind::Lamina).take(12).map(|l| l.p).collect();
                match window {
                    None => Err("place the window first, then three or more lamina points along the basal turn".into()),
                    Some(w) => ductline::trace::propose_axis(w, &lamina).map_err(|e| e.to_string()).and_then(|(b, a)| {
                        let mut at = items.len();
                        let mut group = vec![];
                        for (kind, p) in [(Kind::AxisBase, b), (Kind::AxisApex, a)] {
                            group.push(match items.iter().position(|l| l.kind == kind) {
                                Some(index) => Edit::Move { index, to: p },
                                None => {
                                    at += 1;
                                    Edit::Insert { index: at - 1, lm: Landmark { kind, p } }
                                }
                            });
                        }
                        doc.lms.apply(Edit::Group(group)).map_err(|e| e.to_string())?;
                        Ok(format!(
                            "proposed the modiolar axis from the window and {} lamina points: check which end is the apex and move them if needed",
                            lamina.len()
                        ))
                    }),
                }
            }
            Cmd::DiscardProposals => {
                let n = doc.pending().len();
                doc.proposals.clear();
                doc.dirty = true;
                Ok(format!("discarded {n} proposed landmarks"))
            }
            Cmd::Undo => Ok(if doc.lms.undo() { "undone".into() } else { "nothing to undo".into() }),
            Cmd::Redo => Ok(if doc.lms.redo() { "redone".into() } else { "nothing to redo".into() }),
            Cmd::Refit => Ok(String::new()),
            Cmd::ImportLandmarks(p, world) => {
                // world-frame points are checked against the stack once mapped into its frame
                let read = if world {
                    ductline::landmarks::read_csv(&p, None).and_then(|items| ductline::landmarks::from_world(&items, &doc.stack, &p))
                } else {
                    ductline::landmarks::read_csv(&p, Some(&doc.stack))
                };
                read.map_err(|e| e.to_string()).and_then(|items| {
                    let n = items.len();
                    // one step: a single undo takes the whole import back
                    doc.lms.append(items).map_err(|e| e.to_string())?;
                    let frame = if world { doc.stack.world.as_ref().map(|w| format!(" (world frame {})", w.frame)).unwrap_or_default() } else { String::new() };
                    Ok(format!("imported {n} landmarks from {}{frame}", p.display()))
                })
            }
            Cmd::ExportLandmarks(p) => ductline::landmarks::write_csv(&p, &doc.lms.items).map(|_| format!("wrote {}", p.display())).map_err(|e| e.to_string()),
            Cmd::Save => match doc.project_path.clone() {
                Some(p) => save(doc, &p),
                None => {
                    self.ask(Pending::SaveAs);
                    return;
                }
            },
            Cmd::SaveAs(p) => {
                let old = doc.autosave_path();
                doc.project_path = Some(p.clone());
                let r = save(doc, &p);
                if r.is_ok() {
                    let _ = std::fs::remove_file(old);
                }
                r
            }
            Cmd::ExportTable(p) => export_table(doc, &p),
            Cmd::Trace => {
                let seeds = doc.lms.items.clone();
                self.tracing = Some(trace_job(doc, seeds, None));
                Ok("tracing…".into())
            }
            Cmd::SaveFigure(p) => match &doc.outcome {
                Some(out) => {
                    let name = doc.project_path.as_ref().unwrap_or(&doc.stack_path).file_name().map(|n| n.to_string_lossy().to_string()).unwrap_or_default();
                    ductline::figure::write(&out.rows, self.profile.x, &format!("{name} — duct profile"), &p)
                        .map(|_| format!("wrote {}", p.display()))
                        .map_err(|e| e.to_string())
                }
                None => Err("measure first".into()),
            },
            Cmd::ExportStl(dir) => match &doc.outcome {
                Some(out) => {
                    ductline::export::write_stl(out, &dir).map(|w| format!("wrote {} surfaces into {}", w.len(), dir.display())).map_err(|e| e.to_string())
                }
                None => Err("measure first".into()),
            },
            Cmd::Measure => {
                if let Some((_, j, _)) = self.live.take() {
                    j.progress.cancel();
                }
                let gw = Greenwood::preset(&doc.species).map_err(|e| e.to_string());
                match gw {
                    Ok(gw) => {
                        let (st, items, fit, ms, ov) = (doc.stack.clone(), doc.lms.items.clone(), doc.fit.clone(), doc.measure.clone(), doc.overrides.clone());
                        self.run =
                            Some(Job::spawn("measuring", move |p| ductline::pipeline::run(&st, &items, &fit, &ms, &ov, &gw, p).map_err(|e| e.to_string())));
                        Ok("measuring…".into())
                    }
                    Err(e) => Err(e),
                }
            }
            Cmd::SelectRow(i) => {
                self.selected_row = i;
                // the tracing view follows: the radial cut at the section's angle
                if let (Some(row), Some(v)) = (i.and_then(|i| doc.outcome.as_ref().and_then(|o| o.rows.get(i))), &mut self.view) {
                    v.plane = tracing::Plane::Radial;
                    v.angle_deg = row.angle_deg;
                }
                Ok(String::new())
            }
            Cmd::SetOverride(o) if doc.overrides.contains(&o) => Ok(String::new()),
            Cmd::SetOverride(o) => {
                doc.overrides.retain(|x| (x.s_mm - o.s_mm).abs() > 1e-9);
                doc.overrides.push(o);
                doc.stale = true;
                doc.dirty = true;
                Ok("section override set: measure again to apply it".into())
            }
            Cmd::ClearOverride(s) => {
                doc.overrides.retain(|x| (x.s_mm - s).abs() > 1e-9);
                doc.stale = true;
                doc.dirty = true;
                Ok("section override cleared".into())
            }
            Cmd::SetVoxel(v) => VoxelSize::from_user_um(&v)
                .map(|v| {
                    let d = v.describe();
                    doc.set_voxel(v);
                    if let Some(view) = &mut self.view {
                        *view = tracing::View::new(&doc.stack);
                    }
                    format!("voxel size set to {d}")
                })
                .map_err(|e| e.to_string()),
            _ => Ok(String::new()),
        };
        match result {
            Ok(s) => {
                if !s.is_empty() {
                    self.status = s;
                }
            }
            Err(e) => self.status = format!("error: {e}"),
        }
    }

    /// Shortcuts and dropped files.
    fn input(&mut self, ctx: &egui::Context) -> Vec<Cmd> {
        use egui::{Key, Modifiers};
        let mut cmds = vec![];
        let dropped: Vec<PathBuf> = ctx.input(|i| i.raw.dropped_files.iter().map(|f| f.path().to_path_buf()).filter(|p| !p.as_os_str().is_empty()).collect());
        if let Some(p) = dropped.into_iter().next() {
            cmds.push(Cmd::Open(p));
        }
        if ctx.egui_wants_keyboard_input() {
            return cmds;
        }
        ctx.input_mut(|i| {
            if i.consume_key(Modifiers::COMMAND | Modifiers::SHIFT, Key::Z) || i.consume_key(Modifiers::COMMAND, Key::Y) {
                cmds.push(Cmd::Redo);
            }
            if i.consume_key(Modifiers::COMMAND, Key::Z) {
                cmds.push(Cmd::Undo);
            }
            if i.consume_key(Modifiers::COMMAND, Key::S) {
                cmds.push(Cmd::Save);
            }
            if i.consume_key(Modifiers::COMMAND, Key::O) {
                cmds.push(Cmd::OpenDialog);
            }
            if i.consume_key(Modifiers::COMMAND, Key::Q) {
                cmds.push(Cmd::Quit);
            }
            if i.consume_key(Modifiers::NONE, Key::F1) {
                self.show_help = !self.show_help;
            }
            // coarse steps: 10° on the radial cut, 10 slices on a stack plane
            for (k, dir) in [(Key::PageUp, 1), (Key::PageDown, -1)] {
                if i.consume_key(Modifiers::NONE, k)
                    && let (Some(v), Some(d)) = (&mut self.view, &self.doc)
                {
                    for _ in 0..5 {
                        v.step(dir, d);
                    }
                }
            }
            for (k, kind) in [Key::Num1, Key::Num2, Key::Num3, Key::Num4, Key::Num5].into_iter().zip(Kind::ALL) {
                if i.consume_key(Modifiers::NONE, k)
                    && let Some(v) = &mut self.view
                {
                    v.active = kind;
                }
            }
            if (i.consume_key(Modifiers::NONE, Key::Delete) || i.consume_key(Modifiers::NONE, Key::Backspace))
                && let Some(v) = &mut self.view
                && let Some(idx) = v.selected.take()
            {
                cmds.push(Cmd::Edit(Edit::Delete { index: idx }));
            }
        });
        cmds
    }

    fn autosave(&mut self, force: bool) {
        let Some(doc) = &mut self.doc else { return };
        if !doc.dirty || (!force && self.last_autosave.elapsed() < Duration::from_secs(30)) {
            return;
        }
        self.last_autosave = Instant::now();
        let path = doc.autosave_path();
        let _ = std::fs::create_dir_all(&doc.autosave_dir);
        match doc.to_project(&path).and_then(|p| p.save(&path)) {
            Ok(()) => {}
            Err(e) => self.status = format!("autosave failed: {e}"),
        }
    }

    fn menu_ui(&mut self, ui: &mut egui::Ui) -> Vec<Cmd> {
        let mut cmds = vec![];
        egui::MenuBar::new().ui(ui, |ui| {
            ui.menu_button("Specimen", |ui| {
                if ui.button("Open stack or project…  (ctrl+O)").clicked() {
                    cmds.push(Cmd::OpenDialog);
                }
                if ui.button("Open slice folder or DICOM series…").clicked() {
                    cmds.push(Cmd::OpenFolderDialog);
                }
                ui.menu_button("Recent", |ui| {
                    for p in self.recent.clone() {
                        if ui.button(p.display().to_string()).clicked() {
                            cmds.push(Cmd::Open(p));
                        }
                    }
                });
                if ui.button("Open the bundled sample").clicked() {
                    cmds.push(Cmd::Open(sample_path()));
                }
                if ui.button("Load options (binning, crop)…").clicked() {
                    self.show_load_opts = true;
                }
                ui.separator();
                let open = self.doc.is_some();
                let measured = self.doc.as_ref().is_some_and(|d| d.outcome.is_some());
                if ui.add_enabled(open, egui::Button::new("Save project  (ctrl+S)")).clicked() {
                    cmds.push(Cmd::Save);
                }
                if ui.add_enabled(open, egui::Button::new("Save project as…")).clicked() {
                    cmds.push(Cmd::SaveAsDialog);
                }
                ui.separator();
                if ui.add_enabled(open, egui::Button::new("Import landmarks (CSV)…")).clicked() {
                    cmds.push(Cmd::ImportLandmarksDialog(false));
                }
                // only a volume file with an index-to-world transform has a world frame
                let world = self.doc.as_ref().and_then(|d| d.stack.world.as_ref()).map(|w| w.frame);
                let label = format!("Import landmarks in the file's world frame{} (CSV)…", world.map(|f| format!(", {f}")).unwrap_or_default());
                if ui
                    .add_enabled(world.is_some(), egui::Button::new(label))
                    .on_disabled_hover_text("this stack's file has no index-to-world transform")
                    .clicked()
                {
                    cmds.push(Cmd::ImportLandmarksDialog(true));
                }
                if ui.add_enabled(open, egui::Button::new("Export landmarks (CSV)…")).clicked() {
                    cmds.push(Cmd::ExportLandmarksDialog);
                }
                let not_yet = "measure first (Fit & measure)";
                if ui.add_enabled(measured, egui::Button::new("Export geometry table (CSV/JSON)…")).on_disabled_hover_text(not_yet).clicked() {
                    cmds.push(Cmd::ExportTableDialog);
                }
                if ui.add_enabled(measured, egui::Button::new("Export lumen surfaces (STL)…")).on_disabled_hover_text(not_yet).clicked() {
                    cmds.push(Cmd::ExportStlDialog);
                }
                if ui
                    .add_enabled(measured, egui::Button::new("Save duct-profile figure (SVG/PNG)…"))
                    .on_disabled_hover_text(not_yet)
                    .on_hover_text("The profile with axis titles and units, against the x axis chosen in the profile panel")
                    .clicked()
                {
                    cmds.push(Cmd::SaveFigureDialog);
                }
                ui.separator();
                if ui.button("Quit  (ctrl+Q)").clicked() {
                    cmds.push(Cmd::Quit);
                }
            });
            ui.menu_button("Edit", |ui| {
                let (u, r) = self.doc.as_ref().map(|d| (d.lms.can_undo(), d.lms.can_redo())).unwrap_or((false, false));
                if ui.add_enabled(u, egui::Button::new("Undo  (ctrl+Z)")).clicked() {
                    cmds.push(Cmd::Undo);
                }
                if ui.add_enabled(r, egui::Button::new("Redo  (ctrl+shift+Z)")).clicked() {
                    cmds.push(Cmd::Redo);
                }
                ui.separator();
                if ui
                    .add_enabled(self.doc.is_some() && self.tracing.is_none(), egui::Button::new("Propose landmarks along the spiral"))
                    .on_hover_text("From the axis, the window and at least two lamina and two ligament points near the base: lamina and ligament points every 10° up the spiral, held apart for review (accept them from the side panel or by clicking one)")
                    .clicked()
                {
                    cmds.push(Cmd::Trace);
                }
                if ui
                    .add_enabled(self.doc.is_some(), egui::Button::new("Propose the modiolar axis"))
                    .on_hover_text("From the window and three or more lamina points placed along the basal turn (five or more: better): axis_base and axis_apex placed, as one step, for you to check and move")
                    .clicked()
                {
                    cmds.push(Cmd::ProposeAxis);
                }
            });
            ui.menu_button("Help", |ui| {
                if ui.button("Shortcuts  (F1)").clicked() {
                    self.show_help = true;
                }
                if ui.button("About ductline").clicked() {
                    self.show_about = true;
                }
            });
        });
        cmds
    }

    fn status_ui(&self, ui: &mut egui::Ui) {
        ui.horizontal(|ui| {
            if let Some(h) = self.view.as_ref().and_then(|v| v.hover.as_ref()) {
                ui.monospace(format!("x {:.3}  y {:.3}  z {:.3} mm", h.p[0], h.p[1], h.p[2]));
                if let Some(c) = h.cochlear {
                    ui.monospace(format!("│ r {:.3} mm  θ {:.1}°  h {:.3} mm", c[0], c[1], c[2]))
                        .on_hover_text("θ from the round window along the spiral, as in the landmark list and the table (0–900° and beyond)");
                }
                ui.monospace(format!("│ value {}", if h.value.is_nan() { "—".to_string() } else { format!("{:.1}", h.value) }));
                ui.separator();
            }
            // one line, cut at the window's edge with an ellipsis; the whole message on hover
            ui.add(egui::Label::new(egui::RichText::new(&self.status).color(status_colour(&self.status, ui.visuals().text_color()))).truncate())
                .on_hover_text(&self.status);
        });
    }

    fn windows_ui(&mut self, ctx: &egui::Context) -> Vec<Cmd> {
        let mut cmds = vec![];
        egui::Window::new("Shortcuts").open(&mut self.show_help).collapsible(false).show(ctx, |ui| {
            egui::Grid::new("keys").num_columns(2).striped(true).show(ui, |ui| {
                for (k, what) in [
                    ("click", "place a landmark of the active kind"),
                    ("click a small dot", "place it where the fit predicts it (dots: the fitted curves in this plane)"),
                    ("click an open ring", "accept that proposed landmark"),
                    ("drag a mark", "move it"),
                    ("right-click a mark", "delete it"),
                    ("Delete", "delete the selected landmark"),
                    ("1 … 5", "active kind: axis_base, axis_apex, window, lamina, ligament"),
                    ("wheel", "next slice, or 2° on the radial cut (one notch, one step)"),
                    ("PgUp / PgDn", "10 slices, or 10° on the radial cut"),
                    ("ctrl+wheel", "zoom"),
                    ("drag", "pan"),
                    ("ctrl+Z / ctrl+shift+Z", "undo / redo"),
                    ("ctrl+S", "save the project"),
                    ("ctrl+O", "open a stack, slice folder or project"),
                    ("ctrl+Q", "quit (asks first when work is unsaved)"),
                    ("F1", "this list"),
                ] {
                    ui.monospace(k);
                    ui.label(what);
                    ui.end_row();
                }
            });
        });
        egui::Window::new("About ductline").open(&mut self.show_about).collapsible(false).show(ctx, |ui| {
            ui.heading(format!("ductline {}", ductline::VERSION));
            ui.label("Cochlear duct geometry from micro-CT stacks: trace the partition, measure every cross-section, export solver tables and lumen surfaces.");
            ui.separator();
            ui.colored_label(palette::WARN, ductline::CAUTION);
        });
        let reopen = self.doc.as_ref().map(|d| d.project_path.clone().unwrap_or_else(|| d.stack_path.clone()));
        let (mut bin, mut crop) = (self.load_bin, self.load_crop.clone());
        egui::Window::new("Load options").open(&mut self.show_load_opts).collapsible(false).show(ctx, |ui| {
            ui.label("For stacks larger than memory, or to work on a part. Coordinates stay those of the whole stack, so landmarks and projects stay valid.");
            ui.horizontal(|ui| {
                ui.label("binning");
                for b in [1usize, 2, 4] {
                    ui.radio_value(&mut bin, b, if b == 1 { "none".to_string() } else { format!("{b}×{b}×{b}") })
                        .on_hover_text("Average blocks of voxels while loading");
                }
            });
            ui.horizontal(|ui| {
                let l = ui.label("crop");
                ui.add(egui::TextEdit::singleline(&mut crop).hint_text("I0:I1,J0:J1,K0:K1 (empty = whole)").desired_width(220.0))
                    .labelled_by(l.id)
                    .on_hover_text("Voxel index ranges of the whole stack, end excluded");
            });
            if let Some(p) = &reopen
                && ui.button("Open again with these").on_hover_text("Reload the current stack or project with these options").clicked()
            {
                cmds.push(Cmd::Open(p.clone()));
            }
            ui.small("They apply to every open until changed.");
        });
        (self.load_bin, self.load_crop) = (bin, crop);
        if self.confirm_quit {
            let named = self.doc.as_ref().map(|d| (d.project_path.is_some(), d.project_path.clone().unwrap_or_else(|| d.stack_path.clone())));
            egui::Modal::new(egui::Id::unique("confirm-quit")).show(ctx, |ui| {
                let (has_project, path) = named.clone().unwrap_or((false, PathBuf::new()));
                ui.label(format!("{} has unsaved changes.", path.file_name().map(|n| n.to_string_lossy().to_string()).unwrap_or_default()));
                ui.horizontal(|ui| {
                    if has_project && ui.button("Save and quit").clicked() {
                        cmds.push(Cmd::Save);
                        cmds.push(Cmd::QuitNow { discard: false });
                    }
                    if !has_project && ui.button("Save as…").clicked() {
                        self.confirm_quit = false;
                        cmds.push(Cmd::SaveAsDialog);
                    }
                    if ui.button("Quit without saving").clicked() {
                        cmds.push(Cmd::QuitNow { discard: true });
                    }
                    if ui.button("Cancel").clicked() {
                        self.confirm_quit = false;
                    }
                });
            });
        }
        if let Some(p) = &self.recovery {
            let text = format!("Unsaved work from an earlier session was kept in\n{}\nRecover it?", p.display());
            egui::Modal::new(egui::Id::unique("recover")).show(ctx, |ui| {
                ui.label(text);
                ui.horizontal(|ui| {
                    if ui.button("Recover").clicked() {
                        cmds.push(Cmd::Recover);
                    }
                    if ui.button("Discard").clicked() {
                        cmds.push(Cmd::DiscardRecovery);
                    }
                });
            });
        }
        cmds
    }

    /// One frame of the whole app.
    pub fn frame_ui(&mut self, ui: &mut egui::Ui) {
        self.poll();
        let ctx = ui.ctx().clone();
        install_fonts(&ctx);
        // a click that closes a menu must not also act on what lies under it
        let popup_was_open = egui::Popup::is_any_open(&ctx);
        let mut cmds = self.input(&ctx);
        egui::Panel::top("menu").show(ui, |ui| cmds.extend(self.menu_ui(ui)));
        egui::Panel::bottom("status").show(ui, |ui| self.status_ui(ui));
        let running = self
            .run
            .as_ref()
            .or(None)
            .map(|j| (j.label.clone(), j.progress.fraction()))
            .or_else(|| self.load.as_ref().map(|j| (j.label.clone(), j.progress.fraction())));
        if let (Some(doc), Some(view)) = (self.doc.as_mut(), self.view.as_mut()) {
            // side panels scroll when the window is short (1100 × 700 and up); their width follows
            // the window's
            let width = ctx.content_rect().width();
            egui::Panel::left("specimen").default_size((0.2 * width).clamp(240.0, 300.0)).resizable(true).show(ui, |ui| {
                egui::Panel::bottom("run").show(ui, |ui| {
                    ui.add_space(4.0);
                    cmds.extend(self.side.run_ui(ui, doc, running.clone()));
                });
                egui::ScrollArea::vertical().id_salt("specimen-scroll").show(ui, |ui| cmds.extend(self.side.side_ui(ui, doc, view)));
            });
            egui::Panel::right("plan-and-section").default_size((0.24 * width).clamp(260.0, 340.0)).resizable(true).show(ui, |ui| {
                egui::ScrollArea::vertical().id_salt("section-scroll").show(ui, |ui| {
                    ui.strong("Plan map");
                    cmds.extend(plan::plan_ui(ui, doc, view.angle_deg));
                    ui.separator();
                    ui.strong("Section inspector");
                    cmds.extend(self.inspector.inspector_ui(ui, doc, self.selected_row));
                });
            });
            egui::Panel::bottom("profile").default_size(360.0).min_size(300.0).resizable(true).show(ui, |ui| {
                ui.strong("Duct profile");
                let rows = doc.outcome.as_ref().map(|o| o.rows.as_slice()).unwrap_or(&[]);
                cmds.extend(profile::profile_ui(ui, &mut self.profile, rows, self.selected_row));
            });
            view.popup_was_open = popup_was_open;
            egui::CentralPanel::default().show(ui, |ui| cmds.extend(view.tracing_ui(ui, doc)));
        } else {
            egui::CentralPanel::default().show(ui, |ui| {
                ui.vertical_centered(|ui| {
                    ui.add_space(80.0);
                    ui.heading("ductline");
                    ui.label("Open a micro-CT stack (multi-page TIFF), a folder of slices or a project: ctrl+O, the Specimen menu, or drop it here.");
                    if let Some((label, f)) = &running {
                        ui.add(egui::ProgressBar::new(*f).text(format!("{label} {:.0}%", f * 100.0)).desired_width(320.0));
                        if ui.button("Cancel").clicked() {
                            cmds.push(Cmd::Cancel);
                        }
                    }
                    if ui.button("Open the bundled sample").clicked() {
                        cmds.push(Cmd::Open(sample_path()));
                    }
                    ui.add_space(20.0);
                    ui.small(ductline::CAUTION);
                });
            });
        }
        cmds.extend(self.windows_ui(&ctx));
        cmds.extend(self.in_app_dialog_ui(&ctx));
        for c in cmds {
            let edits = matches!(
                c,
                Cmd::Edit(_)
                    | Cmd::Undo
                    | Cmd::Redo
                    | Cmd::Refit
                    | Cmd::ImportLandmarks(..)
                    | Cmd::AcceptProposals(_)
                    | Cmd::AcceptProposal(_)
                    | Cmd::ProposeAxis
            );
            self.apply(c);
            if edits && let Some(d) = &mut self.doc {
                d.dirty = true;
                self.request_refit();
            }
        }
        if ctx.input(|i| i.viewport().close_requested()) {
            self.autosave(true);
            if !self.quit && self.doc.as_ref().is_some_and(|d| d.dirty) {
                ctx.send_viewport_cmd(egui::ViewportCommand::CancelClose);
                self.confirm_quit = true;
            }
        }
        if self.quit {
            ctx.send_viewport_cmd(egui::ViewportCommand::Close);
        }
        self.autosave(false);
        let title = match &self.doc {
            Some(d) => {
                let f = d.project_path.as_ref().unwrap_or(&d.stack_path);
                let name = f.file_name().map(|n| n.to_string_lossy().to_string()).unwrap_or_else(|| f.display().to_string());
                format!("{name}{} — ductline", if d.dirty { "*" } else { "" })
            }
            None => "ductline".into(),
        };
        if title != self.title {
            ctx.send_viewport_cmd(egui::ViewportCommand::Title(title.clone()));
            self.title = title;
        }
        if self.fitting() || self.live.is_some() {
            // a refit or a profile preview answers within tens of milliseconds: look again soon
            ctx.request_repaint_after(Duration::from_millis(15));
        } else if self.busy() || self.dialog.is_some() || self.in_app.is_some() {
            ctx.request_repaint_after(Duration::from_millis(100));
        }
    }
}

impl eframe::App for DuctApp {
    fn ui(&mut self, ui: &mut egui::Ui, _frame: &mut eframe::Frame) {
        self.frame_ui(ui);
    }
}

/// The trace from `seeds` in the background; its proposals replace those held beyond `keep`
/// (degrees), or all of them.
fn trace_job(doc: &Doc, seeds: Vec<Landmark>, keep: Option<f64>) -> Job<Result<Proposals, String>> {
    let st = doc.stack.clone();
    Job::spawn("tracing", move |_| {
        let t = ductline::trace::trace(&st, &seeds, 10.0).map_err(|e| e.to_string())?;
        let low = t.proposed.iter().filter(|p| p.confidence < 0.5).count();
        let from = keep.map(|a| format!(" beyond {a:.0}°")).unwrap_or_default();
        let summary = format!(
            "proposed {} landmarks{from} to {:.0}° (stopped: {}); {low} below confidence 0.5 — review them: accept all, up to an angle, or click one",
            t.proposed.len(),
            t.stopped_deg,
            t.reason
        );
        Ok((t.proposed, summary, keep))
    })
}

/// Loads a stack, or a project and its stack (background thread).
fn load(p: &Path, opts: LoadOptions, prog: &ductline::progress::Progress) -> Result<Loaded, String> {
    let is_project = p.extension().is_some_and(|e| e.eq_ignore_ascii_case("json"));
    let (stack_path, project) = if is_project {
        let prj = Project::load(p).map_err(|e| e.to_string())?;
        (prj.stack_path(p), Some((prj, p.to_path_buf())))
    } else {
        (p.to_path_buf(), None)
    };
    let voxel = project.as_ref().and_then(|(prj, _)| prj.voxel_um).map(|um| VoxelSize::from_user_um(&um)).transpose().map_err(|e| e.to_string())?;
    let opts = LoadOptions { voxel, ..opts };
    let stack = stack::load_with_progress(&stack_path, &opts, prog).map_err(|e| e.to_string())?;
    let looks = doc::looks(&stack);
    let fingerprint = ductline::project::fingerprint(&stack_path).ok();
    let changed = project.as_ref().and_then(|(p, _)| {
        let same = fingerprint.as_ref().is_some_and(|(b, h)| *b == p.stack.bytes && *h == p.stack.hash);
        (!same).then(|| format!("{}: the stack changed since the project was saved (size or content differ); check the landmarks", stack_path.display()))
    });
    Ok(Loaded { stack, stack_path, project, looks, fingerprint, changed })
}

fn save(doc: &mut Doc, p: &Path) -> Result<String, String> {
    let prj = doc.to_project(p).map_err(|e| e.to_string())?;
    prj.save(p).map_err(|e| e.to_string())?;
    doc.dirty = false;
    let _ = std::fs::remove_file(doc.autosave_path());
    Ok(format!("saved {}", p.display()))
}

fn export_table(doc: &Doc, p: &Path) -> Result<String, String> {
    let Some(out) = &doc.outcome else { return Err("measure first".into()) };
    let json = p.extension().is_some_and(|e| e.eq_ignore_ascii_case("json"));
    let bytes = if json {
        let vox = doc.stack.voxel.as_ref().ok_or("no voxel size")?;
        let size = std::fs::metadata(&doc.stack_path).map(|m| m.len()).unwrap_or(0);
        let prov = ductline::export::Provenance { stack_path: &doc.stack_path, stack_bytes: size, voxel: vox, fit: &doc.fit, measure: &doc.measure };
        serde_json::to_string_pretty(&ductline::export::table_json(out, &prov)).map_err(|e| e.to_string())?.into_bytes()
    } else {
        ductline::export::table_csv(&out.rows).into_bytes()
    };
    project::write_atomic(p, &bytes).map_err(|e| e.to_string())?;
    Ok(format!("wrote {}", p.display()))
}

/// The command for a path a file dialog gave.
fn chosen(what: Pending, p: PathBuf) -> Cmd {
    match what {
        Pending::Open | Pending::OpenFolder => Cmd::Open(p),
        Pending::ImportLandmarks(world) => Cmd::ImportLandmarks(p, world),
        Pending::ExportLandmarks => Cmd::ExportLandmarks(p),
        Pending::SaveAs => Cmd::SaveAs(p),
        Pending::ExportTable => Cmd::ExportTable(p),
        Pending::ExportStl => Cmd::ExportStl(p),
        Pending::SaveFigure => Cmd::SaveFigure(p),
    }
}

/// Adds symbol fonts as the last fallbacks of both families (once; later calls find them
/// there): the file dialog draws folder, file and arrow symbols the default font lacks.
fn install_fonts(ctx: &egui::Context) {
    use egui::epaint::text::{FontInsert, FontPriority, InsertFontFamily};
    for (name, data) in [("ductline-symbols", emoji_fonts::EMOJI_ICON), ("ductline-emoji", emoji_fonts::NOTO_EMOJI_REGULAR)] {
        let families = [egui::FontFamily::Proportional, egui::FontFamily::Monospace]
            .into_iter()
            .map(|family| InsertFontFamily { family, priority: FontPriority::Lowest })
            .collect();
        ctx.add_font(FontInsert::new(name, egui::FontData::from_static(data), families));
    }
}

/// What a background measure answers.
type MeasureAnswer = Result<ductline::pipeline::Outcome, String>;

/// The row nearest to distance `s` (mm) along the centreline (0 when there are none).
fn nearest_row(rows: &[ductline::measure::Row], s: f64) -> usize {
    (0..rows.len()).min_by(|&a, &b| (rows[a].s_mm - s).abs().total_cmp(&(rows[b].s_mm - s).abs())).unwrap_or(0)
}

//! The app driven with egui_kittest (no display, no GPU): queries by role and label.

use super::{Cmd, DuctApp, sample_path};
use ductline::landmarks::Kind;
use egui::Role;
use egui_kittest::Harness;
use egui_kittest::kittest::{NodeT, Queryable};
use std::path::PathBuf;
use std::time::Duration;

fn harness(open: Option<PathBuf>) -> Harness<'static, DuctApp> {
    harness_with(open, tempfile::tempdir().unwrap().keep(), egui::vec2(1500.0, 950.0))
}

/// The app at a window size, autosaving into `autosave_dir` (never the user's own data folder),
/// with the in-app file dialog (tests have no desktop portal).
fn harness_with(open: Option<PathBuf>, autosave_dir: PathBuf, size: egui::Vec2) -> Harness<'static, DuctApp> {
    let mut app = DuctApp::new(open, None);
    app.autosave_dir = autosave_dir;
    app.native_dialogs = false;
    Harness::builder().with_size(size).build_ui_state(|ui, app: &mut DuctApp| app.frame_ui(ui), app)
}

/// Steps the UI until `cond` holds (background work finishes on its own threads).
fn wait(h: &mut Harness<'static, DuctApp>, what: &str, cond: impl Fn(&DuctApp) -> bool) {
    for _ in 0..1200 {
        h.step();
        if cond(h.state()) {
            h.step();
            return;
        }
        std::thread::sleep(Duration::from_millis(50));
    }
    panic!("timed out waiting for {what}; status: {}", h.state().status);
}

/// A primary-button press and release at `pos` (the pointer already there), a frame each.
fn click_at(h: &mut Harness<'static, DuctApp>, pos: egui::Pos2) {
    for pressed in [true, false] {
        h.event(egui::Event::PointerButton { pos, button: egui::PointerButton::Primary, pressed, modifiers: Default::default() });
        h.step();
    }
}

fn count(h: &Harness<'static, DuctApp>) -> usize {
    h.state().doc.as_ref().map(|d| d.lms.items.len()).unwrap_or(0)
}

#[test]
fn open_sample_place_undo_redo() {
    let mut h = harness(Some(sample_path()));
    wait(&mut h, "the sample", |a| a.doc.is_some());
    assert!(h.state().doc.as_ref().unwrap().fitted.is_ok(), "the sample's landmarks fit");
    h.get_by_label("Tracing view");
    h.get_by_role_and_label(Role::Image, "Plan map");
    h.get_by_role_and_label(Role::RadioButton, "ligament").click();
    h.step();
    assert_eq!(h.state().view.as_ref().unwrap().active, Kind::Ligament);
    let n0 = count(&h);
    h.get_by_label("Tracing view").click();
    h.step();
    h.step();
    assert_eq!(count(&h), n0 + 1, "a click places a landmark");
    assert_eq!(h.state().doc.as_ref().unwrap().lms.items.last().unwrap().kind, Kind::Ligament);
    assert_eq!(h.state().view.as_ref().unwrap().active, Kind::Lamina, "the kinds alternate");
    assert!(h.state().doc.as_ref().unwrap().dirty);
    h.key_press_modifiers(egui::Modifiers::COMMAND, egui::Key::Z);
    h.step();
    assert_eq!(count(&h), n0, "ctrl+Z undoes");
    h.key_press_modifiers(egui::Modifiers::COMMAND | egui::Modifiers::SHIFT, egui::Key::Z);
    h.step();
    assert_eq!(count(&h), n0 + 1, "ctrl+shift+Z redoes");
    // the Edit menu does the same
    h.get_by_role_and_label(Role::Button, "Edit").click();
    h.step();
    h.step();
    h.get_by_label_contains("Undo").click();
    h.step();
    h.step();
    assert_eq!(count(&h), n0);
}

#[test]
fn measure_then_profile_and_inspector() {
    let mut h = harness(Some(sample_path()));
    wait(&mut h, "the sample", |a| a.doc.is_some());
    h.get_by_role_and_label(Role::Button, "Fit & measure").click();
    h.step();
    assert!(h.state().busy(), "measuring runs in the background");
    wait(&mut h, "the measurement", |a| a.doc.as_ref().is_some_and(|d| d.outcome.is_some()));
    let rows = h.state().doc.as_ref().unwrap().outcome.as_ref().unwrap().rows.len();
    assert!(rows > 300);
    h.get_by_label("Duct profile");
    h.get_by_role_and_label(Role::Image, "Section image");
    h.get_by_label_contains(&format!("section 1 of {rows}"));
    h.get_by_role_and_label(Role::Button, ">").click();
    h.step();
    h.step();
    h.get_by_label_contains(&format!("section 2 of {rows}"));
    // a click in the profile plot picks the nearest section
    // inside the upper (area) plot: below the row of axis and curve switches
    let row = h.get_by_label("x:").rect();
    let pos = egui::pos2(row.left() + 500.0, row.bottom() + 70.0);
    h.hover_at(pos);
    h.step();
    click_at(&mut h, pos);
    h.step();
    let sel = h.state().selected_row.unwrap();
    assert!(sel > 10, "the click selected a section along the profile, got {sel}");
    // the tracing view goes there: the radial cut at the section's angle
    let want = h.state().doc.as_ref().unwrap().outcome.as_ref().unwrap().rows[sel].angle_deg;
    let v = h.state().view.as_ref().unwrap();
    assert!(v.plane == crate::app::tracing::Plane::Radial && (v.angle_deg - want).abs() < 1e-9, "{:?} at {}°", v.plane, v.angle_deg);
    // the figure is saved as the profile shows it
    let figdir = tempfile::tempdir().unwrap();
    let fig = figdir.path().join("profile.png");
    h.state_mut().apply(Cmd::SaveFigure(fig.clone()));
    assert!(fig.exists() && std::fs::metadata(&fig).unwrap().len() > 10_000, "{}", h.state().status);
    // PgUp steps the cut by 10°
    h.key_press(egui::Key::PageUp);
    h.step();
    assert!((h.state().view.as_ref().unwrap().angle_deg - want - 10.0).abs() < 1e-9);
    // exclude it: an override the next measure applies
    h.get_by_role_and_label(Role::CheckBox, "exclude").click();
    h.step();
    let doc = h.state().doc.as_ref().unwrap();
    assert_eq!(doc.overrides.len(), 1);
    assert!(doc.overrides[0].exclude && doc.stale);
    // a bare shelf is a measure setting, kept in the project like the step
    h.get_by_role_and_label(Role::CheckBox, "bare shelf (no limbus)").click();
    h.step();
    let doc = h.state().doc.as_ref().unwrap();
    assert!(doc.measure.bare_shelf && doc.dirty);
    assert!(doc.to_project(&std::env::temp_dir().join("p.ductline.json")).unwrap().measure.bare_shelf);
}

#[test]
fn a_bad_file_is_an_error_not_a_crash() {
    let dir = tempfile::tempdir().unwrap();
    let bad = dir.path().join("broken.tif");
    std::fs::write(&bad, b"II*\0garbage").unwrap();
    let mut h = harness(Some(bad));
    wait(&mut h, "the load to fail", |a| !a.busy());
    assert!(h.state().doc.is_none());
    assert!(h.state().status.contains("broken.tif"), "{}", h.state().status);
    h.get_by_label_contains("broken.tif");
}

/// Unsaved edits reach the autosave file within 30 s and are offered back at the next start.
#[test]
fn autosave_and_recovery() {
    let dir = tempfile::tempdir().unwrap();
    let src = sample_path();
    for f in ["phantom.tif", "phantom.ductline.json"] {
        std::fs::copy(src.parent().unwrap().join(f), dir.path().join(f)).unwrap();
    }
    let prj = dir.path().join("phantom.ductline.json");
    let saves = dir.path().join("autosaves");
    let mut h = harness_with(Some(prj.clone()), saves.clone(), egui::vec2(1500.0, 950.0));
    wait(&mut h, "the project", |a| a.doc.is_some());
    assert!(h.state().recovery.is_none());
    let n0 = count(&h);
    h.get_by_label("Tracing view").click();
    h.step();
    assert_eq!(count(&h), n0 + 1);
    let auto = h.state().doc.as_ref().unwrap().autosave_path();
    h.step();
    assert!(!auto.exists(), "not before 30 s");
    h.state_mut().last_autosave -= Duration::from_secs(31);
    h.step();
    assert!(auto.exists(), "autosaved after 30 s");
    drop(h);
    assert!(auto.starts_with(&saves), "autosaves go to the data folder, not beside the project: {}", auto.display());
    // a new session on the same project offers the recovery
    let mut h = harness_with(Some(prj.clone()), saves.clone(), egui::vec2(1500.0, 950.0));
    wait(&mut h, "the project", |a| a.doc.is_some());
    assert_eq!(count(&h), n0, "the saved project is unchanged");
    assert!(h.state().recovery.is_some());
    h.get_by_role_and_label(Role::Button, "Recover").click();
    h.step();
    assert_eq!(count(&h), n0 + 1, "the unsaved landmark is back");
    // saving writes the project atomically and removes the side file
    h.state_mut().apply(Cmd::Save);
    h.step();
    assert!(!auto.exists());
    let saved = ductline::project::Project::load(&prj).unwrap();
    assert_eq!(saved.landmarks.len(), n0 + 1);
}

/// Zoomed in, only the visible part of the plane is sampled, and clicks still land on the same
/// stack point as at the default zoom.
#[test]
fn zoomed_views_sample_only_what_shows() {
    let mut h = harness(Some(sample_path()));
    wait(&mut h, "the sample", |a| a.doc.is_some());
    h.get_by_label("Tracing view").click();
    h.step();
    h.step();
    let p1 = h.state().doc.as_ref().unwrap().lms.items.last().unwrap().p;
    let full = h.state().view.as_ref().unwrap().plane_map(h.state().doc.as_ref().unwrap()).unwrap();
    h.state_mut().view.as_mut().unwrap().zoom = 4.0;
    h.step();
    h.step();
    let shown = h.state().view.as_ref().unwrap().sampled().unwrap();
    assert!(shown.0 < full.nu / 2 && shown.1 < full.nv / 2, "sampled {shown:?} of {}×{}", full.nu, full.nv);
    h.get_by_label("Tracing view").click();
    h.step();
    h.step();
    let p2 = h.state().doc.as_ref().unwrap().lms.items.last().unwrap().p;
    assert!(ductline::frame::v3::dist(p1, p2) < 0.07, "{p1:?} vs {p2:?}");
}

/// Binning on load (the Load options window) halves the voxels, keeps the landmarks' stack
/// coordinates valid (the fit still works) and a bad crop is an error, not a crash.
#[test]
fn load_options_bin_and_crop() {
    let mut app = DuctApp::new(None, None);
    app.load_bin = 2;
    let mut h = Harness::builder().with_size(egui::vec2(1500.0, 950.0)).build_ui_state(|ui, app: &mut DuctApp| app.frame_ui(ui), app);
    h.state_mut().apply(Cmd::Open(sample_path()));
    wait(&mut h, "the binned sample", |a| a.doc.is_some());
    let doc = h.state().doc.as_ref().unwrap();
    assert_eq!(doc.stack.dims, [73, 73, 47]);
    assert!(doc.fitted.is_ok(), "landmarks in whole-stack mm still fit");
    h.get_by_label("Tracing view");
    h.state_mut().load_crop = "0:10,oops".into();
    h.state_mut().apply(Cmd::Open(sample_path()));
    h.step();
    assert!(h.state().status.contains("--crop"), "{}", h.state().status);
}

/// A NIfTI stack offers world-frame landmark import (its frame named); the imported points land
/// where the file's affine (as nibabel reports it, tests/fixtures/manifest.json) says. A TIFF
/// stack offers it disabled.
#[test]
fn world_frame_landmark_import() {
    let nii = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/nifti/u16_qform.nii");
    let mut h = harness(Some(nii));
    wait(&mut h, "the NIfTI stack", |a| a.doc.is_some());
    h.get_by_role_and_label(egui::Role::Button, "Specimen").click();
    h.step();
    h.step();
    assert!(!h.get_by_label_contains("world frame, RAS").accesskit_node().is_disabled(), "the item is enabled for a file with a world frame");
    let manifest: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/manifest.json")).unwrap()).unwrap();
    let f = manifest["nifti"].as_array().unwrap().iter().find(|f| f["name"] == "u16_qform.nii").unwrap();
    let a: Vec<Vec<f64>> = f["affine"].as_array().unwrap().iter().map(|r| r.as_array().unwrap().iter().map(|x| x.as_f64().unwrap()).collect()).collect();
    let zooms: Vec<f64> = f["zooms"].as_array().unwrap().iter().map(|x| x.as_f64().unwrap()).collect();
    let idx = [2.0, 3.0, 1.5];
    let p: Vec<f64> = (0..3).map(|r| a[r][0] * idx[0] + a[r][1] * idx[1] + a[r][2] * idx[2] + a[r][3]).collect();
    let dir = tempfile::tempdir().unwrap();
    let csv = dir.path().join("world.csv");
    std::fs::write(&csv, format!("kind,x_mm,y_mm,z_mm\nlamina,{},{},{}\n", p[0], p[1], p[2])).unwrap();
    let n0 = count(&h);
    h.state_mut().apply(Cmd::ImportLandmarks(csv.clone(), true));
    h.step();
    assert_eq!(count(&h), n0 + 1, "{}", h.state().status);
    let got = h.state().doc.as_ref().unwrap().lms.items.last().unwrap().p;
    for k in 0..3 {
        assert!((got[k] - idx[k] * zooms[k]).abs() < 1e-6, "{got:?}");
    }
    assert!(h.state().status.contains("world frame RAS"), "{}", h.state().status);
    // the same file read in the stack frame lies outside this 7 × 6 × 4 stack: refused, named
    h.state_mut().apply(Cmd::ImportLandmarks(csv, false));
    h.step();
    assert_eq!(count(&h), n0 + 1);
    assert!(h.state().status.contains("world.csv"), "{}", h.state().status);

    // a TIFF stack has no world frame
    let mut h = harness(Some(sample_path()));
    wait(&mut h, "the sample", |a| a.doc.is_some());
    h.get_by_role_and_label(egui::Role::Button, "Specimen").click();
    h.step();
    h.step();
    assert!(h.get_by_label_contains("Import landmarks in the file's world frame").accesskit_node().is_disabled());
}

/// A copy of the bundled sample (stack, and project when `project`) in a fresh folder.
fn sample_copy(project: bool) -> (tempfile::TempDir, PathBuf) {
    let dir = tempfile::tempdir().unwrap();
    let src = sample_path();
    std::fs::copy(src.parent().unwrap().join("phantom.tif"), dir.path().join("phantom.tif")).unwrap();
    if project {
        std::fs::copy(&src, dir.path().join("phantom.ductline.json")).unwrap();
    }
    let open = dir.path().join(if project { "phantom.ductline.json" } else { "phantom.tif" });
    (dir, open)
}

/// Bug: with no desktop portal the system dialog returned nothing and nothing said why, so a
/// project started from a TIFF could not be saved. Now the app falls back to its own dialog
/// (saying so), and a typed file name is saved to.
#[test]
fn fallback_dialog_saves_a_project_at_a_typed_name() {
    let (dir, tif) = sample_copy(false);
    let mut h = harness(Some(tif));
    wait(&mut h, "the stack", |a| a.doc.is_some());
    // nothing measured yet: the exports are offered disabled
    h.get_by_role_and_label(Role::Button, "Specimen").click();
    h.step();
    h.step();
    assert!(h.get_by_label_contains("Export geometry table").accesskit_node().is_disabled());
    assert!(h.get_by_label_contains("Export lumen surfaces").accesskit_node().is_disabled());
    h.get_by_label_contains("Save project as").click();
    h.step();
    h.step();
    assert!(h.state().in_app.is_some(), "ductline's own dialog opened");
    h.step();
    // the file-name field, as the dialog fills it in
    let name = h.get_all_by_role(Role::TextInput).find(|n| n.value().as_deref() == Some("specimen.ductline.json")).expect("the file-name field");
    name.set_text_value_accesskit("typed.ductline.json");
    h.step();
    h.get_by_role_and_label(Role::Button, "Save").click();
    h.step();
    h.step();
    let saved = dir.path().join("typed.ductline.json");
    assert!(saved.exists(), "{}: {}", saved.display(), h.state().status);
    assert_eq!(h.state().doc.as_ref().unwrap().project_path.as_deref(), Some(saved.as_path()));
    assert_eq!(h.state().title, "typed.ductline.json — ductline");
}

/// The system dialog that comes back empty at once (no portal service answered) hands over to
/// ductline's own, with a visible message.
#[test]
fn no_portal_falls_back_with_a_message() {
    let (_dir, tif) = sample_copy(false);
    let mut h = harness(Some(tif));
    wait(&mut h, "the stack", |a| a.doc.is_some());
    // a system dialog that cannot open: the portal's bus is pointed at nothing
    // SAFETY: tests in this binary do not read this variable concurrently
    unsafe { std::env::set_var("DBUS_SESSION_BUS_ADDRESS", "unix:path=/nonexistent/ductline-test-bus") };
    h.state_mut().native_dialogs = true;
    h.state_mut().apply(Cmd::SaveAsDialog);
    wait(&mut h, "the fallback dialog", |a| a.in_app.is_some());
    assert!(h.state().status.contains("using ductline's own"), "{}", h.state().status);
    h.get_by_label_contains(&h.state().status.clone());
}

/// Bug: selecting an excluded section showed levels "NaN / NaN", the fixed-level fields "inf",
/// and set the override again every frame, so "results are older" never cleared.
#[test]
fn an_excluded_section_settles() {
    let mut h = harness(Some(sample_path()));
    wait(&mut h, "the sample", |a| a.doc.is_some());
    let s0 = {
        h.state_mut().apply(Cmd::Measure);
        wait(&mut h, "the measurement", |a| !a.busy());
        h.state().doc.as_ref().unwrap().outcome.as_ref().unwrap().rows[3].s_mm
    };
    h.state_mut().apply(Cmd::SetOverride(ductline::measure::Override { s_mm: s0, exclude: true, ..Default::default() }));
    h.state_mut().apply(Cmd::Measure);
    wait(&mut h, "the second measurement", |a| !a.busy());
    h.state_mut().apply(Cmd::SelectRow(Some(3)));
    for _ in 0..5 {
        h.step();
    }
    let doc = h.state().doc.as_ref().unwrap();
    assert!(!doc.stale, "selecting the section changed nothing: {}", h.state().status);
    assert_eq!(doc.overrides.len(), 1);
    assert!(!h.state().status.contains("override set"), "{}", h.state().status);
    assert!(h.query_by_label_contains("NaN").is_none() && h.query_by_label_contains("inf").is_none());
    h.get_by_label("excluded");
}

/// Bug: the click that closed an open menu also placed a landmark.
#[test]
fn a_click_that_closes_a_menu_places_nothing() {
    let mut h = harness(Some(sample_path()));
    wait(&mut h, "the sample", |a| a.doc.is_some());
    let n0 = count(&h);
    h.get_by_role_and_label(Role::Button, "Specimen").click();
    h.step();
    h.step();
    assert!(h.query_by_label_contains("Save project as").is_some(), "the menu is open");
    h.get_by_label("Tracing view").click();
    h.step();
    h.step();
    assert_eq!(count(&h), n0, "the click only closed the menu");
    assert!(h.query_by_label_contains("Save project as").is_none(), "the menu closed");
    h.get_by_label("Tracing view").click();
    h.step();
    h.step();
    assert_eq!(count(&h), n0 + 1, "the next click places");
}

/// Bug: one wheel notch moved 2–4 slices (the smoothed scroll spread over frames). One notch,
/// in lines or in points, is one slice.
#[test]
fn one_wheel_notch_one_slice() {
    let mut h = harness(Some(sample_path()));
    wait(&mut h, "the sample", |a| a.doc.is_some());
    h.get_by_label("Tracing view").hover();
    h.step();
    let k0 = h.state().view.as_ref().unwrap().index[2];
    let wheel = |unit, dy| egui::Event::MouseWheel {
        unit,
        delta: egui::vec2(0.0, dy),
        phase: egui::TouchPhase::Move,
        source: egui::MouseWheelSource::Wheel,
        modifiers: egui::Modifiers::NONE,
    };
    h.event(wheel(egui::MouseWheelUnit::Line, 1.0));
    for _ in 0..10 {
        h.step();
    }
    assert_eq!(h.state().view.as_ref().unwrap().index[2], k0 + 1);
    h.event(wheel(egui::MouseWheelUnit::Point, -50.0));
    for _ in 0..10 {
        h.step();
    }
    assert_eq!(h.state().view.as_ref().unwrap().index[2], k0);
}

/// Bug: the bundled sample autosaved into its own folder in the source tree. Autosaves go to
/// the data folder given to the app (the user's, outside tests).
#[test]
fn the_sample_autosaves_outside_its_folder() {
    let saves = tempfile::tempdir().unwrap();
    let mut h = harness_with(Some(sample_path()), saves.path().to_path_buf(), egui::vec2(1500.0, 950.0));
    wait(&mut h, "the sample", |a| a.doc.is_some());
    h.get_by_label("Tracing view").click();
    h.step();
    h.state_mut().last_autosave -= Duration::from_secs(31);
    h.step();
    let auto = h.state().doc.as_ref().unwrap().autosave_path();
    assert!(auto.exists() && auto.starts_with(saves.path()), "{}", auto.display());
    let sample_dir = sample_path().parent().unwrap().to_path_buf();
    let strays: Vec<_> =
        std::fs::read_dir(&sample_dir).unwrap().filter_map(|e| e.ok()).filter(|e| e.file_name().to_string_lossy().contains("autosave")).collect();
    assert!(strays.is_empty(), "nothing written beside the sample: {strays:?}");
}

/// The title names the file and marks unsaved work; Quit with unsaved work asks first.
#[test]
fn title_and_quit_prompt() {
    let (_dir, prj) = sample_copy(true);
    let mut h = harness(Some(prj));
    wait(&mut h, "the project", |a| a.doc.is_some());
    assert_eq!(h.state().title, "phantom.ductline.json — ductline");
    h.get_by_label("Tracing view").click();
    h.step();
    h.step();
    assert_eq!(h.state().title, "phantom.ductline.json* — ductline");
    h.key_press_modifiers(egui::Modifiers::COMMAND, egui::Key::Q);
    h.step();
    h.step();
    assert!(h.state().confirm_quit && !h.state().quit);
    h.get_by_label_contains("has unsaved changes");
    h.get_by_role_and_label(Role::Button, "Cancel").click();
    h.step();
    assert!(!h.state().confirm_quit && !h.state().quit);
    h.state_mut().apply(Cmd::Quit);
    h.step();
    h.get_by_role_and_label(Role::Button, "Save and quit").click();
    h.step();
    h.step();
    assert!(h.state().quit, "{}", h.state().status);
    assert!(!h.state().doc.as_ref().unwrap().dirty, "saved before quitting");
}

/// Edit → Propose landmarks: from seven seeds the trace proposes landmarks in the background,
/// held apart for review (nothing counts until accepted) and saved with the project (a project
/// saved then opened again holds them all, still for review): "Accept up to" an angle adds those
/// as one step; moving an accepted point traces again beyond it (the proposals up to it stay);
/// a click on an open ring in the view accepts that one, "Accept all" the rest; an undo shows
/// accepted ones as proposals again. An import is one step too.
#[test]
fn proposals_are_reviewed_before_they_count() {
    let (dir, tif) = sample_copy(false);
    let text = std::fs::read_to_string(sample_path().parent().unwrap().join("landmarks.csv")).unwrap();
    let mut lines: Vec<&str> = text.lines().take(1).collect();
    for k in ["axis_base", "axis_apex", "window"] {
        lines.extend(text.lines().filter(|l| l.starts_with(k)));
    }
    for k in ["lamina", "ligament"] {
        lines.extend(text.lines().filter(|l| l.starts_with(k)).take(2));
    }
    let seeds = dir.path().join("seeds.csv");
    std::fs::write(&seeds, lines.join("\n")).unwrap();
    let mut h = harness(Some(tif));
    wait(&mut h, "the stack", |a| a.doc.is_some());
    h.state_mut().apply(Cmd::ImportLandmarks(seeds, false));
    h.step();
    assert_eq!(count(&h), 7, "{}", h.state().status);
    h.get_by_role_and_label(Role::Button, "Edit").click();
    h.step();
    h.step();
    h.get_by_label("Propose landmarks along the spiral").click();
    h.step();
    wait(&mut h, "the trace", |a| !a.busy());
    h.step();
    let pending = |h: &Harness<'_, DuctApp>| h.state().doc.as_ref().unwrap().pending().len();
    let n = pending(&h);
    assert!(n > 100, "{n} proposed: {}", h.state().status);
    assert_eq!(count(&h), 7, "proposals do not count until accepted");
    assert!(h.state().status.contains("stopped"), "{}", h.state().status);
    // saved with the project, they come back for review when it is opened
    let dir = tempfile::tempdir().unwrap();
    let saved = dir.path().join("traced.ductline.json");
    assert!(h.state().doc.as_ref().unwrap().dirty, "new proposals are unsaved work");
    super::save(h.state_mut().doc.as_mut().unwrap(), &saved).unwrap();
    {
        let mut back = harness(Some(saved.clone()));
        wait(&mut back, "the saved project", |a| a.doc.is_some());
        let d = back.state().doc.as_ref().unwrap();
        assert_eq!((d.pending().len(), d.lms.items.len()), (n, 7), "proposals and landmarks as saved");
    }
    // up to 360°: those, as one step
    h.state_mut().side.accept_up_to = Some(360.0);
    h.step();
    h.get_by_role_and_label(Role::Button, "Accept up to 360°").click();
    h.step();
    let first_turn = h.state().doc.as_ref().unwrap().proposals.iter().filter(|p| p.angle_deg <= 360.0).count();
    assert!(first_turn > 20 && count(&h) == 7 + first_turn, "{} landmarks, {first_turn} proposed in the first turn", count(&h));
    // the refit after an edit runs in the background
    wait(&mut h, "the refit", |a| !a.fitting());
    assert!(h.state().doc.as_ref().unwrap().fitted.is_ok(), "the accepted ones fit");
    // moving an accepted point re-proposes beyond it: those up to it stay as they were, those
    // beyond come from a trace resumed from the landmarks up to it
    let (before_kept, moved_at) = {
        let doc = h.state().doc.as_ref().unwrap();
        let cl = doc.fitted.as_ref().unwrap();
        let angle = |p: [f64; 3]| {
            let [r, a, hh] = cl.frame.to_cochlear(p);
            cl.unwrap_deg(r, a, hh)
        };
        // the accepted lamina point nearest 300°
        let (i, at) = doc
            .lms
            .items
            .iter()
            .enumerate()
            .filter(|(_, l)| l.kind == Kind::Lamina)
            .map(|(i, l)| (i, angle(l.p)))
            .min_by(|a, b| (a.1 - 300.0).abs().total_cmp(&(b.1 - 300.0).abs()))
            .unwrap();
        let kept: Vec<_> = doc.proposals.iter().filter(|p| p.angle_deg <= at).copied().collect();
        let p = doc.lms.items[i].p;
        h.state_mut().apply(Cmd::Edit(ductline::landmarks::Edit::Move { index: i, to: [p[0] + 0.02, p[1], p[2]] }));
        (kept, at)
    };
    h.step();
    wait(&mut h, "the trace resumed", |a| !a.busy());
    h.step();
    {
        let doc = h.state().doc.as_ref().unwrap();
        assert!(h.state().status.contains("beyond"), "{}", h.state().status);
        let kept: Vec<_> = doc.proposals.iter().filter(|p| p.angle_deg <= moved_at).copied().collect();
        assert_eq!(kept, before_kept, "proposals up to the moved point stay");
        assert!(doc.proposals.iter().filter(|p| p.angle_deg > moved_at).count() > 50, "re-proposed beyond {moved_at:.0}°");
    }
    // one by one: a click on an open ring in the view
    let (k, p) = h.state().doc.as_ref().unwrap().pending().into_iter().next().map(|(k, p)| (k, p.lm.p)).unwrap();
    {
        let app = h.state_mut();
        app.view.as_mut().unwrap().go_to(app.doc.as_ref().unwrap(), p);
    }
    h.step();
    h.step();
    let at = h.state().view.as_ref().unwrap().drawn_proposals.iter().find(|d| d.0 == k).expect("the proposal is drawn").1;
    h.hover_at(at);
    h.step();
    let before_click = count(&h);
    click_at(&mut h, at);
    assert_eq!(count(&h), before_click + 1, "{}", h.state().status);
    assert!(!h.state().doc.as_ref().unwrap().pending().iter().any(|(j, _)| *j == k));
    let (before_all, waiting) = (count(&h), pending(&h));
    h.get_by_role_and_label(Role::Button, "Accept all").click();
    h.step();
    assert_eq!(count(&h), before_all + waiting);
    assert_eq!(pending(&h), 0);
    // undo: the last acceptance comes back as proposals
    h.state_mut().apply(Cmd::Undo);
    assert_eq!((count(&h), pending(&h)), (before_all, waiting));
    h.state_mut().apply(Cmd::Undo); // the click
    assert_eq!(count(&h), before_click);
    h.state_mut().apply(Cmd::Undo); // the move
    h.state_mut().apply(Cmd::Undo); // up to 360°
    assert_eq!(count(&h), 7);
    h.state_mut().apply(Cmd::Undo);
    assert_eq!(count(&h), 0, "the import was one step");
}

/// The fit's predicted points (the small dots where the fitted curves meet the plane) can be
/// taken as they are: on the bundled sample (snapping off), a click a few pixels off a predicted
/// point away from any placed one, with its kind active, places that landmark exactly on the
/// prediction, not where clicked, and the active kind turns to the partition's other end.
#[test]
fn a_click_on_a_predicted_point_places_it() {
    let mut h = harness(Some(sample_path()));
    wait(&mut h, "the sample", |a| a.doc.is_some());
    h.step();
    h.step();
    let (vox, n0, items) = {
        let doc = h.state().doc.as_ref().unwrap();
        assert!(doc.fitted.is_ok());
        (doc.stack.voxel.as_ref().unwrap().max(), doc.lms.items.len(), doc.lms.items.clone())
    };
    let far = |p: [f64; 3]| items.iter().all(|l| ductline::frame::v3::dist(l.p, p) > 4.0 * vox);
    let (kind, _, dot) = *h.state().view.as_ref().unwrap().drawn_fit.iter().find(|d| far(d.1)).expect("a predicted point away from the placed ones");
    let dots: Vec<[f64; 3]> = h.state().view.as_ref().unwrap().drawn_fit.iter().filter(|d| d.0 == kind).map(|d| d.1).collect();
    {
        let v = h.state_mut().view.as_mut().unwrap();
        v.active = kind;
        v.snap = false;
    }
    // a click four pixels off the dot
    let at = dot + egui::vec2(0.0, 4.0);
    h.hover_at(at);
    h.step();
    let clicked = h.state().view.as_ref().unwrap().hover.as_ref().unwrap().p;
    click_at(&mut h, at);
    let doc = h.state().doc.as_ref().unwrap();
    assert_eq!(doc.lms.items.len(), n0 + 1, "{}", h.state().status);
    let new = doc.lms.items.last().unwrap();
    assert_eq!(new.kind, kind);
    let on_dot = dots.iter().map(|q| ductline::frame::v3::dist(new.p, *q)).fold(f64::INFINITY, f64::min);
    assert!(on_dot < 1e-9, "placed {on_dot:.4} mm from the nearest predicted point");
    let off_click = ductline::frame::v3::dist(new.p, clicked);
    assert!(off_click > 0.5 * vox, "placed where clicked ({off_click:.4} mm), not on the prediction");
    assert_ne!(h.state().view.as_ref().unwrap().active, kind, "the other end next");
}

/// ctrl+wheel zooms about the cursor: the stack point under it stays under it.
#[test]
fn zoom_keeps_the_point_under_the_cursor() {
    let mut h = harness(Some(sample_path()));
    wait(&mut h, "the sample", |a| a.doc.is_some());
    let view = h.get_by_label("Tracing view").rect();
    let at = view.center() + egui::vec2(view.width() * 0.2, -view.height() * 0.15);
    h.hover_at(at);
    h.step();
    let before = h.state().view.as_ref().unwrap().hover.as_ref().unwrap().p;
    h.event(egui::Event::Zoom(2.0));
    h.step();
    h.hover_at(at);
    h.step();
    let v = h.state().view.as_ref().unwrap();
    assert!(v.zoom > 1.5, "zoomed: {}", v.zoom);
    let after = v.hover.as_ref().unwrap().p;
    assert!(ductline::frame::v3::dist(before, after) < 0.05, "{before:?} → {after:?}");
}

/// Snapping: on the bundled sample (fitted), a lamina click one voxel off a placed lamina point
/// lands on the tip the radial cut through the click shows (within a voxel of the fitted lamina
/// curve at that angle), a ligament click likewise; with snapping off, or far from any edge, a click stays where it was made.
#[test]
fn clicks_snap_to_the_edges() {
    let mut h = harness(Some(sample_path()));
    wait(&mut h, "the sample", |a| a.doc.is_some());
    h.step();
    let app = h.state_mut();
    let doc = app.doc.as_ref().unwrap();
    assert!(doc.fitted.is_ok());
    let vox = doc.stack.voxel.as_ref().unwrap().max();
    let view = app.view.as_mut().unwrap();
    let mut snapped = 0;
    for kind in [Kind::Lamina, Kind::Ligament] {
        view.active = kind;
        for lm in doc.lms.items.iter().filter(|l| l.kind == kind).skip(3).step_by(7).take(6) {
            let click = [lm.p[0] + 0.7 * vox, lm.p[1] - 0.7 * vox, lm.p[2]];
            view.snap = true;
            let q = view.snapped(doc, click);
            if q != click {
                snapped += 1;
                let c = doc.fitted.as_ref().unwrap();
                let [r, a, hh] = c.frame.to_cochlear(q);
                let on_curve = c.edge_point(kind, c.unwrap_deg(r, a, hh).to_radians());
                let d = ductline::frame::v3::dist(q, on_curve);
                assert!(d < vox, "{kind:?}: landed {d:.3} mm from the fitted curve");
            }
            view.snap = false;
            assert_eq!(view.snapped(doc, click), click);
        }
        // far from the partition: no snap
        view.snap = true;
        let c = doc.fitted.as_ref().unwrap();
        let far = c.frame.to_stack(0.3, 45.0, 0.0);
        assert_eq!(view.snapped(doc, far), far);
    }
    assert!(snapped >= 9, "{snapped} of 12 clicks snapped");
}

/// Edit → Propose the modiolar axis: on the bundled sample with its axis points removed, the
/// window and the lamina points place axis_base and axis_apex near the ones removed (direction
/// within 8°), as one step (one undo takes them back); without a window it says what is missing.
#[test]
fn propose_the_axis_from_the_window_and_lamina() {
    let mut h = harness(Some(sample_path()));
    wait(&mut h, "the sample", |a| a.doc.is_some());
    let axis = |h: &Harness<'_, DuctApp>| {
        let items = &h.state().doc.as_ref().unwrap().lms.items;
        let get = |k: Kind| items.iter().position(|l| l.kind == k);
        (get(Kind::AxisBase), get(Kind::AxisApex))
    };
    let (Some(b), Some(a)) = axis(&h) else { panic!("the sample has an axis") };
    let items = h.state().doc.as_ref().unwrap().lms.items.clone();
    let truth = ductline::frame::v3::unit(ductline::frame::v3::sub(items[a].p, items[b].p));
    for i in [a.max(b), a.min(b)] {
        h.state_mut().apply(Cmd::Edit(ductline::landmarks::Edit::Delete { index: i }));
    }
    h.step();
    assert_eq!(axis(&h), (None, None));
    h.get_by_role_and_label(Role::Button, "Edit").click();
    h.step();
    h.step();
    h.get_by_label("Propose the modiolar axis").click();
    h.step();
    let (Some(b), Some(a)) = axis(&h) else { panic!("no axis proposed: {}", h.state().status) };
    let items = &h.state().doc.as_ref().unwrap().lms.items;
    let dir = ductline::frame::v3::unit(ductline::frame::v3::sub(items[a].p, items[b].p));
    let angle = ductline::frame::v3::dot(dir, truth).clamp(-1.0, 1.0).acos().to_degrees();
    assert!(angle < 8.0, "proposed axis {angle:.1}° off the sample's: {}", h.state().status);
    wait(&mut h, "the refit", |a| !a.fitting());
    assert!(h.state().doc.as_ref().unwrap().fitted.is_ok(), "the proposed axis fits");
    h.state_mut().apply(Cmd::Undo);
    assert_eq!(axis(&h), (None, None), "one undo takes the proposal back");
}

/// The radial cut keeps one scale while stepping round the spiral: the same rectangle (size and
/// pixel pitch) at every angle.
#[test]
fn radial_cut_keeps_its_scale() {
    let mut h = harness(Some(sample_path()));
    wait(&mut h, "the sample", |a| a.doc.is_some());
    h.get_by_label("Radial cut").click();
    h.step();
    let app = h.state_mut();
    let doc = app.doc.as_ref().unwrap();
    let view = app.view.as_mut().unwrap();
    let mut seen = vec![];
    for a in [0.0, 37.0, 90.0, 135.0, 200.0, 290.0] {
        view.angle_deg = a;
        let m = view.plane_map(doc).unwrap();
        seen.push((m.nu, m.nv, ductline::frame::v3::norm(m.du)));
    }
    assert!(seen.windows(2).all(|w| w[0].0 == w[1].0 && w[0].1 == w[1].1 && (w[0].2 - w[1].2).abs() < 1e-12), "{seen:?}");
}

/// The status line is coloured by what it says: errors red, warnings and stops amber, the rest
/// plain (so a failure is not read as a note).
#[test]
fn status_line_colours() {
    use super::{palette, status_colour};
    let plain = egui::Color32::GRAY;
    assert_eq!(status_colour("error: /tmp/x.tif: not a readable TIFF", plain), palette::FLAG);
    assert_eq!(status_colour("measure stopped: cancelled", plain), palette::WARN);
    assert_eq!(status_colour("warning: no slice spacing", plain), palette::WARN);
    assert_eq!(status_colour("wrote /tmp/table.csv", plain), plain);
}

/// Benchmark, not a check (timings on a shared machine are no test): run by hand with
/// `cargo test --release --bin ductline frame_time -- --ignored --nocapture`. Prints the CPU time
/// of one app frame (layout and tessellation; rasterising excluded, as kittest does not paint)
/// with a 2048² slice and 200 landmarks on it, steady and when the slice changes (a new
/// texture), and on the bundled sample the refit after a landmark drag and the background
/// measure that updates the profile.
#[test]
#[ignore]
fn frame_time() {
    use std::time::Instant;
    let dir = tempfile::tempdir().unwrap();
    let n = 2048;
    let data: Vec<u16> = (0..n * n * 3).map(|i| ((i % n) * 7 + (i / n % n) * 13) as u16).collect();
    let vox = ductline::stack::VoxelSize::from_user_um(&[20.0]).unwrap();
    let st = ductline::stack::Stack::from_samples([n, n, 3], ductline::stack::Samples::U16(data.into()), Some(vox)).unwrap();
    let tif = dir.path().join("big.tif");
    ductline::stack::write::write_tiff(&st, &tif, ductline::stack::write::Packing::None, false).unwrap();
    // 200 landmarks on the middle slice, on a spiral
    let mut csv = String::from("kind,x_mm,y_mm,z_mm\n");
    for k in 0..200 {
        let t = k as f64 * 0.1;
        let r = 15.0 - 0.05 * k as f64;
        csv += &format!("{},{:.4},{:.4},0.02\n", if k % 2 == 0 { "lamina" } else { "ligament" }, 20.48 + r * t.cos(), 20.48 + r * t.sin());
    }
    let lm = dir.path().join("lm.csv");
    std::fs::write(&lm, csv).unwrap();
    let mut h = harness_with(Some(tif), tempfile::tempdir().unwrap().keep(), egui::vec2(1600.0, 1000.0));
    wait(&mut h, "the stack", |a| a.doc.is_some());
    h.state_mut().apply(Cmd::ImportLandmarks(lm, false));
    for _ in 0..5 {
        h.step();
    }
    let time = |h: &mut Harness<'static, DuctApp>, frames: usize, change: bool| -> f64 {
        let mut ms = vec![];
        for f in 0..frames {
            if change {
                h.state_mut().view.as_mut().unwrap().index[2] = f % 3;
            }
            let t = Instant::now();
            h.step();
            ms.push(t.elapsed().as_secs_f64() * 1000.0);
        }
        ms.sort_by(f64::total_cmp);
        ms[ms.len() / 2]
    };
    let steady = time(&mut h, 30, false);
    let change = time(&mut h, 12, true);
    eprintln!("2048² slice, 200 landmarks: one frame {steady:.1} ms (median of 30), {change:.1} ms when the slice changes (median of 12)");
    // the bundled sample: a drag's refit, then the background measure behind the profile
    let mut h = harness(Some(sample_path()));
    wait(&mut h, "the sample", |a| a.doc.is_some());
    let (i, p) = h.state().doc.as_ref().unwrap().lms.items.iter().enumerate().find(|(_, l)| l.kind == Kind::Lamina).map(|(i, l)| (i, l.p)).unwrap();
    h.state_mut().apply(Cmd::Edit(ductline::landmarks::Edit::Move { index: i, to: [p[0] + 0.01, p[1], p[2]] }));
    let t = Instant::now();
    h.state_mut().doc.as_mut().unwrap().refit();
    let refit = t.elapsed().as_secs_f64() * 1000.0;
    // what the UI thread spends on it after an edit (the fit runs in the background), and when
    // the answer is in
    let t = Instant::now();
    h.state_mut().request_refit();
    let ui = t.elapsed().as_secs_f64() * 1000.0;
    wait(&mut h, "the refit", |a| !a.fitting());
    let answered = t.elapsed().as_secs_f64() * 1000.0;
    eprintln!("bundled sample: after a drag the UI thread spends {ui:.2} ms starting the refit; the fit is in after {answered:.0} ms");
    let t = Instant::now();
    h.state_mut().apply(Cmd::Measure);
    wait(&mut h, "the measure", |a| !a.busy());
    let measure = t.elapsed().as_secs_f64() * 1000.0;
    eprintln!("bundled sample: refit after a drag {refit:.1} ms; measure for the profile {measure:.0} ms (background; includes frames stepped while waiting)");
    // with a measured specimen, a drag: when the profile's preview and then the full profile
    // are in (frames stepped every 2 ms while waiting)
    let (i, p) = h.state().doc.as_ref().unwrap().lms.items.iter().enumerate().find(|(_, l)| l.kind == Kind::Ligament).map(|(i, l)| (i, l.p)).unwrap();
    h.state_mut().apply(Cmd::Edit(ductline::landmarks::Edit::Move { index: i, to: [p[0] + 0.02, p[1], p[2]] }));
    let rows = |a: &DuctApp| a.doc.as_ref().unwrap().outcome.as_ref().unwrap().rows.len();
    let full_rows = rows(h.state());
    let t = Instant::now();
    h.state_mut().request_refit();
    let (mut preview, mut full) = (f64::NAN, f64::NAN);
    while t.elapsed().as_secs() < 20 && full.is_nan() {
        h.step();
        let a = h.state();
        if preview.is_nan() && rows(a) < full_rows {
            preview = t.elapsed().as_secs_f64() * 1000.0;
        }
        if !a.fitting() && a.live.is_none() && !a.doc.as_ref().unwrap().stale {
            full = t.elapsed().as_secs_f64() * 1000.0;
        }
        std::thread::sleep(Duration::from_millis(2));
    }
    eprintln!("bundled sample, measured: after a drag the fit and a preview profile are in after {preview:.0} ms, the full profile after {full:.0} ms");
}

/// The plan map shows the cochlea turned as the slice view does (x right, y down), not mirrored:
/// a click on the map in the direction a lamina point lies from the modiolar axis on the slices
/// (stack x and y; the sample's axis runs near z) shows the radial cut through that point.
#[test]
fn the_plan_map_is_turned_as_the_slices() {
    let mut h = harness(Some(sample_path()));
    wait(&mut h, "the sample", |a| a.doc.is_some());
    let doc = h.state().doc.as_ref().unwrap();
    let frame = doc.fitted.as_ref().unwrap().frame.clone();
    assert!(frame.ez[2].abs() > 0.9, "the sample's axis runs near z: {:?}", frame.ez);
    // a lamina point well off the window's line, where a mirror image would be far off
    let p = doc
        .lms
        .items
        .iter()
        .filter(|l| l.kind == Kind::Lamina)
        .map(|l| l.p)
        .find(|p| (60.0..120.0).contains(&frame.to_cochlear(*p)[1].abs()))
        .expect("a lamina point between 60° and 120° from the window");
    let want = frame.to_cochlear(p)[1];
    let d = ductline::frame::v3::sub(p, frame.origin);
    let n = d[0].hypot(d[1]);
    let map = h.get_by_role_and_label(Role::Image, "Plan map").rect();
    let r = 0.25 * map.width().min(map.height());
    let pos = map.center() + egui::vec2((r as f64 * d[0] / n) as f32, (r as f64 * d[1] / n) as f32);
    h.hover_at(pos);
    h.step();
    click_at(&mut h, pos);
    h.step();
    let got = h.state().view.as_ref().unwrap().angle_deg;
    assert!(ductline::frame::wrap180(got - want).abs() < 15.0, "clicked toward the point at {want:.0}°, the cut went to {got:.0}°");
}

/// After an edit the centreline is refitted off the UI thread: the request returns with the old
/// fit still in place, the answer arrives a few frames later and equals a fit made on the spot;
/// an answer to a request overtaken by a later one is dropped.
#[test]
fn the_refit_runs_in_the_background() {
    let mut h = harness(Some(sample_path()));
    wait(&mut h, "the sample", |a| a.doc.is_some());
    let len = |h: &Harness<'static, DuctApp>| h.state().doc.as_ref().unwrap().fitted.as_ref().unwrap().length;
    let before = len(&h);
    let (i, p) = h.state().doc.as_ref().unwrap().lms.items.iter().enumerate().find(|(_, l)| l.kind == Kind::Lamina).map(|(i, l)| (i, l.p)).unwrap();
    h.state_mut().apply(Cmd::Edit(ductline::landmarks::Edit::Move { index: i, to: [p[0] + 0.2, p[1] + 0.2, p[2]] }));
    h.state_mut().request_refit();
    assert!(h.state().fitting());
    assert_eq!(len(&h), before, "the request leaves the fit in place until the answer");
    wait(&mut h, "the refit", |a| !a.fitting());
    let doc = h.state().doc.as_ref().unwrap();
    let here = ductline::pipeline::fit(&doc.lms.items, &doc.fit, doc.voxel_mm()).unwrap();
    assert!(len(&h) != before && (len(&h) - here.length).abs() < 1e-12, "{} vs {} (before {before})", len(&h), here.length);
    // an overtaken request: its answer is not taken
    h.state_mut().request_refit();
    let stale = h.state().doc.as_ref().unwrap().fit_gen;
    h.state_mut().apply(Cmd::Undo);
    h.state_mut().doc.as_mut().unwrap().refit();
    assert!(h.state().doc.as_ref().unwrap().fit_gen > stale);
    wait(&mut h, "the overtaken refit", |a| !a.fitting());
    assert!((len(&h) - before).abs() < 1e-12, "the fit of the undone state stands: {} vs {before}", len(&h));
}

/// After an edit of a measured specimen the profile follows by itself, off the UI thread: a
/// preview at a coarse step, then every section; the result is the one an explicit measure of
/// the edited landmarks gives, and an edit made meanwhile wins over an older answer.
#[test]
fn the_profile_follows_a_drag() {
    let mut h = harness(Some(sample_path()));
    wait(&mut h, "the sample", |a| a.doc.is_some());
    h.state_mut().apply(Cmd::Measure);
    wait(&mut h, "the measure", |a| !a.busy());
    let outcome = |h: &Harness<'static, DuctApp>| h.state().doc.as_ref().unwrap().outcome.clone().unwrap();
    let before = outcome(&h);
    let (i, p) = h.state().doc.as_ref().unwrap().lms.items.iter().enumerate().find(|(_, l)| l.kind == Kind::Ligament).map(|(i, l)| (i, l.p)).unwrap();
    h.state_mut().apply(Cmd::Edit(ductline::landmarks::Edit::Move { index: i, to: [p[0] + 0.15, p[1] + 0.1, p[2]] }));
    h.state_mut().request_refit();
    wait(&mut h, "the live profile", |a| !a.fitting() && a.live.is_none() && !a.doc.as_ref().unwrap().stale);
    let after = outcome(&h);
    assert!(after.rows.len().abs_diff(before.rows.len()) <= 2, "{} rows vs {}", after.rows.len(), before.rows.len());
    assert!(after.rows.iter().zip(&before.rows).any(|(a, b)| a.sv.area != b.sv.area), "the profile follows the edit");
    // the same as measuring the edited landmarks explicitly
    let doc = h.state().doc.as_ref().unwrap();
    let gw = ductline::cochlea::Greenwood::preset(&doc.species).unwrap();
    let direct = ductline::pipeline::run(&doc.stack, &doc.lms.items, &doc.fit, &doc.measure, &doc.overrides, &gw, &Default::default()).unwrap();
    assert_eq!(direct.rows.len(), after.rows.len());
    for (a, b) in direct.rows.iter().zip(&after.rows) {
        assert!(a.s_mm == b.s_mm && a.sv.area == b.sv.area && a.st.area == b.st.area, "at s {} mm: {:?} vs {:?}", a.s_mm, a.sv.area, b.sv.area);
    }
    // an answer overtaken by an undo is dropped: the profile ends at the undone landmarks
    h.state_mut().request_refit();
    h.state_mut().apply(Cmd::Undo);
    h.state_mut().request_refit();
    wait(&mut h, "the live profile after the undo", |a| !a.fitting() && a.live.is_none() && !a.doc.as_ref().unwrap().stale);
    let undone = outcome(&h);
    assert_eq!(undone.rows.len(), before.rows.len());
    assert!(undone.rows.iter().zip(&before.rows).all(|(a, b)| a.s_mm == b.s_mm && a.sv.area == b.sv.area && a.st.area == b.st.area));
}

/// The layout from the smallest supported window up: at 1100×700 and 1600×1000, with a
/// measured sample and a section selected, the main controls (Fit & measure, the view's plane
/// switches, the profile's axis switch, the inspector's section stepper, the plan map) lie
/// inside the window and none overlaps another; the frame, rendered by wgpu on a software
/// adapter (no GPU), matches the reviewed snapshot in tests/snapshots/ (egui_kittest's default
/// per-pixel colour threshold, a few pixels of slack). After a deliberate layout change, look at
/// the new images and accept them with `UPDATE_SNAPSHOTS=1 cargo test`.
#[test]
fn the_layout_holds_at_both_window_sizes() {
    for (w, hgt) in [(1100.0, 700.0), (1600.0, 1000.0)] {
        let mut app = DuctApp::new(Some(sample_path()), None);
        app.autosave_dir = tempfile::tempdir().unwrap().keep();
        app.native_dialogs = false;
        let mut h = Harness::builder().with_size(egui::vec2(w, hgt)).wgpu().build_ui_state(|ui, app: &mut DuctApp| app.frame_ui(ui), app);
        wait(&mut h, "the sample", |a| a.doc.is_some());
        h.get_by_role_and_label(Role::Button, "Fit & measure").click();
        h.step();
        wait(&mut h, "the measurement", |a| a.doc.as_ref().is_some_and(|d| d.outcome.is_some()));
        h.get_by_role_and_label(Role::Button, ">").click();
        h.step();
        h.step();
        let window = egui::Rect::from_min_size(egui::Pos2::ZERO, egui::vec2(w, hgt));
        let rects: Vec<(&str, egui::Rect)> = [
            ("Fit & measure", h.get_by_role_and_label(Role::Button, "Fit & measure").rect()),
            ("Slices (xy)", h.get_by_label("Slices (xy)").rect()),
            ("Radial cut", h.get_by_label("Radial cut").rect()),
            ("Fit view", h.get_by_label("Fit view").rect()),
            ("distance (mm)", h.get_by_label("distance (mm)").rect()),
            ("Duct profile", h.get_by_label("Duct profile").rect()),
            ("Plan map", h.get_all_by_label("Plan map").next().unwrap().rect()),
            ("section stepper", h.get_by_role_and_label(Role::Button, ">").rect()),
        ]
        .into();
        for (name, r) in &rects {
            assert!(window.contains_rect(*r), "{w}×{hgt}: {name} at {r:?} is outside the window");
        }
        for (i, (a, ra)) in rects.iter().enumerate() {
            for (b, rb) in &rects[i + 1..] {
                assert!(!ra.intersects(*rb), "{w}×{hgt}: {a} {ra:?} overlaps {b} {rb:?}");
            }
        }
        if let Err(e) = h.try_snapshot_options(format!("layout_{w}x{hgt}"), &egui_kittest::SnapshotOptions::new().max_failed_pixels(20)) {
            panic!("{w}×{hgt}: {e}");
        }
    }
}

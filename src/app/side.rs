//! The side panel: the specimen, window/level, the landmark kinds and list, fit and measure
//! settings, and the run button with its progress.

use super::doc::Doc;
use super::tracing::View;
use super::{Cmd, palette};
use ductline::cochlea::SPECIES;
use ductline::landmarks::Kind;

/// State of the panel itself.
pub struct Side {
    pub sort_by_angle: bool,
    pub voxel_text: String,
    /// Accept proposals up to this angle (degrees); None: the last pending one's.
    pub accept_up_to: Option<f64>,
}

impl Default for Side {
    fn default() -> Self {
        Side { sort_by_angle: true, voxel_text: String::new(), accept_up_to: None }
    }
}

impl Side {
    pub fn side_ui(&mut self, ui: &mut egui::Ui, doc: &mut Doc, view: &mut View) -> Vec<Cmd> {
        let mut cmds = vec![];
        // (the panel itself scrolls: the app wraps it in a scroll area)
        ui.heading("Specimen");
        let st = &doc.stack;
        ui.label(doc.stack_path.file_name().map(|n| n.to_string_lossy().to_string()).unwrap_or_default()).on_hover_text(doc.stack_path.display().to_string());
        ui.label(format!("{} × {} × {} voxels, {}", st.dims[0], st.dims[1], st.dims[2], st.samples.type_name()));
        let how = if st.samples.is_mapped() { "memory-mapped" } else { "in memory" };
        ui.label(format!("{:.1} MB {how}, values {:.0} … {:.0}", st.bytes() as f64 / 1e6, doc.range.0, doc.range.1));
        if doc.overview.is_some() {
            ui.small("zoomed-out views use a block-averaged overview");
        }
        match &st.voxel {
            Some(v) => {
                ui.label(format!("voxel {}", v.describe()));
            }
            None => {
                ui.colored_label(palette::FLAG, "The file gives no voxel size.");
                ui.horizontal(|ui| {
                    let l = ui.label("voxel (µm)");
                    ui.add(egui::TextEdit::singleline(&mut self.voxel_text).desired_width(90.0).hint_text("e.g. 20 or 20,20,25"))
                        .labelled_by(l.id)
                        .on_hover_text("One value for cubic voxels, or X,Y,Z");
                    if ui.button("Set").on_hover_text("Use this voxel size").clicked() {
                        let vals: Result<Vec<f64>, _> = self.voxel_text.split(',').map(|s| s.trim().parse::<f64>()).collect();
                        cmds.push(match vals {
                            Ok(v) => Cmd::SetVoxel(v),
                            Err(_) => Cmd::Status(format!("'{}' is not a voxel size in µm", self.voxel_text)),
                        });
                    }
                });
            }
        }
        ui.separator();
        ui.strong("Window / level");
        let span = (doc.range.1 - doc.range.0).max(1.0);
        let mut level = 0.5 * (doc.window[0] + doc.window[1]);
        let mut width = doc.window[1] - doc.window[0];
        ui.horizontal(|ui| {
            let l = ui.label("level");
            let a = ui.add(egui::DragValue::new(&mut level).speed(span / 500.0)).labelled_by(l.id).on_hover_text("Grey value shown as mid grey");
            let l = ui.label("window");
            let b = ui
                .add(egui::DragValue::new(&mut width).speed(span / 500.0).range(1e-6..=f64::MAX))
                .labelled_by(l.id)
                .on_hover_text("Range of grey values from black to white");
            if a.changed() || b.changed() {
                doc.window = [level - 0.5 * width, level + 0.5 * width];
            }
            if ui.button("Auto").on_hover_text("From the 0.5 and 99.5 percentiles of the stack").clicked() {
                doc.window = super::doc::auto_window(&doc.stack);
            }
        });
        ui.separator();
        ui.strong("Place");
        for (k, key) in Kind::ALL.iter().zip(["1", "2", "3", "4", "5"]) {
            ui.horizontal(|ui| {
                let (r, p) = ui.allocate_painter(egui::vec2(16.0, 16.0), egui::Sense::hover());
                super::tracing::mark(&p, r.rect.center(), *k, 1.0, false, false);
                ui.radio_value(&mut view.active, *k, k.as_str()).on_hover_text(format!("{} (key {key})", describe(*k)));
            });
        }
        ui.checkbox(&mut view.snap, "snap to edges").on_hover_text(
            "A lamina or ligament click within two voxels of the lamina tip or the ligament edge (read in the radial cut through the click) lands on it; needs a fit",
        );
        ui.checkbox(&mut view.alternate, "alternate lamina / ligament")
            .on_hover_text("After placing a lamina point the next click places a ligament point, and back");
        ui.separator();
        cmds.extend(self.proposals_ui(ui, doc));
        self.landmarks_ui(ui, doc, view);
        ui.separator();
        ui.strong("Fit");
        let mut auto = doc.fit.smoothing.is_none();
        if ui.checkbox(&mut auto, "smoothing by cross-validation").on_hover_text("Generalized cross-validation picks the smoothing of each curve").changed() {
            doc.fit.smoothing = if auto { None } else { Some(1e-3) };
            cmds.push(Cmd::Refit);
        }
        if let Some(l) = doc.fit.smoothing {
            let mut lg = l.log10();
            let lab = ui.label("log₁₀ λ");
            if ui.add(egui::Slider::new(&mut lg, -8.0..=3.0)).labelled_by(lab.id).on_hover_text("Larger = smoother curves").changed() {
                doc.fit.smoothing = Some(10f64.powf(lg));
                cmds.push(Cmd::Refit);
            }
        }
        match &doc.fitted {
            Ok(c) => {
                let hand = if c.frame.handed == ductline::frame::Handedness::Left { "left-handed" } else { "right-handed" };
                ui.label(format!("length {:.2} mm, {:.0}° ({:.2} turns, {hand})", c.length, c.depth_deg(), c.depth_deg() / 360.0)).on_hover_text(format!(
                    "Traced from {:.0}° to {:.0}°",
                    c.t0.to_degrees(),
                    c.t1.to_degrees()
                ));
                match c.basal_diameter() {
                    Ok(a) => {
                        let e = ductline::cochlea::LengthEstimates::new(a, c.depth_deg());
                        ui.label(format!("basal diameter A {:.2} mm", e.basal_diameter_mm))
                            .on_hover_text("Round window through the axis to the far lateral wall, on the fitted ligament curve");
                        ui.label(format!(
                            "Escudé 2006 to {:.0}°: {:.1} mm · Alexiades 2015 (full): {:.1} / {:.1} mm",
                            c.depth_deg(),
                            e.escude_lw_mm,
                            e.alexiades_oc_mm,
                            e.alexiades_lw_mm
                        ))
                        .on_hover_text("Published length estimates from A: Escudé's to the traced depth (lateral wall), Alexiades' for the whole cochlea (organ of Corti / lateral wall)");
                    }
                    Err(why) => {
                        ui.label(format!("basal diameter A not given: {why}"));
                    }
                }
                // (the fit may answer for the landmarks of a moment ago while a refit runs)
                for (i, t, r) in c.flagged() {
                    let Some(l) = doc.lms.items.get(i) else { continue };
                    ui.colored_label(
                        palette::OUTLIER,
                        format!("#{} ({}) at {:.0}° lies {r:.3} mm from the fit (ringed)", i + 1, l.kind.as_str(), t.to_degrees()),
                    );
                }
                for (i, t, alt) in &c.ambiguous {
                    let Some(l) = doc.lms.items.get(*i) else { continue };
                    ui.colored_label(
                        palette::FLAG,
                        format!("#{} ({}) at {:.0}° could belong to the turn at {:.0}°", i + 1, l.kind.as_str(), t.to_degrees(), alt.to_degrees()),
                    );
                }
            }
            Err(e) if !e.is_empty() => {
                ui.colored_label(palette::FLAG, e);
            }
            Err(_) => {}
        }
        ui.separator();
        ui.strong("Measure");
        ui.horizontal(|ui| {
            let l = ui.label("step");
            if ui
                .add(egui::DragValue::new(&mut doc.measure.step_mm).speed(0.01).range(0.01..=2.0).suffix(" mm"))
                .labelled_by(l.id)
                .on_hover_text("Distance between sections along the centreline")
                .changed()
            {
                doc.stale = true;
                doc.dirty = true;
            }
        });
        if ui
            .checkbox(&mut doc.measure.bare_shelf, "bare shelf (no limbus)")
            .on_hover_text(
                "Scala vestibuli's side of the bony shelf carries no spiral limbus: the shelf counts as bone from both sides. \
                 Leave off for real cochleae, which have one",
            )
            .changed()
        {
            doc.stale = true;
            doc.dirty = true;
        }
        egui::ComboBox::from_label("species").selected_text(doc.species.clone()).show_ui(ui, |ui| {
            for s in SPECIES {
                if ui.selectable_value(&mut doc.species, s.to_string(), s).changed() {
                    doc.stale = true;
                    doc.dirty = true;
                }
            }
        });
        ui.separator();
        ui.small(ductline::CAUTION);
        cmds
    }

    /// The run controls, pinned under the specimen panel so that they show at any window
    /// height: Fit & measure, or the running work's progress and Cancel; a note when the
    /// results are older than the landmarks or settings.
    pub(super) fn run_ui(&mut self, ui: &mut egui::Ui, doc: &Doc, running: Option<(String, f32)>) -> Vec<Cmd> {
        let mut cmds = vec![];
        match running {
            Some((label, f)) => {
                ui.add(egui::ProgressBar::new(f).text(format!("{label} {:.0}%", f * 100.0)));
                if ui.button("Cancel").on_hover_text("Stop the running work").clicked() {
                    cmds.push(Cmd::Cancel);
                }
            }
            None => {
                let ok = doc.fitted.is_ok() && doc.stack.voxel.is_some();
                if ui
                    .add_enabled(ok, egui::Button::new("Fit & measure"))
                    .on_hover_text("Measure every section along the fitted centreline (in the background)")
                    .clicked()
                {
                    cmds.push(Cmd::Measure);
                }
                if doc.outcome.is_some() && doc.stale {
                    ui.colored_label(palette::WARN, "results are older than the landmarks or settings");
                }
            }
        }
        cmds
    }

    /// The last trace's proposals awaiting review: how many, how far, how sure; accept all, up
    /// to an angle, or drop them (one click on a proposal in the view accepts that one).
    fn proposals_ui(&mut self, ui: &mut egui::Ui, doc: &Doc) -> Vec<Cmd> {
        let pending = doc.pending();
        let mut cmds = vec![];
        if pending.is_empty() {
            return cmds;
        }
        let (lo, hi) = pending.iter().fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), (_, p)| (a.min(p.angle_deg), b.max(p.angle_deg)));
        let low = pending.iter().filter(|(_, p)| p.confidence < 0.5).count();
        ui.strong(format!("Proposed landmarks ({})", pending.len()));
        ui.label(format!("{lo:.0}° – {hi:.0}°, {low} below confidence 0.5"));
        ui.small("Drawn as open rings until accepted, fainter where less sure (amber: below 0.5). Click one in the view to accept it.");
        let mut up_to = self.accept_up_to.unwrap_or(hi).clamp(lo, hi);
        ui.horizontal(|ui| {
            let l = ui.label("up to");
            ui.add(egui::DragValue::new(&mut up_to).range(lo..=hi).speed(1.0).fixed_decimals(0).suffix("°"))
                .labelled_by(l.id)
                .on_hover_text("Angle along the spiral up to which to accept");
            if ui.button(format!("Accept up to {up_to:.0}°")).on_hover_text("Add the proposals up to this angle as landmarks (one undo step)").clicked() {
                cmds.push(Cmd::AcceptProposals(up_to));
            }
        });
        self.accept_up_to = Some(up_to);
        ui.horizontal(|ui| {
            if ui.button("Accept all").on_hover_text("Add every proposal as a landmark (one undo step)").clicked() {
                cmds.push(Cmd::AcceptProposals(f64::INFINITY));
            }
            if ui.button("Discard proposals").on_hover_text("Drop the proposals not accepted").clicked() {
                cmds.push(Cmd::DiscardProposals);
                self.accept_up_to = None;
            }
        });
        ui.separator();
        cmds
    }

    fn landmarks_ui(&mut self, ui: &mut egui::Ui, doc: &mut Doc, view: &mut View) {
        ui.horizontal(|ui| {
            ui.strong(format!("Landmarks ({})", doc.lms.items.len()));
            ui.checkbox(&mut self.sort_by_angle, "by angle").on_hover_text("Sort the list by angle along the spiral (else by order placed)");
        });
        let frame = doc.fitted.as_ref().ok().map(|c| c.frame.clone());
        let mut order: Vec<(usize, Option<[f64; 3]>)> =
            doc.lms.items.iter().enumerate().map(|(i, l)| (i, frame.as_ref().map(|f| f.to_cochlear(l.p)))).collect();
        let theta: std::collections::HashMap<usize, f64> = match &doc.fitted {
            Ok(c) => c.lamina.residuals.iter().chain(&c.ligament.residuals).map(|r| (r.0, r.1.to_degrees())).collect(),
            Err(_) => Default::default(),
        };
        if self.sort_by_angle {
            order.sort_by(|a, b| theta.get(&a.0).unwrap_or(&f64::NEG_INFINITY).total_cmp(theta.get(&b.0).unwrap_or(&f64::NEG_INFINITY)));
        }
        let flagged: Vec<usize> = doc.fitted.as_ref().map(|c| c.flagged().iter().map(|f| f.0).collect()).unwrap_or_default();
        egui::ScrollArea::vertical().id_salt("lm-list").max_height((0.45 * ui.available_height()).max(180.0)).show(ui, |ui| {
            egui::Grid::new("lm-grid").num_columns(4).striped(true).show(ui, |ui| {
                ui.small("#");
                ui.small("kind");
                ui.small("angle");
                ui.small("r / h (mm)");
                ui.end_row();
                for (i, c) in order {
                    let lm = doc.lms.items[i];
                    let sel = view.selected == Some(i);
                    if ui.selectable_label(sel, format!("{}", i + 1)).on_hover_text("Select and show this landmark").clicked() {
                        view.selected = Some(i);
                        view.go_to(doc, lm.p);
                    }
                    let txt = egui::RichText::new(lm.kind.as_str()).color(palette::kind(lm.kind));
                    ui.label(if flagged.contains(&i) { txt.strikethrough() } else { txt });
                    ui.label(theta.get(&i).map(|t| format!("{:.0}°", if t.abs() < 0.5 { 0.0 } else { *t })).unwrap_or_else(|| "—".into()));
                    ui.label(c.map(|c| format!("{:.2} / {:.2}", c[0], c[2])).unwrap_or_else(|| "—".into()));
                    ui.end_row();
                }
            });
        });
    }
}

fn describe(k: Kind) -> &'static str {
    match k {
        Kind::AxisBase => "A point on the modiolar axis near the base",
        Kind::AxisApex => "A point on the modiolar axis near the apex",
        Kind::Window => "Centre of the round window: the 0° direction",
        Kind::Lamina => "Inner edge of the partition: tip of the bony spiral lamina",
        Kind::Ligament => "Outer edge of the partition, where it meets the lateral wall",
    }
}

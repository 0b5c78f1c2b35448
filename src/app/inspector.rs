//! The section inspector: the resampled normal section with the scalae outlines, the partition
//! line and the values; per-section overrides (exclude, seeds, levels) are set here.

use super::doc::Doc;
use super::{Cmd, palette};
use ductline::measure::Override;
use ductline::section;
use egui::{Color32, Pos2, Rect, Sense, Stroke, pos2, vec2};

#[derive(Default)]
pub struct Inspector {
    tex: Option<(String, egui::TextureHandle)>,
    /// Which seed a click in the image sets.
    pub seed_mode: bool,
}

impl Inspector {
    pub fn inspector_ui(&mut self, ui: &mut egui::Ui, doc: &Doc, sel: Option<usize>) -> Vec<Cmd> {
        let mut cmds = vec![];
        let Some(out) = &doc.outcome else {
            ui.label("Measure first, then click the duct profile to inspect a section.");
            return cmds;
        };
        let Some(i) = sel.filter(|i| *i < out.rows.len()) else {
            ui.label("Click a position in the duct profile to inspect its section.");
            return cmds;
        };
        let (row, g) = (&out.rows[i], &out.geoms[i]);
        ui.horizontal(|ui| {
            if ui.button("<").on_hover_text("Previous section").clicked() && i > 0 {
                cmds.push(Cmd::SelectRow(Some(i - 1)));
            }
            ui.strong(format!("section {} of {}", i + 1, out.rows.len()));
            if ui.button(">").on_hover_text("Next section").clicked() && i + 1 < out.rows.len() {
                cmds.push(Cmd::SelectRow(Some(i + 1)));
            }
        });
        egui::Grid::new("section-values").num_columns(2).striped(true).show(ui, |ui| {
            let f = |x: Option<f64>, u: &str| x.map(|v| format!("{v:.4} {u}")).unwrap_or_else(|| "—".into());
            let bare = |x: Option<f64>| x.map_or("—".into(), |v| format!("{v:.4}"));
            for (k, v) in [
                ("s", f(Some(row.s_mm), "mm")),
                ("angle", f(Some(row.angle_deg), "°")),
                ("frequency", format!("{:.0} Hz", row.cf_hz)),
                ("SV area", f(row.sv.area, "mm²")),
                ("ST area", f(row.st.area, "mm²")),
                (
                    "this section alone, SV / ST",
                    match (row.sv.own_area, row.st.own_area) {
                        (None, None) => "—".into(),
                        (a, b) => format!("{} / {} mm²", bare(a), bare(b)),
                    },
                ),
                ("partition width", f(row.partition_width_mm, "mm")),
                ("wall", f(row.wall_mm, "mm")),
                ("levels lumen / soft tissue / bone", {
                    let l = row.levels;
                    if [l.lumen, l.tissue, l.bone].iter().all(|x| x.is_finite()) {
                        format!("{:.0} / {:.0} / {:.0}", l.lumen, l.tissue, l.bone)
                    } else {
                        "—".into()
                    }
                }),
                ("flags", if row.flags.is_empty() { "sound".into() } else { row.flag_words() }),
            ] {
                ui.label(k);
                ui.label(v);
                ui.end_row();
            }
        });
        let ov = doc.overrides.iter().find(|o| (o.s_mm - row.s_mm).abs() < 1e-6).cloned().unwrap_or(Override { s_mm: row.s_mm, ..Default::default() });
        ui.horizontal(|ui| {
            let mut ex = ov.exclude;
            if ui.checkbox(&mut ex, "exclude").on_hover_text("Leave this section out of the table (its values become blank, flagged 'excluded')").changed() {
                cmds.push(Cmd::SetOverride(Override { exclude: ex, ..ov.clone() }));
            }
            ui.toggle_value(&mut self.seed_mode, "place seeds")
                .on_hover_text("Click in the section: above the partition line sets the SV seed, below sets the ST seed");
            if ui.button("clear overrides").on_hover_text("Forget this section's overrides").clicked() {
                cmds.push(Cmd::ClearOverride(row.s_mm));
            }
        });
        ui.horizontal(|ui| {
            let mut fixed = ov.levels.is_some();
            // a section measured without levels (excluded, or too little contrast) starts from
            // the stack's value range
            let found = [row.levels.lumen, row.levels.bone];
            let start = if found.iter().all(|x| x.is_finite()) { found } else { [doc.range.0, doc.range.1] };
            let mut lv = ov.levels.unwrap_or(start);
            let c = ui.checkbox(&mut fixed, "fixed levels").on_hover_text("Use these fluid and bone grey levels for this section instead of finding them");
            let l = ui.label("fluid");
            let a = ui.add_enabled(fixed, egui::DragValue::new(&mut lv[0]).speed(10.0)).labelled_by(l.id).on_hover_text("Grey level of fluid in this section");
            let l = ui.label("bone");
            let b = ui.add_enabled(fixed, egui::DragValue::new(&mut lv[1]).speed(10.0)).labelled_by(l.id).on_hover_text("Grey level of bone in this section");
            let new = fixed.then_some(lv);
            if (c.changed() || a.changed() || b.changed()) && new != ov.levels && lv.iter().all(|x| x.is_finite()) {
                cmds.push(Cmd::SetOverride(Override { levels: new, ..ov.clone() }));
            }
        });
        // the section image
        let key = format!("{}:{:.6}:{:.6}", i, row.s_mm, row.half_mm);
        if row.half_mm > 0.0 && self.tex.as_ref().map(|t| &t.0) != Some(&key) {
            let grid = section::section_grid(g, row.half_mm, row.pitch_mm);
            let vals = section::resample(&doc.stack, &grid);
            let lv = row.levels;
            let span = (lv.bone - lv.lumen).abs().max(1.0);
            let img = super::tracing::to_image([grid.nu, grid.nv], &vals, [lv.lumen - 0.25 * span, lv.bone + 0.25 * span]);
            self.tex = Some((key, ui.ctx().load_texture("section", img, egui::TextureOptions::LINEAR)));
        }
        let side = ui.available_width().min(ui.available_height()).max(100.0);
        let (rect, resp) = ui.allocate_exact_size(vec2(side, side), Sense::click());
        resp.widget_info(|| egui::WidgetInfo::labeled(egui::Role::Image, true, "Section image"));
        let painter = ui.painter_at(rect);
        painter.rect_filled(rect, 0.0, palette::VIEW_BG);
        let Some((_, tex)) = &self.tex else { return cmds };
        // image rows go with +v (apex side) downward in the grid: flip so the apex side is up
        painter.image(tex.id(), rect, Rect::from_min_max(pos2(0.0, 1.0), pos2(1.0, 0.0)), Color32::WHITE);
        let h = row.half_mm as f32;
        let to_screen = |q: [f64; 2]| pos2(rect.center().x + q[0] as f32 / h * 0.5 * rect.width(), rect.center().y - q[1] as f32 / h * 0.5 * rect.height());
        let from_screen =
            |p: Pos2| [((p.x - rect.center().x) / (0.5 * rect.width()) * h) as f64, (-(p.y - rect.center().y) / (0.5 * rect.height()) * h) as f64];
        for (sc, col) in [(&row.sv, palette::SERIES[0]), (&row.st, palette::SERIES[1])] {
            if !sc.outline.is_empty() {
                let mut pts: Vec<Pos2> = sc.outline.iter().map(|q| to_screen(*q)).collect();
                pts.push(pts[0]);
                painter.add(egui::Shape::line(pts, Stroke::new(1.5, col)));
            }
            if let Some(s) = sc.seed {
                painter.circle_filled(to_screen(s), 3.5, col);
            }
        }
        let (a, b) = (row.lamina_uv, row.ligament_uv);
        let d = [b[0] - a[0], b[1] - a[1]];
        let far = |t: f64| [a[0] + t * d[0], a[1] + t * d[1]];
        painter.line_segment([to_screen(far(-3.0)), to_screen(far(4.0))], Stroke::new(0.8, Color32::from_white_alpha(90)));
        painter.line_segment([to_screen(a), to_screen(b)], Stroke::new(2.0, palette::CENTRE));
        painter.circle_filled(to_screen(a), 4.0, palette::LAMINA);
        painter.circle_filled(to_screen(b), 4.0, palette::LIGAMENT);
        if self.seed_mode
            && resp.clicked()
            && let Some(p) = resp.interact_pointer_pos()
        {
            let q = from_screen(p);
            let above = (q[0] - a[0]) * (-d[1]) + (q[1] - a[1]) * d[0];
            let above = if d[0] >= 0.0 { above > 0.0 } else { above < 0.0 };
            let o = if above { Override { seed_sv: Some(q), ..ov } } else { Override { seed_st: Some(q), ..ov } };
            cmds.push(Cmd::SetOverride(o));
        }
        resp.on_hover_text("Normal section: apex side up, partition line in yellow-green, SV and ST outlines");
        cmds
    }
}

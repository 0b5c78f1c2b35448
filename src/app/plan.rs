//! The plan map: landmarks and fitted curves seen along the modiolar axis (apex toward the
//! viewer), with angle ticks and the current radial cut; a click picks the angle.

use super::doc::Doc;
use super::{Cmd, palette};
use ductline::landmarks::Kind;
use egui::{Align2, Color32, FontId, Pos2, Sense, Stroke, pos2, vec2};

pub fn plan_ui(ui: &mut egui::Ui, doc: &Doc, angle_deg: f64) -> Vec<Cmd> {
    let mut cmds = vec![];
    let side = ui.available_width().min(ui.available_height()).max(120.0);
    let (rect, resp) = ui.allocate_exact_size(vec2(ui.available_width(), side), Sense::click());
    resp.widget_info(|| egui::WidgetInfo::labeled(egui::Role::Image, true, "Plan map"));
    let painter = ui.painter_at(rect);
    painter.rect_filled(rect, 4.0, palette::PANEL_BG);
    let frame = match &doc.fitted {
        Ok(c) => Some(c.frame.clone()),
        Err(_) => ductline::landmarks::frame_from(&doc.lms.items).ok(),
    };
    let Some(frame) = frame else {
        painter.text(
            rect.center(),
            Align2::CENTER_CENTER,
            "place axis_base, axis_apex and window\nto see the plan map",
            FontId::proportional(12.0),
            Color32::GRAY,
        );
        return cmds;
    };
    // scale: the largest radius of any partition landmark
    let polar: Vec<(Kind, [f64; 3])> =
        doc.lms.items.iter().filter(|l| matches!(l.kind, Kind::Lamina | Kind::Ligament | Kind::Window)).map(|l| (l.kind, frame.to_cochlear(l.p))).collect();
    let rmax = polar.iter().map(|p| p.1[0]).fold(1.0, f64::max) * 1.12;
    let c = rect.center();
    let k = (0.5 * rect.width().min(rect.height()) - 14.0) as f64 / rmax;
    // angle grows counter-clockwise on screen: x right, y up
    let at = |r: f64, a_deg: f64| -> Pos2 {
        let t = a_deg.to_radians();
        pos2(c.x + (r * t.cos() * k) as f32, c.y - (r * t.sin() * k) as f32)
    };
    for tick in (0..360).step_by(30) {
        let major = tick % 90 == 0;
        let stroke = Stroke::new(if major { 1.0 } else { 0.5 }, Color32::from_gray(if major { 110 } else { 70 }));
        painter.line_segment([at(0.0, tick as f64), at(rmax, tick as f64)], stroke);
        if major {
            painter.text(at(rmax * 1.0, tick as f64), Align2::CENTER_CENTER, format!("{tick}°"), FontId::proportional(11.0), Color32::from_gray(170));
        }
    }
    for ring in 1..=((rmax as i32).max(1)) {
        painter.circle_stroke(c, (ring as f64 * k) as f32, Stroke::new(0.5, Color32::from_gray(60)));
    }
    if let Ok(cl) = &doc.fitted {
        let n = ((cl.t1 - cl.t0).to_degrees() * 2.0) as usize;
        for (kind, col) in [(Some(Kind::Lamina), palette::LAMINA), (Some(Kind::Ligament), palette::LIGAMENT), (None, palette::CENTRE)] {
            let pts: Vec<Pos2> = (0..=n)
                .map(|i| {
                    let t = cl.t0 + (cl.t1 - cl.t0) * i as f64 / n as f64;
                    let p = match kind {
                        Some(k) => cl.edge_point(k, t),
                        None => cl.point(t),
                    };
                    let q = frame.to_cochlear(p);
                    at(q[0], q[1])
                })
                .collect();
            painter.add(egui::Shape::line(pts, Stroke::new(1.5, col)));
        }
    }
    for (kind, q) in &polar {
        super::tracing::mark(&painter, at(q[0], q[1]), *kind, 1.0, false, false);
    }
    painter.line_segment([at(0.0, angle_deg), at(rmax, angle_deg)], Stroke::new(2.0, palette::CUT));
    if resp.clicked()
        && let Some(p) = resp.interact_pointer_pos()
    {
        let a = (-(p.y - c.y) as f64).atan2((p.x - c.x) as f64).to_degrees();
        cmds.push(Cmd::GoToAngle(a));
    }
    resp.on_hover_text("Seen along the modiolar axis from the apex. Click an angle to show the radial cut there.");
    // the legend, below the map
    ui.horizontal_wrapped(|ui| {
        for (text, col) in [
            ("lamina fit", palette::LAMINA),
            ("ligament fit", palette::LIGAMENT),
            ("midline (the centreline)", palette::CENTRE),
            ("radial cut shown", palette::CUT),
        ] {
            ui.label(egui::RichText::new(format!("— {text}")).color(col).small());
        }
        ui.label(egui::RichText::new("dots and squares: landmarks · angles from the window, toward the apex").small());
    });
    cmds
}

//! The plan map: landmarks and fitted curves seen along the modiolar axis, turned as the stack's
//! slice view shows them, with angle ticks and the current radial cut; a click picks the angle.

use super::doc::Doc;
use super::{Cmd, palette};
use ductline::frame::v3;
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
    let marks: Vec<(Kind, [f64; 3])> =
        doc.lms.items.iter().filter(|l| matches!(l.kind, Kind::Lamina | Kind::Ligament | Kind::Window)).map(|l| (l.kind, l.p)).collect();
    let rmax = marks.iter().map(|p| frame.to_cochlear(p.1)[0]).fold(1.0, f64::max) * 1.12;
    let c = rect.center();
    let k = (0.5 * rect.width().min(rect.height()) - 14.0) as f64 / rmax;
    // Drawn as the stack's slice view shows the cochlea (x right, y down), projected along the
    // modiolar axis: screen right and down are the two stack axes least along the axis, made
    // square to it, so a left and a right ear look here as they do on the slices.
    let (u, v) = screen_axes(frame.ez);
    let screen = |p: [f64; 3]| -> Pos2 {
        let d = v3::sub(p, frame.origin);
        pos2(c.x + (v3::dot(d, u) * k) as f32, c.y + (v3::dot(d, v) * k) as f32)
    };
    let at = |r: f64, a_deg: f64| -> Pos2 { screen(frame.to_stack(r, a_deg, 0.0)) };
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
                    screen(p)
                })
                .collect();
            painter.add(egui::Shape::line(pts, Stroke::new(1.5, col)));
        }
    }
    for (kind, p) in &marks {
        super::tracing::mark(&painter, screen(*p), *kind, 1.0, false, false);
    }
    painter.line_segment([at(0.0, angle_deg), at(rmax, angle_deg)], Stroke::new(2.0, palette::CUT));
    if resp.clicked()
        && let Some(p) = resp.interact_pointer_pos()
    {
        let (x, y) = ((p.x - c.x) as f64 / k, (p.y - c.y) as f64 / k);
        let a = frame.to_cochlear(v3::axpy(v3::axpy(frame.origin, x, u), y, v))[1];
        cmds.push(Cmd::GoToAngle(a));
    }
    resp.on_hover_text("Seen along the modiolar axis, turned as the slices show it (x right, y down). Click an angle to show the radial cut there.");
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

/// Unit screen axes (right, down) for a view along `axis`: the stack's x and y axes made square
/// to it (Gram–Schmidt), or y and z, or x and z where the axis lies near x or y.
pub fn screen_axes(axis: [f64; 3]) -> ([f64; 3], [f64; 3]) {
    let e = v3::unit(axis);
    let basis = [[1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]];
    // the two stack axes least along the axis, in x, y, z order
    let mut order: Vec<usize> = (0..3).collect();
    order.sort_by(|&a, &b| v3::dot(basis[a], e).abs().total_cmp(&v3::dot(basis[b], e).abs()));
    let (mut i, mut j) = (order[0], order[1]);
    if i > j {
        std::mem::swap(&mut i, &mut j);
    }
    let u = v3::unit(v3::axpy(basis[i], -v3::dot(basis[i], e), e));
    let w = v3::axpy(basis[j], -v3::dot(basis[j], e), e);
    let v = v3::unit(v3::axpy(w, -v3::dot(w, u), u));
    (u, v)
}

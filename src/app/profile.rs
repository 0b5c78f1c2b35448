//! The duct profile: areas, width, wall and curvature radius against distance, angle or frequency,
//! flagged sections marked; a click opens that section in the inspector.

use super::{Cmd, palette};
pub use ductline::figure::XAxis;
use ductline::measure::Row;
use egui_plot::{Line, Plot, PlotPoints, Points};

pub struct ProfileState {
    pub x: XAxis,
    pub show: [bool; 5],
}

impl Default for ProfileState {
    fn default() -> Self {
        ProfileState { x: XAxis::Distance, show: [true, true, true, true, false] }
    }
}

const SERIES: [&str; 5] = ["SV area (mm²)", "ST area (mm²)", "partition width (mm)", "wall (mm)", "curvature radius (mm)"];

fn y_of(r: &Row, k: usize) -> Option<f64> {
    match k {
        0 => r.sv.area,
        1 => r.st.area,
        2 => r.partition_width_mm,
        3 => r.wall_mm,
        _ => Some(r.curvature_radius_mm).filter(|v| v.is_finite()),
    }
}

pub fn profile_ui(ui: &mut egui::Ui, st: &mut ProfileState, rows: &[Row], selected: Option<usize>) -> Vec<Cmd> {
    let mut cmds = vec![];
    ui.horizontal_wrapped(|ui| {
        ui.label("x:");
        ui.selectable_value(&mut st.x, XAxis::Distance, "distance (mm)").on_hover_text("Arc length from the basal end");
        ui.selectable_value(&mut st.x, XAxis::Angle, "angle (°)").on_hover_text("Angle from the round window");
        ui.selectable_value(&mut st.x, XAxis::Frequency, "frequency (log Hz)").on_hover_text("Greenwood characteristic frequency, log scale");
        ui.separator();
        // the curve switches are the legend: each in its curve's colour
        for (k, name) in SERIES.iter().enumerate() {
            ui.checkbox(&mut st.show[k], egui::RichText::new(*name).color(palette::SERIES[k])).on_hover_text("Show or hide this curve");
        }
        ui.label(egui::RichText::new("flagged sections: dots on the x axis").color(palette::FLAG));
    });
    if rows.is_empty() {
        ui.label("No measurements yet: run Fit & measure.");
        return cmds;
    }
    let x = st.x;
    // one plot per unit, stacked, sharing the x axis
    let h = ((ui.available_height() - 8.0) / 2.0).max(90.0);
    for (title, series) in [("area (mm²)", &[0usize, 1][..]), ("length (mm)", &[2usize, 3, 4][..])] {
        let mut plot = Plot::new(("duct-profile", title))
            .height(h)
            .allow_scroll(false)
            .link_axis(egui::Id::unique("profile-x"), [true, false])
            .link_cursor(egui::Id::unique("profile-x"), [true, false])
            .y_axis_label(title);
        plot = match x {
            XAxis::Distance => plot.x_axis_label("distance from base s (mm)"),
            XAxis::Angle => plot.x_axis_label("angle (°)"),
            XAxis::Frequency => plot.x_axis_label("characteristic frequency (Hz)").x_axis_formatter(|m, _| format!("{:.0}", 10f64.powf(m.value))),
        };
        let resp = plot.show(ui, |pui| {
            for &k in series {
                if !st.show[k] {
                    continue;
                }
                // break the line where values are missing
                let mut seg: Vec<[f64; 2]> = vec![];
                for r in rows {
                    match y_of(r, k) {
                        Some(y) => seg.push([x.value(r), y]),
                        None if !seg.is_empty() => {
                            pui.line(Line::new(SERIES[k], PlotPoints::from(std::mem::take(&mut seg))).color(palette::SERIES[k]));
                        }
                        None => {}
                    }
                }
                if !seg.is_empty() {
                    pui.line(Line::new(SERIES[k], PlotPoints::from(seg)).color(palette::SERIES[k]));
                }
            }
            let flagged: Vec<[f64; 2]> = rows.iter().filter(|r| !r.sound()).map(|r| [x.value(r), 0.0]).collect();
            if !flagged.is_empty() {
                pui.points(Points::new("flagged sections", PlotPoints::from(flagged)).color(palette::FLAG).radius(3.0));
            }
            if let Some(r) = selected.and_then(|i| rows.get(i)) {
                pui.vline(egui_plot::VLine::new("selected", x.value(r)).color(palette::CUT));
            }
            pui.pointer_coordinate()
        });
        if resp.response.clicked()
            && let Some(p) = resp.inner
        {
            let best = rows.iter().enumerate().min_by(|a, b| (x.value(a.1) - p.x).abs().total_cmp(&(x.value(b.1) - p.x).abs())).map(|(i, _)| i);
            if let Some(i) = best {
                cmds.push(Cmd::SelectRow(Some(i)));
            }
        }
    }
    cmds
}

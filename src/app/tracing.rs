//! The tracing view: a stack plane (constant i, j or k) or the radial cut through the modiolar
//! axis at an angle, with landmarks and fitted curves drawn where they meet the plane.

use super::doc::Doc;
use super::{Cmd, palette};
use ductline::frame::{v3, v3::V};
use ductline::landmarks::{Edit, Kind, Landmark};
use ductline::section::{self, Grid};
use ductline::stack::Stack;
use egui::{Color32, Pos2, Rect, Sense, Stroke, Vec2, pos2, vec2};

#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Plane {
    /// Constant index along stack axis 0 (i), 1 (j) or 2 (k).
    Slice(usize),
    /// Through the modiolar axis at `View::angle_deg`.
    Radial,
}

/// A plane image: sample (a, b) lies at origin + a·du + b·dv (stack mm).
#[derive(Clone, Debug)]
pub struct PlaneMap {
    pub origin: V,
    pub du: V,
    pub dv: V,
    pub nu: usize,
    pub nv: usize,
}

impl PlaneMap {
    pub fn point(&self, a: f64, b: f64) -> V {
        v3::axpy(v3::axpy(self.origin, a, self.du), b, self.dv)
    }
    /// (a, b, distance from the plane in mm) of a stack point.
    pub fn project(&self, p: V) -> (f64, f64, f64) {
        let d = v3::sub(p, self.origin);
        let n = v3::unit(v3::cross(self.du, self.dv));
        (v3::dot(d, self.du) / v3::dot(self.du, self.du), v3::dot(d, self.dv) / v3::dot(self.dv, self.dv), v3::dot(d, n))
    }
}

/// What the cursor is over, for the status bar.
#[derive(Clone, Debug, Default)]
pub struct Hover {
    pub p: V,
    pub cochlear: Option<[f64; 3]>,
    pub value: f32,
}

pub struct View {
    pub plane: Plane,
    pub index: [usize; 3],
    pub angle_deg: f64,
    pub zoom: f32,
    pub pan: Vec2,
    pub active: Kind,
    pub selected: Option<usize>,
    drag: Option<(usize, V)>,
    pub hover: Option<Hover>,
    cache: Option<(String, PlaneMap, Vec<f32>)>,
    tex: Option<(String, egui::TextureHandle)>,
    /// Wheel travel not yet turned into steps (notches).
    wheel: f32,
    /// A menu or popup was open when this frame began: a click then only closes it.
    pub popup_was_open: bool,
    /// After a lamina point the active kind becomes ligament, and back (one partition, two ends).
    pub alternate: bool,
    /// Where the last frame drew each pending proposal (index, screen position).
    pub drawn_proposals: Vec<(usize, Pos2)>,
    /// Where the last frame drew the fit's predicted lamina and ligament points in the plane
    /// (kind, stack point in the plane, screen position): a click on one places that landmark.
    pub drawn_fit: Vec<(Kind, V, Pos2)>,
    /// A lamina or ligament click within two voxels of the edge the image shows lands on it.
    pub snap: bool,
}

impl View {
    pub fn new(stack: &Stack) -> View {
        View {
            plane: Plane::Slice(2),
            index: stack.dims.map(|n| n / 2),
            angle_deg: 0.0,
            zoom: 1.0,
            pan: Vec2::ZERO,
            active: Kind::Lamina,
            selected: None,
            drag: None,
            hover: None,
            cache: None,
            tex: None,
            wheel: 0.0,
            popup_was_open: false,
            alternate: true,
            drawn_proposals: vec![],
            drawn_fit: vec![],
            snap: true,
        }
    }

    /// The plane geometry for the current view; None for the radial cut before a frame exists.
    pub fn plane_map(&self, doc: &Doc) -> Option<PlaneMap> {
        self.plane_map_on(doc, &doc.stack)
    }

    /// The index of the current stack plane in `st` (the stack itself or its overview).
    fn index_on(&self, doc: &Doc, st: &Stack) -> [usize; 3] {
        let p = doc.stack.to_mm(self.index.map(|x| x as f64));
        let x = st.to_index(p);
        std::array::from_fn(|a| (x[a].round().max(0.0) as usize).min(st.dims[a] - 1))
    }

    /// The plane geometry on the voxel grid of `st` (the stack or its overview).
    fn plane_map_on(&self, doc: &Doc, st: &Stack) -> Option<PlaneMap> {
        let v = st.voxel.as_ref()?.mm;
        let [nx, ny, nz] = st.dims;
        let [i, j, k] = self.index_on(doc, st).map(|x| x as f64);
        Some(match self.plane {
            Plane::Slice(2) => PlaneMap { origin: st.to_mm([0.0, 0.0, k]), du: [v[0], 0.0, 0.0], dv: [0.0, v[1], 0.0], nu: nx, nv: ny },
            Plane::Slice(1) => PlaneMap { origin: st.to_mm([0.0, j, 0.0]), du: [v[0], 0.0, 0.0], dv: [0.0, 0.0, v[2]], nu: nx, nv: nz },
            Plane::Slice(_) => PlaneMap { origin: st.to_mm([i, 0.0, 0.0]), du: [0.0, v[1], 0.0], dv: [0.0, 0.0, v[2]], nu: ny, nv: nz },
            Plane::Radial => {
                let frame = match &doc.fitted {
                    Ok(c) => c.frame.clone(),
                    Err(_) => ductline::landmarks::frame_from(&doc.lms.items).ok()?,
                };
                let (o, er, ez) = frame.radial_plane(self.angle_deg);
                let (lo, hi) = st.bounds_mm().ok()?;
                // the same rectangle at every angle (a fixed scale while stepping round the
                // spiral): the plane through the axis out to the stack corner farthest from it on
                // either side, over the heights the stack's corners span
                let (mut u1, mut w0, mut w1) = (0.0f64, f64::INFINITY, f64::NEG_INFINITY);
                for c in 0..8 {
                    let p = [if c & 1 == 0 { lo[0] } else { hi[0] }, if c & 2 == 0 { lo[1] } else { hi[1] }, if c & 4 == 0 { lo[2] } else { hi[2] }];
                    let d = v3::sub(p, o);
                    let w = v3::dot(d, ez);
                    (u1, w0, w1) = (u1.max(v3::norm(v3::axpy(d, -w, ez))), w0.min(w), w1.max(w));
                }
                let u0 = -u1;
                let pitch = (v[0].min(v[1]).min(v[2])).max((u1 - u0).max(w1 - w0) / 1024.0);
                PlaneMap {
                    origin: v3::axpy(v3::axpy(o, u0, er), w1, ez),
                    du: v3::scale(er, pitch),
                    dv: v3::scale(ez, -pitch),
                    nu: ((u1 - u0) / pitch) as usize + 1,
                    nv: ((w1 - w0) / pitch) as usize + 1,
                }
            }
        })
    }

    fn key(&self, map: &PlaneMap) -> String {
        format!("{:?} {:?} {:.6} {:?}", self.plane, self.index, self.angle_deg, map.origin)
    }

    /// Draws the view and returns the commands it emits.
    pub fn tracing_ui(&mut self, ui: &mut egui::Ui, doc: &Doc) -> Vec<Cmd> {
        let mut cmds = vec![];
        self.toolbar_ui(ui, doc);
        let Some(map) = self.plane_map(doc) else {
            let why = if doc.stack.voxel.is_none() {
                "Enter the voxel size in the specimen panel to view the stack."
            } else {
                "The radial cut needs the frame: place axis_base, axis_apex and window first."
            };
            ui.centered_and_justified(|ui| ui.label(why));
            return cmds;
        };
        let avail = ui.available_size();
        let (rect, resp) = ui.allocate_exact_size(avail, Sense::click_and_drag());
        resp.widget_info(|| egui::WidgetInfo::labeled(egui::Role::Image, true, "Tracing view"));
        let w_mm = map.nu as f32 * v3::norm(map.du) as f32;
        let h_mm = map.nv as f32 * v3::norm(map.dv) as f32;
        let scale = (rect.width() / w_mm).min(rect.height() / h_mm) * self.zoom;
        let img_rect = Rect::from_center_size(rect.center() + self.pan, vec2(w_mm * scale, h_mm * scale));
        // what to sample: the overview when zoomed out, else only the visible part at full resolution
        let (src, src_map) = match (&doc.overview, self.zoom < 2.0) {
            (Some(ov), true) => (ov.clone(), self.plane_map_on(doc, ov).unwrap_or_else(|| map.clone())),
            _ => {
                let frac = |x: f32, lo: f32, w: f32, n: usize| (((x - lo) / w) * n as f32).clamp(0.0, n as f32);
                let a0 = frac(rect.min.x, img_rect.min.x, img_rect.width(), map.nu).floor() as usize;
                let a1 = frac(rect.max.x, img_rect.min.x, img_rect.width(), map.nu).ceil() as usize;
                let b0 = frac(rect.min.y, img_rect.min.y, img_rect.height(), map.nv).floor() as usize;
                let b1 = frac(rect.max.y, img_rect.min.y, img_rect.height(), map.nv).ceil() as usize;
                let sub = PlaneMap {
                    origin: map.point(a0 as f64, b0 as f64),
                    du: map.du,
                    dv: map.dv,
                    nu: a1.saturating_sub(a0).max(1),
                    nv: b1.saturating_sub(b0).max(1),
                };
                (doc.stack.clone(), sub)
            }
        };
        let key = format!("{} {}×{}", self.key(&src_map), src_map.nu, src_map.nv);
        if self.cache.as_ref().map(|c| &c.0) != Some(&key) {
            let vals = match self.plane {
                Plane::Slice(a) => {
                    // where the sampled window starts in the numbering of its own stack's plane
                    let whole = self.plane_map_on(doc, &src).unwrap_or_else(|| src_map.clone());
                    let (u0, v0, _) = whole.project(src_map.origin);
                    let (u0, v0) = (u0.round().max(0.0) as usize, v0.round().max(0.0) as usize);
                    let (nu, nv) = ((u0 + src_map.nu).min(whole.nu), (v0 + src_map.nv).min(whole.nv));
                    let vals = ductline::display::plane_window(&src, a, self.index_on(doc, &src)[a], [u0, nu], [v0, nv]);
                    let m = PlaneMap { nu: nu - u0, nv: nv - v0, ..src_map.clone() };
                    self.cache = Some((key.clone(), m, vals));
                    None
                }
                Plane::Radial => {
                    Some(section::resample(&src, &Grid { origin: src_map.origin, du: src_map.du, dv: src_map.dv, nu: src_map.nu, nv: src_map.nv }))
                }
            };
            if let Some(vals) = vals {
                self.cache = Some((key.clone(), src_map.clone(), vals));
            }
            self.tex = None;
        }
        let tex_key = format!("{key} {:?}", doc.window);
        if self.tex.as_ref().map(|t| &t.0) != Some(&tex_key) {
            let (_, m, vals) = self.cache.as_ref().expect("cache filled above");
            let img = to_image([m.nu, m.nv], vals, doc.window);
            self.tex = Some((tex_key, ui.ctx().load_texture("tracing-plane", img, egui::TextureOptions::NEAREST)));
        }
        let painter = ui.painter_at(rect);
        painter.rect_filled(rect, 0.0, palette::VIEW_BG);
        if let (Some((_, tex)), Some((_, m, _))) = (&self.tex, &self.cache) {
            // the sampled grid's outer edges, placed in the full plane's pixel numbering
            let (a0, b0, _) = map.project(m.point(-0.5, -0.5));
            let (a1, b1, _) = map.project(m.point(m.nu as f64 - 0.5, m.nv as f64 - 0.5));
            let at = |a: f64, b: f64| {
                pos2(
                    img_rect.min.x + ((a + 0.5) / map.nu as f64) as f32 * img_rect.width(),
                    img_rect.min.y + ((b + 0.5) / map.nv as f64) as f32 * img_rect.height(),
                )
            };
            painter.image(tex.id(), Rect::from_two_pos(at(a0, b0), at(a1, b1)), Rect::from_min_max(pos2(0.0, 0.0), pos2(1.0, 1.0)), Color32::WHITE);
        }
        let to_screen = |a: f64, b: f64| {
            pos2(
                img_rect.min.x + ((a + 0.5) / map.nu as f64) as f32 * img_rect.width(),
                img_rect.min.y + ((b + 0.5) / map.nv as f64) as f32 * img_rect.height(),
            )
        };
        let to_stack = |p: Pos2| {
            map.point(
                ((p.x - img_rect.min.x) / img_rect.width()) as f64 * map.nu as f64 - 0.5,
                ((p.y - img_rect.min.y) / img_rect.height()) as f64 * map.nv as f64 - 0.5,
            )
        };
        let vmax = doc.stack.voxel.as_ref().map(|v| v.max()).unwrap_or(1.0);
        // fitted curves where they meet the plane
        self.drawn_fit.clear();
        if let Ok(cl) = &doc.fitted {
            let n = ((cl.t1 - cl.t0).to_degrees() * 4.0) as usize;
            for (kind, color) in [(Some(Kind::Lamina), palette::LAMINA), (Some(Kind::Ligament), palette::LIGAMENT), (None, palette::CENTRE)] {
                let pt = |t: f64| match kind {
                    Some(k) => cl.edge_point(k, t),
                    None => cl.point(t),
                };
                let mut prev = map.project(pt(cl.t0));
                for k in 1..=n {
                    let t = cl.t0 + (cl.t1 - cl.t0) * k as f64 / n as f64;
                    let cur = map.project(pt(t));
                    if cur.2.abs() < 0.5 * vmax || (prev.2 < 0.0) != (cur.2 < 0.0) {
                        let s = to_screen(cur.0, cur.1);
                        painter.circle_filled(s, 2.5, color);
                        if let Some(k) = kind {
                            self.drawn_fit.push((k, map.point(cur.0, cur.1), s));
                        }
                    }
                    prev = cur;
                }
            }
        }
        // landmarks near the plane
        let flagged: Vec<usize> = doc.fitted.as_ref().map(|c| c.flagged().iter().map(|f| f.0).collect()).unwrap_or_default();
        let mut screen_lms = vec![];
        for (i, lm) in doc.lms.items.iter().enumerate() {
            let p = match self.drag {
                Some((d, to)) if d == i => to,
                _ => lm.p,
            };
            let (a, b, d) = map.project(p);
            if d.abs() > 1.5 * vmax {
                continue;
            }
            let s = to_screen(a, b);
            screen_lms.push((i, s));
            let fade = 1.0 - (d.abs() / (1.5 * vmax)) as f32 * 0.6;
            mark(&painter, s, lm.kind, fade, self.selected == Some(i), flagged.contains(&i));
        }
        // proposals awaiting review: open rings, fainter where the tracer is less sure
        self.drawn_proposals.clear();
        for (k, pr) in doc.pending() {
            let (a, b, d) = map.project(pr.lm.p);
            if d.abs() > 1.5 * vmax {
                continue;
            }
            let s = to_screen(a, b);
            self.drawn_proposals.push((k, s));
            let c = palette::kind(pr.lm.kind).gamma_multiply(0.35 + 0.65 * pr.confidence.clamp(0.0, 1.0) as f32);
            painter.circle_stroke(s, 6.0, Stroke::new(1.5, c));
            if pr.confidence < 0.5 {
                painter.circle_stroke(s, 9.0, Stroke::new(1.0, palette::WARN));
            }
        }
        // interaction
        let nearest = |pos: Pos2| nearest_mark(&screen_lms, pos);
        if let Some(pos) = resp.hover_pos() {
            let p = to_stack(pos);
            let value = doc.stack.sample_mm(p);
            // θ unwrapped along the spiral, the convention of the landmark list and the table
            let cochlear = doc.fitted.as_ref().ok().map(|c| {
                let [r, a, h] = c.frame.to_cochlear(p);
                [r, c.unwrap_deg(r, a, h), h]
            });
            self.hover = Some(Hover { p, cochlear, value });
        } else {
            self.hover = None;
        }
        if resp.drag_started_by(egui::PointerButton::Primary)
            && let Some(i) = resp.interact_pointer_pos().and_then(nearest)
        {
            self.selected = Some(i);
            self.drag = Some((i, doc.lms.items[i].p));
        }
        if resp.dragged() {
            match &mut self.drag {
                Some((_, to)) => {
                    if let Some(pos) = resp.interact_pointer_pos() {
                        *to = to_stack(pos);
                    }
                }
                None => self.pan += resp.drag_delta(),
            }
        }
        if resp.drag_stopped()
            && let Some((i, to)) = self.drag.take()
        {
            cmds.push(Cmd::Edit(Edit::Move { index: i, to }));
        }
        if resp.clicked()
            && !self.popup_was_open
            && let Some(pos) = resp.interact_pointer_pos()
        {
            // the fit's predicted points: the one of the active kind nearest the click, if close
            let fit_dot = self
                .drawn_fit
                .iter()
                .filter(|d| d.0 == self.active && d.2.distance(pos) <= 6.0)
                .min_by(|a, b| a.2.distance(pos).total_cmp(&b.2.distance(pos)))
                .map(|d| d.1);
            match (nearest(pos), nearest_mark(&self.drawn_proposals, pos)) {
                (Some(i), _) => self.selected = Some(i),
                (None, Some(k)) => cmds.push(Cmd::AcceptProposal(k)),
                (None, None) => {
                    // on a predicted point: where the fit puts it (then snapped, if an edge is near)
                    let p = self.snapped(doc, fit_dot.unwrap_or_else(|| to_stack(pos)));
                    if doc.stack.contains_mm(p) {
                        cmds.push(Cmd::Edit(Edit::Insert { index: doc.lms.items.len(), lm: Landmark { kind: self.active, p } }));
                        if self.alternate {
                            self.active = match self.active {
                                Kind::Lamina => Kind::Ligament,
                                Kind::Ligament => Kind::Lamina,
                                k => k,
                            };
                        }
                    }
                }
            }
        }
        if resp.secondary_clicked()
            && let Some(i) = resp.interact_pointer_pos().and_then(nearest)
        {
            cmds.push(Cmd::Edit(Edit::Delete { index: i }));
            self.selected = None;
        }
        if resp.hovered() {
            let (notches, zoom) = ui.input(|i| (wheel_notches(&i.events), i.zoom_delta()));
            if zoom != 1.0 {
                // about the cursor: the point under it stays put
                let old = self.zoom;
                self.zoom = (self.zoom * zoom).clamp(0.2, 40.0);
                if let Some(c) = resp.hover_pos() {
                    let d = c - rect.center();
                    self.pan = d - (d - self.pan) * (self.zoom / old);
                }
            } else {
                // one notch, one step: the raw wheel events, not the smoothed scroll (which
                // spreads one notch over several frames)
                self.wheel += notches;
                while self.wheel.abs() >= 1.0 {
                    let dir = self.wheel.signum();
                    self.step(dir as i32, doc);
                    self.wheel -= dir;
                }
            }
        } else {
            self.wheel = 0.0;
        }
        resp.on_hover_text("Click: place the active landmark kind (snapped to the edge within two voxels when snapping is on; on a small dot of the fit: where the fit predicts it; on an open ring: accept that proposal) · drag a mark: move it · right-click a mark: delete · drag elsewhere: pan · wheel: next slice or angle · ctrl+wheel: zoom");
        cmds
    }

    /// Size (columns, rows) of the plane part sampled for the last frame.
    #[cfg(test)]
    pub fn sampled(&self) -> Option<(usize, usize)> {
        self.cache.as_ref().map(|c| (c.1.nu, c.1.nv))
    }

    /// One step of the wheel: next slice, or 2° of angle on the radial cut.
    pub fn step(&mut self, dir: i32, doc: &Doc) {
        match self.plane {
            Plane::Slice(a) => {
                let n = doc.stack.dims[a] as i64;
                self.index[a] = (self.index[a] as i64 + dir as i64).clamp(0, n - 1) as usize;
            }
            Plane::Radial => self.angle_deg += 2.0 * dir as f64,
        }
    }

    fn toolbar_ui(&mut self, ui: &mut egui::Ui, doc: &Doc) {
        // wraps onto a second row in a narrow window
        ui.horizontal_wrapped(|ui| {
            for (p, label, tip) in [
                (Plane::Slice(2), "Slices (xy)", "The stack's own slices: constant slice index k (x right, y down)"),
                (Plane::Slice(1), "Rows (xz)", "Across the slices at one image row j (x right, z down)"),
                (Plane::Slice(0), "Columns (yz)", "Across the slices at one image column i (y right, z down)"),
                (Plane::Radial, "Radial cut", "The plane through the modiolar axis at the chosen angle (apex up)"),
            ] {
                if ui.selectable_label(self.plane == p, label).on_hover_text(tip).clicked() {
                    self.plane = p;
                }
            }
            ui.separator();
            match self.plane {
                Plane::Slice(a) => {
                    let n = doc.stack.dims[a].max(1) - 1;
                    let l = ui.label(["i", "j", "k"][a]);
                    ui.add(egui::Slider::new(&mut self.index[a], 0..=n)).labelled_by(l.id).on_hover_text("Slice index (wheel steps it)");
                }
                Plane::Radial => {
                    let l = ui.label("angle");
                    ui.add(egui::DragValue::new(&mut self.angle_deg).speed(1.0).suffix("°"))
                        .labelled_by(l.id)
                        .on_hover_text("Angle of the radial cut from the round window (wheel steps 2°)");
                }
            }
            if ui.button("Fit view").on_hover_text("Reset zoom and pan").clicked() {
                self.zoom = 1.0;
                self.pan = Vec2::ZERO;
            }
        });
    }

    /// Where a click at `p` places the active kind: with snapping on, a lamina or ligament
    /// click within two voxels of that end of the partition as the radial cut through it shows
    /// it ([`ductline::trace::snap`]; the other end's guess from the fit) lands there; else where
    /// clicked. Nothing snaps before a fit exists.
    pub fn snapped(&self, doc: &Doc, p: V) -> V {
        let (Ok(c), Some(vox)) = (&doc.fitted, doc.stack.voxel.as_ref()) else { return p };
        if !self.snap || !matches!(self.active, Kind::Lamina | Kind::Ligament) {
            return p;
        }
        let [r, a, h] = c.frame.to_cochlear(p);
        let t = c.unwrap_deg(r, a, h).to_radians();
        let (lam, lig) = match self.active {
            Kind::Lamina => (p, c.edge_point(Kind::Ligament, t)),
            _ => (c.edge_point(Kind::Lamina, t), p),
        };
        match ductline::trace::snap(&doc.stack, &c.frame, lam, lig) {
            Some((l, g)) => {
                let q = if self.active == Kind::Lamina { l } else { g };
                if ductline::frame::v3::dist(p, q) <= 2.0 * vox.max() { q } else { p }
            }
            None => p,
        }
    }

    /// Moves the view to show a landmark's plane.
    pub fn go_to(&mut self, doc: &Doc, p: V) {
        if doc.stack.voxel.is_some() {
            if let Plane::Slice(a) = self.plane {
                self.index[a] = (doc.stack.to_index(p)[a].round().max(0.0) as usize).min(doc.stack.dims[a] - 1);
            } else if let Ok(c) = &doc.fitted {
                self.angle_deg = c.frame.to_cochlear(p)[1];
            }
        }
    }
}

/// A texture image of plane values through the window (see [`ductline::display::window_level`]).
pub fn to_image(size: [usize; 2], values: &[f32], window: [f32; 2]) -> egui::ColorImage {
    // the window writes opaque grey (or the opaque outside colour) straight into the texture's
    // pixels (Color32 is four bytes, premultiplied: the same for opaque colours)
    let mut pixels = vec![egui::Color32::TRANSPARENT; values.len()];
    ductline::display::window_level(values, window, bytemuck::cast_slice_mut(&mut pixels));
    egui::ColorImage::new(size, pixels)
}

/// The mark (index, screen position) nearest `pos` within 9 points, if any.
fn nearest_mark(marks: &[(usize, Pos2)], pos: Pos2) -> Option<usize> {
    marks.iter().filter(|(_, s)| s.distance(pos) < 9.0).min_by(|a, b| a.1.distance(pos).total_cmp(&b.1.distance(pos))).map(|x| x.0)
}

/// A landmark mark: each kind its own shape and colour.
pub fn mark(p: &egui::Painter, s: Pos2, kind: Kind, fade: f32, selected: bool, flagged: bool) {
    let c = palette::kind(kind).gamma_multiply(fade);
    let r = 5.0;
    match kind {
        Kind::Lamina => {
            p.circle_filled(s, r, c);
        }
        Kind::Ligament => {
            p.rect_filled(Rect::from_center_size(s, vec2(2.0 * r, 2.0 * r)), 1.0, c);
        }
        Kind::Window => {
            p.circle_stroke(s, r + 1.0, Stroke::new(2.5, c));
        }
        Kind::AxisBase | Kind::AxisApex => {
            let pts = vec![s + vec2(0.0, -r - 1.0), s + vec2(r + 1.0, 0.0), s + vec2(0.0, r + 1.0), s + vec2(-r - 1.0, 0.0)];
            p.add(egui::Shape::convex_polygon(pts, c, Stroke::NONE));
            let t = if kind == Kind::AxisBase { "b" } else { "a" };
            p.text(s + vec2(r + 3.0, -r - 3.0), egui::Align2::LEFT_BOTTOM, t, egui::FontId::proportional(11.0), c);
        }
    }
    if flagged {
        p.circle_stroke(s, r + 5.0, Stroke::new(2.0, palette::OUTLIER));
    }
    if selected {
        p.circle_stroke(s, r + 3.0, Stroke::new(1.5, Color32::WHITE));
    }
}

/// Wheel travel this frame without ctrl or command (those zoom), in notches: a line is one
/// notch, 50 points one (a usual line height), a page ten. Positive: toward the user.
pub fn wheel_notches(events: &[egui::Event]) -> f32 {
    events
        .iter()
        .filter_map(|e| match e {
            egui::Event::MouseWheel { unit, delta, modifiers, .. } if !modifiers.ctrl && !modifiers.command => Some(match unit {
                egui::MouseWheelUnit::Line => delta.y,
                egui::MouseWheelUnit::Point => delta.y / 50.0,
                egui::MouseWheelUnit::Page => 10.0 * delta.y,
            }),
            _ => None,
        })
        .sum()
}

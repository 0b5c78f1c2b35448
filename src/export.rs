//! The geometry table (CSV and JSON) and the lumen surfaces (binary STL).

use crate::frame::{v3, v3::V};
use crate::measure::{Row, Scala};
use crate::pipeline::Outcome;
use crate::section::SectionGeom;
use crate::{Error, Result};
use serde_json::json;
use std::fmt::Write as _;
use std::path::Path;

/// Table columns in order (DESIGN.md), units in the names.
pub const COLUMNS: [&str; 14] = [
    "s_mm",
    "angle_deg",
    "x_mm",
    "y_mm",
    "z_mm",
    "radius_mm",
    "height_mm",
    "curvature_radius_mm",
    "cf_hz",
    "sv_area_mm2",
    "st_area_mm2",
    "partition_width_mm",
    "wall_mm",
    "flags",
];

fn num(x: Option<f64>, digits: usize) -> String {
    match x {
        Some(v) if v.is_finite() => format!("{v:.digits$}"),
        _ => String::new(),
    }
}

/// CSV text of the table: a header line, one row per position; blank cells where a value is not
/// sound (the flags say why).
pub fn table_csv(rows: &[Row]) -> String {
    let mut s = COLUMNS.join(",");
    s.push('\n');
    for r in rows {
        let cells = [
            num(Some(r.s_mm), 4),
            num(Some(r.angle_deg), 3),
            num(Some(r.point[0]), 5),
            num(Some(r.point[1]), 5),
            num(Some(r.point[2]), 5),
            num(Some(r.radius_mm), 5),
            num(Some(r.height_mm), 5),
            num(Some(r.curvature_radius_mm), 4),
            num(Some(r.cf_hz), 1),
            num(r.sv.area, 6),
            num(r.st.area, 6),
            num(r.partition_width_mm, 5),
            num(r.wall_mm, 5),
            r.flag_words(),
        ];
        s.push_str(&cells.join(","));
        s.push('\n');
    }
    s
}

/// The long outline table: one line per outline point (section = the row's index in the table,
/// from 0; scala sv or st; point from 0), in section coordinates (u, v) and stack mm (x, y, z).
pub fn outlines_csv(out: &Outcome) -> String {
    let mut s = String::from("section,scala,point,u_mm,v_mm,x_mm,y_mm,z_mm\n");
    for (i, (r, g)) in out.rows.iter().zip(&out.geoms).enumerate() {
        for (name, sc) in [("sv", &r.sv), ("st", &r.st)] {
            for (k, q) in outline(sc).unwrap_or_default().iter().enumerate() {
                let p = g.from_plane(*q);
                let _ = writeln!(s, "{i},{name},{k},{:.6},{:.6},{:.6},{:.6},{:.6}", q[0], q[1], p[0], p[1], p[2]);
            }
        }
    }
    s
}

/// Facts about the input recorded in the JSON metadata.
pub struct Provenance<'a> {
    pub stack_path: &'a Path,
    pub stack_bytes: u64,
    pub voxel: &'a crate::stack::VoxelSize,
    pub fit: &'a crate::centreline::FitSettings,
    pub measure: &'a crate::measure::MeasureSettings,
}

/// The JSON export: metadata block plus the same rows as the CSV (null where blank).
pub fn table_json(out: &Outcome, prov: &Provenance) -> serde_json::Value {
    let cl = &out.centreline;
    let f = &cl.frame;
    let opt = |x: Option<f64>| x.filter(|v| v.is_finite());
    let rows: Vec<serde_json::Value> = out
        .rows
        .iter()
        .zip(&out.geoms)
        .map(|(r, g)| {
            // each scala's outline and centroid in stack mm, where it has an area (one outline each)
            let in_stack = |sc: &Scala| outline(sc).map(|o| (o.iter().map(|q| g.from_plane(*q)).collect::<Vec<V>>(), g.from_plane(sc.centroid)));
            let (sv, st) = (in_stack(&r.sv), in_stack(&r.st));
            json!({
                "s_mm": r.s_mm, "angle_deg": r.angle_deg, "x_mm": r.point[0], "y_mm": r.point[1], "z_mm": r.point[2],
                "radius_mm": r.radius_mm, "height_mm": r.height_mm, "curvature_radius_mm": opt(Some(r.curvature_radius_mm)),
                "cf_hz": r.cf_hz, "sv_area_mm2": opt(r.sv.area), "st_area_mm2": opt(r.st.area),
                "sv_section_area_mm2": opt(r.sv.own_area), "st_section_area_mm2": opt(r.st.own_area),
                "partition_width_mm": opt(r.partition_width_mm), "wall_mm": opt(r.wall_mm), "flags": r.flag_words(),
                "levels": { "lumen": opt(Some(r.levels.lumen as f64)), "soft_tissue": opt(Some(r.levels.tissue as f64)), "bone": opt(Some(r.levels.bone as f64)) },
                "sv_centroid_mm": sv.as_ref().map(|x| x.1), "st_centroid_mm": st.as_ref().map(|x| x.1),
                "sv_outline_mm": sv.map(|x| x.0), "st_outline_mm": st.map(|x| x.0),
            })
        })
        .collect();
    let units: serde_json::Map<String, serde_json::Value> = COLUMNS
        .iter()
        .map(|c| {
            let u = match *c {
                "angle_deg" => "degree",
                "sv_area_mm2" | "st_area_mm2" => "mm^2",
                "cf_hz" => "Hz",
                "flags" => "words separated by ';' (empty = sound)",
                _ => "mm",
            };
            (c.to_string(), json!(u))
        })
        .collect();
    json!({
        "metadata": {
            "tool": "ductline",
            "version": crate::VERSION,
            "caution": crate::CAUTION,
            "stack": { "file": prov.stack_path.file_name().map(|n| n.to_string_lossy().to_string()), "bytes": prov.stack_bytes },
            "voxel_mm": prov.voxel.mm,
            "voxel_source": prov.voxel.source.iter().map(|s| s.label()).collect::<Vec<_>>(),
            "frame": { "origin_mm": f.origin, "axis": f.ez, "zero_direction": f.ex, "handedness": format!("{:?}", f.handed).to_lowercase(),
                       "convention": "height along the modiolar axis toward the apex; angle 0 toward the round window, growing toward the apex" },
            "species": out.greenwood.species,
            "frequency_map": { "form": "F = A (10^(a x) - k), x = 1 - s/length (Greenwood 1990)", "A_hz": out.greenwood.big_a, "a": out.greenwood.a, "k": out.greenwood.k },
            "smoothing": { "lambda_lamina_radius": cl.lamina.r.lambda, "lambda_lamina_height": cl.lamina.z.lambda,
                           "lambda_ligament_radius": cl.ligament.r.lambda, "lambda_ligament_height": cl.ligament.z.lambda,
                           "chosen_by": if prov.fit.smoothing.is_some() { "user" } else { "generalized cross-validation" } },
            "step_mm": prov.measure.step_mm,
            "areas": crate::measure::areas_note(),
            "bare_shelf": prov.measure.bare_shelf,
            "volumes_mm3": {
                "scala_vestibuli": volume(&out.geoms, &out.rows, true),
                "scala_tympani": volume(&out.geoms, &out.rows, false),
                "note": "lumen between the first and last measured sections; each stretch: mean area × the centroid's advance along the section normal (Pappus), the volume the STL surfaces enclose",
            },
            "outlines": format!("per row, sv_outline_mm and st_outline_mm: {} points [x, y, z] in stack mm, the same start (the section's first in-plane axis) and turning sense in every section, scaled about the centroid to the row's area", crate::measure::OUTLINE_POINTS),
            "length_mm": cl.length,
            "angular_depth_deg": cl.depth_deg(),
            "turns": cl.depth_deg() / 360.0,
            "angle_range_deg": [cl.t0.to_degrees(), cl.t1.to_degrees()],
            "length_estimates": out.estimates.as_ref().ok(),
            "length_estimates_note": match &out.estimates {
                Ok(_) => "Escudé 2006: lateral wall to the traced angular depth; Alexiades 2015: the full cochlea".to_string(),
                Err(why) => format!("basal diameter A not given: {why}"),
            },
            "landmark_warnings": cl.flagged().iter().map(|(i, t, r)| serde_json::json!({"landmark": i + 1, "angle_deg": t.to_degrees(), "residual_mm": r}))
                .chain(cl.ambiguous.iter().map(|(i, t, alt)| serde_json::json!({"landmark": i + 1, "angle_deg": t.to_degrees(), "could_be_deg": alt.to_degrees()})))
                .collect::<Vec<_>>(),
            "columns": COLUMNS,
            "units": units,
            "materials": {
                "note": "common-practice defaults, not measured; edit for your specimen",
                "fluid_density_kg_m3": 1000.0, "fluid_viscosity_pa_s": 0.00085,
                "soft_tissue_density_kg_m3": 1000.0, "bone_density_kg_m3": 2000.0,
            },
        },
        "rows": rows,
    })
}

/// Area (mm²) of a closed polygon (shoelace formula), positive either way round.
pub fn polygon_area(q: &[[f64; 2]]) -> f64 {
    let n = q.len();
    (0..n).map(|i| q[i][0] * q[(i + 1) % n][1] - q[(i + 1) % n][0] * q[i][1]).sum::<f64>().abs() * 0.5
}

/// One scala's exported outline in section coordinates (mm): the measured half-level outline
/// scaled about the centroid so that its polygon area equals the measured area (the table, the
/// outlines, the surfaces and the volumes then agree). None where the scala has no area.
///
/// ```
/// use ductline::measure::Scala;
/// // a square outline of area 4 mm² around (1, 0), measured as 1 mm²: halved in size
/// let sc = Scala { area: Some(1.0), own_area: Some(1.0), outline: vec![[0.0, -1.0], [2.0, -1.0], [2.0, 1.0], [0.0, 1.0]], centroid: [1.0, 0.0], seed: None };
/// let q = ductline::export::outline(&sc).unwrap();
/// assert!((ductline::export::polygon_area(&q) - 1.0).abs() < 1e-12);
/// assert_eq!(q[0], [0.5, -0.5]);
/// ```
pub fn outline(sc: &Scala) -> Option<Vec<[f64; 2]>> {
    let area = sc.area.filter(|a| *a > 0.0)?;
    let poly = polygon_area(&sc.outline);
    if sc.outline.len() < 3 || !(poly > 0.0) {
        return None;
    }
    let k = (area / poly).sqrt();
    let c = sc.centroid;
    Some(sc.outline.iter().map(|q| [c[0] + k * (q[0] - c[0]), c[1] + k * (q[1] - c[1])]).collect())
}

/// Where neighbouring section planes close in (the curvature radius of the centreline under a
/// section's reach toward its centre of curvature: a tightly curled apex, or a wiggle of the
/// fitted curve), a lumen swept from plane to plane would fold through itself. The sweep stays
/// one-to-one while every outline point keeps 1 − κ·d > 0 (d its offset toward the centre of
/// curvature, κ the curvature), so outline points past half the curvature radius are drawn in
/// smoothly toward the centre, never beyond 0.8 of it (a monotone map along one direction: each
/// outline stays simple). Points nearer than half the radius, all of them on most sections,
/// are not moved. `k` is the curvature vector dt/ds in section coordinates (1/mm). Tested on
/// scalae reaching 1.25 curvature radii toward the centre (tests/export.rs).
///
/// ```
/// use ductline::export::unfold;
/// // curvature 1/mm toward +u: a point 0.3 mm that way stays, one 1.5 mm that way (past the
/// // centre of curvature) is drawn in under 0.8 mm; across, nothing moves
/// assert_eq!(unfold([0.3, 0.2], [1.0, 0.0]), [0.3, 0.2]);
/// let q = unfold([1.5, 0.2], [1.0, 0.0]);
/// assert!(q[0] > 0.5 && q[0] < 0.8 && q[1] == 0.2);
/// ```
pub fn unfold(q: [f64; 2], k: [f64; 2]) -> [f64; 2] {
    const FREE: f64 = 0.5;
    const MAX: f64 = 0.8;
    let d = q[0] * k[0] + q[1] * k[1];
    let kk = k[0] * k[0] + k[1] * k[1];
    if d <= FREE || kk <= 0.0 {
        return q;
    }
    let to = FREE + (MAX - FREE) * ((d - FREE) / (MAX - FREE)).tanh();
    let shift = (d - to) / kk;
    [q[0] - shift * k[0], q[1] - shift * k[1]]
}

/// The curvature vector dt/ds (1/mm) at each section in its own (u, v) coordinates, from the
/// tangents of its neighbours (central differences; one-sided at the ends).
pub fn curvature_in_plane(geoms: &[SectionGeom]) -> Vec<[f64; 2]> {
    let n = geoms.len();
    (0..n)
        .map(|i| {
            let (a, b) = (i.saturating_sub(1), (i + 1).min(n.saturating_sub(1)));
            let ds = geoms[b].s - geoms[a].s;
            if !(ds > 0.0) {
                return [0.0, 0.0];
            }
            let k = v3::scale(v3::sub(geoms[b].t, geoms[a].t), 1.0 / ds);
            [v3::dot(k, geoms[i].u), v3::dot(k, geoms[i].v)]
        })
        .collect()
}

/// One scala's rings for the surfaces and volumes: each measured outline ([`outline`]) with
/// [`unfold`] applied, as (section index, the ring in section coordinates (mm)).
pub fn sweep_rings(geoms: &[SectionGeom], rows: &[Row], scala_vestibuli: bool) -> Vec<(usize, Vec<[f64; 2]>)> {
    let k = curvature_in_plane(geoms);
    geoms
        .iter()
        .zip(rows)
        .enumerate()
        .filter_map(|(i, (_, r))| {
            let sc = if scala_vestibuli { &r.sv } else { &r.st };
            outline(sc).map(|o| (i, o.into_iter().map(|q| unfold(q, k[i])).collect()))
        })
        .collect()
}

/// One scala's lumen volume (mm³) between its first and last measured sections: each stretch
/// between neighbouring measured sections adds its mean area times the advance of the scala's
/// centroid along the mean section normal (Pappus: dV = A·(1 − κ·d)·ds, with d the centroid's
/// offset toward the centre of curvature; the centroids of the inner scala travel less far than
/// the midline). Areas and centroids are those of the swept rings ([`sweep_rings`]), so the
/// volume is the one the surfaces enclose. Sections without an area are bridged. None with
/// fewer than two.
pub fn volume(geoms: &[SectionGeom], rows: &[Row], scala_vestibuli: bool) -> Option<f64> {
    let measured: Vec<(f64, V, V)> = sweep_rings(geoms, rows, scala_vestibuli)
        .into_iter()
        .map(|(i, ring)| {
            let g = &geoms[i];
            (polygon_area(&ring), g.from_plane(polygon_centroid(&ring)), g.t)
        })
        .collect();
    if measured.len() < 2 {
        return None;
    }
    Some(measured.windows(2).map(|w| 0.5 * (w[0].0 + w[1].0) * v3::dot(v3::sub(w[1].1, w[0].1), v3::unit(v3::add(w[0].2, w[1].2)))).sum())
}

/// Area centroid (mm) of a closed polygon.
pub fn polygon_centroid(q: &[[f64; 2]]) -> [f64; 2] {
    let n = q.len();
    let (mut a, mut cx, mut cy) = (0.0, 0.0, 0.0);
    for i in 0..n {
        let (p, r) = (q[i], q[(i + 1) % n]);
        let c = p[0] * r[1] - r[0] * p[1];
        a += c;
        cx += (p[0] + r[0]) * c;
        cy += (p[1] + r[1]) * c;
    }
    if a == 0.0 { q.iter().fold([0.0, 0.0], |s, p| [s[0] + p[0] / n as f64, s[1] + p[1] / n as f64]) } else { [cx / (3.0 * a), cy / (3.0 * a)] }
}

/// A closed triangle mesh in stack mm.
#[derive(Clone, Debug, Default)]
pub struct Mesh {
    pub vertices: Vec<V>,
    pub triangles: Vec<[u32; 3]>,
}

impl Mesh {
    /// Enclosed volume (mm³) by the divergence theorem; positive when normals point outward.
    pub fn volume(&self) -> f64 {
        self.triangles.iter().map(|t| v3::dot(self.vertices[t[0] as usize], v3::cross(self.vertices[t[1] as usize], self.vertices[t[2] as usize])) / 6.0).sum()
    }
}

/// Lofts one scala's star outlines (same point count per section; [`sweep_rings`]) into a
/// closed tube with flat fan caps at both ends. Sections without an outline are skipped; returns None with fewer than 2.
pub fn loft(geoms: &[SectionGeom], rows: &[Row], scala_vestibuli: bool) -> Option<Mesh> {
    let rings: Vec<Vec<V>> =
        sweep_rings(geoms, rows, scala_vestibuli).into_iter().map(|(i, ring)| ring.iter().map(|q| geoms[i].from_plane(*q)).collect()).collect();
    if rings.len() < 2 {
        return None;
    }
    let k = rings[0].len();
    let mut m = Mesh::default();
    for ring in &rings {
        m.vertices.extend_from_slice(ring);
    }
    for i in 0..rings.len() - 1 {
        for j in 0..k {
            let a = (i * k + j) as u32;
            let b = (i * k + (j + 1) % k) as u32;
            let c = a + k as u32;
            let d = b + k as u32;
            m.triangles.push([a, b, d]);
            m.triangles.push([a, d, c]);
        }
    }
    for (ri, flip) in [(0usize, true), (rings.len() - 1, false)] {
        let centre = v3::scale(rings[ri].iter().fold([0.0; 3], |acc, p| v3::add(acc, *p)), 1.0 / k as f64);
        let ci = m.vertices.len() as u32;
        m.vertices.push(centre);
        for j in 0..k {
            let a = (ri * k + j) as u32;
            let b = (ri * k + (j + 1) % k) as u32;
            m.triangles.push(if flip { [ci, b, a] } else { [ci, a, b] });
        }
    }
    if m.volume() < 0.0 {
        for t in &mut m.triangles {
            t.swap(1, 2);
        }
    }
    Some(m)
}

/// Pairs of triangles of a mesh that share no vertex yet cross each other (0 for a surface that
/// does not fold through itself). Triangles are binned in a uniform grid of cells twice the
/// mean edge long; each pair is tested once, in the first cell both cover, by segment–triangle
/// crossings (Möller & Trumbore 1997) of each one's edges against the other.
///
/// ```
/// use ductline::export::{Mesh, self_intersections};
/// // two triangles piercing each other, and the same two moved apart
/// let mut m = Mesh {
///     vertices: vec![[0.0, 0.0, 0.0], [2.0, 0.0, 0.0], [0.0, 2.0, 0.0], [0.5, 0.5, -1.0], [0.5, 0.5, 1.0], [3.0, 3.0, 0.0]],
///     triangles: vec![[0, 1, 2], [3, 4, 5]],
/// };
/// assert_eq!(self_intersections(&m), 1);
/// for v in &mut m.vertices[3..] {
///     v[0] += 5.0;
/// }
/// assert_eq!(self_intersections(&m), 0);
/// ```
pub fn self_intersections(m: &Mesh) -> usize {
    crossing_pairs(m).len()
}

/// The pairs of triangles (indices, lower first) that [`self_intersections`] counts.
pub fn crossing_pairs(m: &Mesh) -> Vec<(u32, u32)> {
    let tri = |t: &[u32; 3]| t.map(|i| m.vertices[i as usize]);
    let nt = m.triangles.len();
    if nt < 2 {
        return vec![];
    }
    let edge: f64 = m
        .triangles
        .iter()
        .map(|t| {
            let [a, b, c] = tri(t);
            v3::dist(a, b) + v3::dist(b, c) + v3::dist(c, a)
        })
        .sum::<f64>()
        / (3 * nt) as f64;
    let h = 2.0 * edge.max(1e-9);
    let cell_range = |t: &[u32; 3]| -> [[i64; 2]; 3] {
        let p = tri(t);
        std::array::from_fn(|a| {
            let lo = p.iter().map(|v| v[a]).fold(f64::INFINITY, f64::min);
            let hi = p.iter().map(|v| v[a]).fold(f64::NEG_INFINITY, f64::max);
            [(lo / h).floor() as i64, (hi / h).floor() as i64]
        })
    };
    let ranges: Vec<[[i64; 2]; 3]> = m.triangles.iter().map(cell_range).collect();
    let mut grid: std::collections::HashMap<[i64; 3], Vec<u32>> = std::collections::HashMap::new();
    for (i, r) in ranges.iter().enumerate() {
        for x in r[0][0]..=r[0][1] {
            for y in r[1][0]..=r[1][1] {
                for z in r[2][0]..=r[2][1] {
                    grid.entry([x, y, z]).or_default().push(i as u32);
                }
            }
        }
    }
    // does the segment p→q cross the triangle (a, b, c)? (strictly inside both)
    let crosses = |p: V, q: V, [a, b, c]: [V; 3]| -> bool {
        let d = v3::sub(q, p);
        let (e1, e2) = (v3::sub(b, a), v3::sub(c, a));
        let pv = v3::cross(d, e2);
        let det = v3::dot(e1, pv);
        if det.abs() < 1e-15 {
            return false;
        }
        let tv = v3::sub(p, a);
        let u = v3::dot(tv, pv) / det;
        let qv = v3::cross(tv, e1);
        let v = v3::dot(d, qv) / det;
        let t = v3::dot(e2, qv) / det;
        u > 0.0 && v > 0.0 && u + v < 1.0 && t > 0.0 && t < 1.0
    };
    let mut pairs = vec![];
    for (cell, list) in &grid {
        for (x, &i) in list.iter().enumerate() {
            for &j in &list[x + 1..] {
                let (ti, tj) = (&m.triangles[i as usize], &m.triangles[j as usize]);
                if ti.iter().any(|v| tj.contains(v)) {
                    continue;
                }
                let (ri, rj) = (ranges[i as usize], ranges[j as usize]);
                let first: [i64; 3] = std::array::from_fn(|a| ri[a][0].max(rj[a][0]));
                if first != *cell {
                    continue;
                }
                let (a, b) = (tri(ti), tri(tj));
                let hit = (0..3).any(|e| crosses(a[e], a[(e + 1) % 3], b)) || (0..3).any(|e| crosses(b[e], b[(e + 1) % 3], a));
                if hit {
                    pairs.push((i.min(j), i.max(j)));
                }
            }
        }
    }
    pairs.sort_unstable();
    pairs
}

/// Binary STL bytes of a mesh (normals from the triangle winding).
pub fn stl_bytes(m: &Mesh, name: &str) -> Vec<u8> {
    let mut out = Vec::with_capacity(84 + 50 * m.triangles.len());
    let mut header = [0u8; 80];
    let h = format!("ductline {name} (stack mm)");
    header[..h.len().min(80)].copy_from_slice(&h.as_bytes()[..h.len().min(80)]);
    out.extend_from_slice(&header);
    out.extend_from_slice(&(m.triangles.len() as u32).to_le_bytes());
    for t in &m.triangles {
        let [a, b, c] = t.map(|i| m.vertices[i as usize]);
        let n = v3::unit(v3::cross(v3::sub(b, a), v3::sub(c, a)));
        for v in [n, a, b, c] {
            for x in v {
                out.extend_from_slice(&(x as f32).to_le_bytes());
            }
        }
        out.extend_from_slice(&[0, 0]);
    }
    out
}

/// Writes scala_vestibuli.stl and scala_tympani.stl into `dir`; returns the files written.
pub fn write_stl(out: &Outcome, dir: &Path) -> Result<Vec<std::path::PathBuf>> {
    std::fs::create_dir_all(dir).map_err(|e| Error::io(dir, e))?;
    let mut written = vec![];
    for (sv, name) in [(true, "scala_vestibuli"), (false, "scala_tympani")] {
        let Some(mesh) = loft(&out.geoms, &out.rows, sv) else {
            return Err(Error::invalid(format!("{name}: fewer than two measured sections, no surface to write")));
        };
        let path = dir.join(format!("{name}.stl"));
        crate::project::write_atomic(&path, &stl_bytes(&mesh, name))?;
        written.push(path);
    }
    Ok(written)
}

//! VTK XML PolyData (.vtp, ASCII) for viewers and solvers built on VTK: the centreline as a
//! polyline carrying every table column, each scala's lumen surface, and the section outlines.
//! A small writer of the published file format (VTK File Formats, XML PolyData), no library.

use crate::export::{COLUMNS, Mesh, loft, outline};
use crate::frame::v3::V;
use crate::measure::Row;
use crate::pipeline::Outcome;
use crate::{Error, Result};
use std::fmt::Write as _;
use std::path::{Path, PathBuf};

/// A point-data array: numbers (NaN where blank) or strings.
enum Array {
    Num(&'static str, Vec<f64>),
    Text(&'static str, Vec<String>),
}

/// One piece of PolyData: points, lines and polygons as index lists, and point data.
struct Piece {
    points: Vec<V>,
    lines: Vec<Vec<usize>>,
    polys: Vec<Vec<usize>>,
    data: Vec<Array>,
}

fn cells(out: &mut String, tag: &str, cells: &[Vec<usize>]) {
    let conn: Vec<String> = cells.iter().flatten().map(|i| i.to_string()).collect();
    let mut end = 0;
    let offsets: Vec<String> = cells
        .iter()
        .map(|c| {
            end += c.len();
            end.to_string()
        })
        .collect();
    let _ = write!(
        out,
        "<{tag}>\n<DataArray type=\"Int64\" Name=\"connectivity\" format=\"ascii\">{}</DataArray>\n<DataArray type=\"Int64\" Name=\"offsets\" format=\"ascii\">{}</DataArray>\n</{tag}>\n",
        conn.join(" "),
        offsets.join(" ")
    );
}

fn xml(p: &Piece) -> String {
    let mut s =
        String::from("<?xml version=\"1.0\"?>\n<VTKFile type=\"PolyData\" version=\"1.0\" byte_order=\"LittleEndian\" header_type=\"UInt64\">\n<PolyData>\n");
    let _ = writeln!(
        s,
        "<Piece NumberOfPoints=\"{}\" NumberOfVerts=\"0\" NumberOfLines=\"{}\" NumberOfStrips=\"0\" NumberOfPolys=\"{}\">",
        p.points.len(),
        p.lines.len(),
        p.polys.len()
    );
    s.push_str("<PointData>\n");
    for a in &p.data {
        match a {
            // blank cells as NaN, which VTK reads as such
            Array::Num(name, v) => {
                let vals: Vec<String> = v.iter().map(|x| if x.is_finite() { format!("{x}") } else { "nan".into() }).collect();
                let _ = writeln!(s, "<DataArray type=\"Float64\" Name=\"{name}\" format=\"ascii\">{}</DataArray>", vals.join(" "));
            }
            // ASCII strings as their byte values, each ended by 0 (how VTK writes and reads them)
            Array::Text(name, v) => {
                let vals: Vec<String> = v.iter().flat_map(|t| t.bytes().map(|b| b.to_string()).chain(std::iter::once("0".to_string()))).collect();
                let _ = writeln!(s, "<DataArray type=\"String\" Name=\"{name}\" format=\"ascii\">{}</DataArray>", vals.join(" "));
            }
        }
    }
    s.push_str("</PointData>\n<Points>\n<DataArray type=\"Float64\" NumberOfComponents=\"3\" format=\"ascii\">");
    let pts: Vec<String> = p.points.iter().map(|q| format!("{} {} {}", q[0], q[1], q[2])).collect();
    s.push_str(&pts.join(" "));
    s.push_str("</DataArray>\n</Points>\n");
    cells(&mut s, "Lines", &p.lines);
    cells(&mut s, "Polys", &p.polys);
    s.push_str("</Piece>\n</PolyData>\n</VTKFile>\n");
    s
}

/// The value of a numeric table column in a row (NaN where the CSV cell is blank).
fn column(r: &Row, c: &str) -> f64 {
    let o = |x: Option<f64>| x.unwrap_or(f64::NAN);
    match c {
        "s_mm" => r.s_mm,
        "angle_deg" => r.angle_deg,
        "x_mm" => r.point[0],
        "y_mm" => r.point[1],
        "z_mm" => r.point[2],
        "radius_mm" => r.radius_mm,
        "height_mm" => r.height_mm,
        "curvature_radius_mm" => r.curvature_radius_mm,
        "cf_hz" => r.cf_hz,
        "sv_area_mm2" => o(r.sv.area),
        "st_area_mm2" => o(r.st.area),
        "partition_width_mm" => o(r.partition_width_mm),
        "wall_mm" => o(r.wall_mm),
        _ => f64::NAN,
    }
}

/// A scala's surface with s and angle at each vertex (the ring's section; the two cap centres
/// take their ring's).
fn surface(out: &Outcome, sv: bool) -> Option<Piece> {
    let m: Mesh = loft(&out.geoms, &out.rows, sv)?;
    let k = crate::measure::OUTLINE_POINTS;
    let rings: Vec<&Row> = out.rows.iter().filter(|r| outline(if sv { &r.sv } else { &r.st }).is_some()).collect();
    let mut s: Vec<f64> = rings.iter().flat_map(|r| std::iter::repeat_n(r.s_mm, k)).collect();
    let mut a: Vec<f64> = rings.iter().flat_map(|r| std::iter::repeat_n(r.angle_deg, k)).collect();
    for r in [rings[0], rings[rings.len() - 1]] {
        s.push(r.s_mm);
        a.push(r.angle_deg);
    }
    let polys = m.triangles.iter().map(|t| t.iter().map(|&i| i as usize).collect()).collect();
    Some(Piece { points: m.vertices, lines: vec![], polys, data: vec![Array::Num("s_mm", s), Array::Num("angle_deg", a)] })
}

/// Writes centreline.vtp, scala_vestibuli.vtp, scala_tympani.vtp and sections.vtp into `dir`;
/// returns the files written.
pub fn write(out: &Outcome, dir: &Path) -> Result<Vec<PathBuf>> {
    std::fs::create_dir_all(dir).map_err(|e| Error::io(dir, e))?;
    let rows = &out.rows;
    let mut data: Vec<Array> = COLUMNS.iter().filter(|c| **c != "flags").map(|c| Array::Num(c, rows.iter().map(|r| column(r, c)).collect())).collect();
    data.push(Array::Text("flags", rows.iter().map(|r| r.flag_words()).collect()));
    let centreline = Piece { points: rows.iter().map(|r| r.point).collect(), lines: vec![(0..rows.len()).collect()], polys: vec![], data };
    // section outlines: closed polylines (the first point repeated), SV then ST per section
    let mut sections = Piece { points: vec![], lines: vec![], polys: vec![], data: vec![] };
    let (mut s, mut a, mut scala) = (vec![], vec![], vec![]);
    for (r, g) in rows.iter().zip(&out.geoms) {
        for (k, sc) in [&r.sv, &r.st].into_iter().enumerate() {
            let Some(o) = outline(sc) else { continue };
            let start = sections.points.len();
            sections.points.extend(o.iter().map(|q| g.from_plane(*q)));
            sections.lines.push((start..sections.points.len()).chain(std::iter::once(start)).collect());
            s.extend(std::iter::repeat_n(r.s_mm, o.len()));
            a.extend(std::iter::repeat_n(r.angle_deg, o.len()));
            scala.extend(std::iter::repeat_n(k as f64, o.len()));
        }
    }
    sections.data = vec![Array::Num("s_mm", s), Array::Num("angle_deg", a), Array::Num("scala_tympani", scala)];
    let mut pieces = vec![("centreline.vtp", centreline), ("sections.vtp", sections)];
    for (sv, name) in [(true, "scala_vestibuli.vtp"), (false, "scala_tympani.vtp")] {
        match surface(out, sv) {
            Some(p) => pieces.push((name, p)),
            None => return Err(Error::invalid(format!("{name}: fewer than two measured sections, no surface to write"))),
        }
    }
    let mut written = vec![];
    for (name, p) in pieces {
        let path = dir.join(name);
        crate::project::write_atomic(&path, xml(&p).as_bytes())?;
        written.push(path);
    }
    Ok(written)
}

//! Surfaces and tables from the library: closed meshes with the right volume, CSV/JSON agreement.

use ductline::centreline::FitSettings;
use ductline::cochlea::Greenwood;
use ductline::export;
use ductline::frame::v3;
use ductline::measure::MeasureSettings;
use ductline::phantom::{self, PhantomSpec};
use ductline::pipeline;
use ductline::progress::Progress;

/// Every edge in exactly two triangles, and the enclosed volume (divergence theorem) within 2 %
/// of the integral of the section areas over s. The sections are normal to the centreline while
/// each scala's centroid sits off it, so the integral follows the centroids (Pappus: the element
/// ds becomes (1 − κ·d) ds, d the centroid's offset toward the centre of curvature).
#[test]
fn lumen_surfaces_closed_with_section_volume() {
    let spec = PhantomSpec { voxel_um: [80.0; 3], ..Default::default() };
    let ph = phantom::generate(&spec, &Progress::new()).unwrap();
    let ms = MeasureSettings { step_mm: 0.2, ..Default::default() };
    let out = pipeline::run(&ph.stack, &ph.landmarks, &FitSettings::default(), &ms, &[], &Greenwood::preset("human").unwrap(), &Progress::new()).unwrap();
    for sv in [true, false] {
        let mesh = export::loft(&out.geoms, &out.rows, sv).unwrap();
        let mut edges = std::collections::HashMap::new();
        for t in &mesh.triangles {
            for (a, b) in [(t[0], t[1]), (t[1], t[2]), (t[2], t[0])] {
                *edges.entry((a.min(b), a.max(b))).or_insert(0) += 1;
            }
        }
        assert!(edges.values().all(|&n| n == 2));
        let vol = mesh.volume();
        assert!(vol > 0.0, "outward normals give a positive volume");
        // trapezoid rule over the measured sections with the Pappus factor
        let n = out.rows.len();
        let mut integral = 0.0;
        let mut prev: Option<(f64, f64)> = None;
        for i in 0..n {
            let r = &out.rows[i];
            let sc = if sv { &r.sv } else { &r.st };
            let Some(a) = sc.area else { continue };
            let g = &out.geoms[i];
            let (i0, i1) = (i.saturating_sub(1), (i + 1).min(n - 1));
            let dt = v3::scale(v3::sub(out.geoms[i1].t, out.geoms[i0].t), 1.0 / (out.geoms[i1].s - out.geoms[i0].s));
            let offset = v3::sub(g.from_plane(sc.centroid), g.centre);
            let f = a * (1.0 - v3::dot(dt, offset));
            if let Some((s0, f0)) = prev {
                integral += 0.5 * (f + f0) * (r.s_mm - s0);
            }
            prev = Some((r.s_mm, f));
        }
        let rel = (vol - integral).abs() / integral;
        eprintln!("{}: mesh {vol:.4} mm³, sections {integral:.4} mm³, {:.2} %", if sv { "SV" } else { "ST" }, 100.0 * rel);
        assert!(rel < 0.02);
        // binary STL: 80-byte header, count, 50 bytes a triangle
        let bytes = export::stl_bytes(&mesh, "x");
        assert_eq!(bytes.len(), 84 + 50 * mesh.triangles.len());
    }
    // CSV and JSON carry the same rows
    let csv = export::table_csv(&out.rows);
    assert_eq!(csv.lines().count(), out.rows.len() + 1);
    let vox = ph.stack.voxel.clone().unwrap();
    let prov = export::Provenance { stack_path: std::path::Path::new("phantom.tif"), stack_bytes: 1, voxel: &vox, fit: &FitSettings::default(), measure: &ms };
    let j = export::table_json(&out, &prov);
    let text = serde_json::to_string(&j).unwrap();
    let back: serde_json::Value = serde_json::from_str(&text).unwrap();
    assert!(serde_json::to_string(&back).unwrap() == text, "JSON round-trips");
    assert_eq!(back["rows"].as_array().unwrap().len(), out.rows.len());
    assert_eq!(back["metadata"]["caution"], ductline::CAUTION);
}

/// The phantom's own lumen volume (mm³) between angles `a0` and `a1` (degrees): the material
/// function integrated in cylindrical coordinates (dV = r dr dz dθ), 1° steps in θ and a 20 µm
/// grid in each radial half-plane.
fn phantom_volume(spec: &PhantomSpec, a0: f64, a1: f64, sv: bool) -> f64 {
    let (dt, h) = (1f64.to_radians(), 0.02);
    let want = if sv { phantom::Mat::Sv } else { phantom::Mat::St };
    let mut v = 0.0;
    let steps = ((a1 - a0) / 1.0).round() as usize;
    for k in 0..steps {
        let t = (a0 + 0.5 + k as f64).to_radians();
        let d = spec.duct(t);
        let (r0, r1) = (d.rc - 2.0 * d.a - 0.2, d.rc + d.a + 0.2);
        let (z0, z1) = (d.zc - d.b - 0.2, d.zc + d.b + 0.2);
        let (nr, nz) = (((r1 - r0) / h) as usize, ((z1 - z0) / h) as usize);
        for i in 0..nr {
            let r = r0 + (i as f64 + 0.5) * h;
            for j in 0..nz {
                let z = z0 + (j as f64 + 0.5) * h;
                let (m, tt, _) = spec.material([r * t.cos(), r * t.sin(), z]);
                if m == want && (tt - t).abs() < 1.0 {
                    v += r * h * h * dt;
                }
            }
        }
    }
    v
}

/// gmsh (an outside mesher) fills both STL surfaces in `dir` with at least `min` tetrahedra
/// each; it refuses a boundary that is open or crosses itself.
fn gmsh_fills(dir: &std::path::Path, min: usize, what: &str) {
    python_check(
        "gmsh",
        dir,
        &format!(
            r#"
import gmsh
for name in ["scala_vestibuli", "scala_tympani"]:
    gmsh.initialize(); gmsh.option.setNumber("General.Terminal", 0)
    gmsh.merge(f"{{DIR}}/{{name}}.stl")
    l = gmsh.model.geo.addSurfaceLoop([e[1] for e in gmsh.model.getEntities(2)])
    gmsh.model.geo.addVolume([l]); gmsh.model.geo.synchronize()
    gmsh.model.mesh.generate(3)
    n = sum(len(t) for t in gmsh.model.mesh.getElements(3)[1])
    assert n > {min}, (name, n)
    print("gmsh", gmsh.__version__, name, n, "tetrahedra{what}")
    gmsh.finalize()
"#
        ),
    );
}

/// Runs a Python check (`code`, with `DIR` bound to `dir`) when `module` imports; says so and
/// returns false when it does not (the CI installs it: .ci/run).
fn python_check(module: &str, dir: &std::path::Path, code: &str) -> bool {
    let have = std::process::Command::new("python3").args(["-c", &format!("import {module}")]).output().is_ok_and(|o| o.status.success());
    if !have {
        eprintln!("note: python module {module} not installed; its check is not run here (.ci/run installs it)");
        return false;
    }
    let script = format!("DIR = {:?}\n{code}", dir.display().to_string());
    let out = std::process::Command::new("python3").args(["-c", &script]).output().unwrap();
    assert!(out.status.success(), "{module} check failed:\n{}\n{}", String::from_utf8_lossy(&out.stdout), String::from_utf8_lossy(&out.stderr));
    eprint!("{}", String::from_utf8_lossy(&out.stdout));
    true
}

/// Outlines, centroids and volumes for a solver: each exported outline's polygon area equals
/// the table's area (2 %), starts on the section's first axis and turns the same way in every
/// section; the volumes (centroid-corrected) equal the STL surfaces' enclosed volume within
/// 0.5 % and the phantom's own volume (its material function integrated, `phantom_volume`)
/// within 2 %. The .vtp files read back by VTK's Python package carry the CSV's values; gmsh
/// (PyPI) meshes both STL surfaces into tetrahedra.
#[test]
fn outlines_volumes_vtk_and_gmsh() {
    let spec = PhantomSpec { voxel_um: [60.0; 3], ..Default::default() };
    let ph = phantom::generate(&spec, &Progress::new()).unwrap();
    let ms = MeasureSettings { step_mm: 0.1, ..Default::default() };
    let out = pipeline::run(&ph.stack, &ph.landmarks, &FitSettings::default(), &ms, &[], &Greenwood::preset("human").unwrap(), &Progress::new()).unwrap();
    let vox = ph.stack.voxel.clone().unwrap();
    let prov = export::Provenance { stack_path: std::path::Path::new("phantom.tif"), stack_bytes: 1, voxel: &vox, fit: &FitSettings::default(), measure: &ms };
    let j = export::table_json(&out, &prov);
    for (sv, name, key) in [(true, "scala_vestibuli", "sv"), (false, "scala_tympani", "st")] {
        let mut areas = 0;
        for (row, g) in j["rows"].as_array().unwrap().iter().zip(&out.geoms) {
            let Some(a) = row[format!("{key}_area_mm2")].as_f64() else { continue };
            let pts: Vec<[f64; 2]> =
                row[format!("{key}_outline_mm")].as_array().unwrap().iter().map(|p| g.to_plane([0, 1, 2].map(|k| p[k].as_f64().unwrap()))).collect();
            assert!(pts.len() >= 32);
            // shoelace, signed: the same turning sense everywhere
            let signed: f64 = (0..pts.len()).map(|i| pts[i][0] * pts[(i + 1) % pts.len()][1] - pts[(i + 1) % pts.len()][0] * pts[i][1]).sum::<f64>() * 0.5;
            assert!(signed > 0.0, "counter-clockwise in (u, v) at s = {}", row["s_mm"]);
            assert!((signed / a - 1.0).abs() < 0.02, "outline {signed} vs area {a}");
            // the first point lies on the ray along +u from the centroid
            let c = g.to_plane([0, 1, 2].map(|k| row[format!("{key}_centroid_mm")][k].as_f64().unwrap()));
            assert!((pts[0][1] - c[1]).abs() < 1e-9 && pts[0][0] > c[0]);
            areas += 1;
        }
        assert!(areas > 300);
        let v = j["metadata"]["volumes_mm3"][name].as_f64().unwrap();
        let stl = export::loft(&out.geoms, &out.rows, sv).unwrap().volume();
        let measured: Vec<f64> = out.rows.iter().filter(|r| (if sv { &r.sv } else { &r.st }).area.is_some()).map(|r| r.angle_deg).collect();
        let truth = phantom_volume(&spec, measured[0], measured[measured.len() - 1], sv);
        eprintln!("{name}: {v:.4} mm³ (STL {stl:.4}, phantom {truth:.4})");
        assert!((v / stl - 1.0).abs() < 0.005, "volume {v} vs STL {stl}");
        assert!((v / truth - 1.0).abs() < 0.02, "volume {v} vs phantom {truth}");
    }
    let dir = tempfile::tempdir().unwrap();
    export::write_stl(&out, dir.path()).unwrap();
    ductline::vtk::write(&out, dir.path()).unwrap();
    std::fs::write(dir.path().join("table.csv"), export::table_csv(&out.rows)).unwrap();
    python_check(
        "vtk",
        dir.path(),
        r#"
import csv, math, vtk
from vtk.util.numpy_support import vtk_to_numpy
def read(name):
    r = vtk.vtkXMLPolyDataReader(); r.SetFileName(f"{DIR}/{name}"); r.Update(); return r.GetOutput()
rows = list(csv.DictReader(open(f"{DIR}/table.csv")))
c = read("centreline.vtp")
assert c.GetNumberOfPoints() == len(rows) and c.GetNumberOfLines() == 1
pd = c.GetPointData()
for col in rows[0]:
    if col == "flags":
        f = pd.GetAbstractArray("flags")
        assert [f.GetValue(i) for i in range(len(rows))] == [r["flags"] for r in rows]
        continue
    a = vtk_to_numpy(pd.GetArray(col))
    for i, r in enumerate(rows):
        want = float(r[col]) if r[col] else math.nan
        # equal to the CSV's printed digits
        tol = 0.5 * 10 ** -len(r[col].split(".")[1]) if "." in r[col] else 0.5
        assert (math.isnan(want) and math.isnan(a[i])) or abs(a[i] - want) <= tol * 1.0001, (col, i, a[i], want)
for name in ["scala_vestibuli.vtp", "scala_tympani.vtp"]:
    s = read(name)
    assert s.GetNumberOfPolys() > 1000 and s.GetPointData().GetArray("s_mm") is not None
    fe = vtk.vtkFeatureEdges(); fe.SetInputData(s); fe.BoundaryEdgesOn(); fe.NonManifoldEdgesOn(); fe.FeatureEdgesOff(); fe.ManifoldEdgesOff(); fe.Update()
    assert fe.GetOutput().GetNumberOfLines() == 0, "closed surface"
sec = read("sections.vtp")
assert sec.GetNumberOfLines() > 600
print("vtk", vtk.vtkVersion.GetVTKVersion(), ": centreline arrays equal the CSV; surfaces closed")
"#,
    );
    gmsh_fills(dir.path(), 1000, "");
}

/// The profile figure: the SVG has both panels' axis titles with units, a curve per series and
/// the legend; the PNG (the same SVG rasterised) decodes (png crate) at twice the size with the
/// series' colours drawn; frequency axes tick in Hz and kHz.
#[test]
fn profile_figure_svg_and_png() {
    let spec = PhantomSpec { voxel_um: [90.0; 3], ..Default::default() };
    let ph = phantom::generate(&spec, &Progress::new()).unwrap();
    let ms = MeasureSettings { step_mm: 0.25, ..Default::default() };
    let out = pipeline::run(&ph.stack, &ph.landmarks, &FitSettings::default(), &ms, &[], &Greenwood::preset("human").unwrap(), &Progress::new()).unwrap();
    use ductline::figure::{self, XAxis};
    let svg = figure::profile_svg(&out.rows, XAxis::Distance, "test", 900.0, 600.0);
    for t in ["area (mm²)", "length (mm)", "distance from the base s (mm)", "scala vestibuli", "scala tympani", "partition width", "bony wall"] {
        assert!(svg.contains(t), "{t}");
    }
    assert!(svg.matches("<polyline").count() >= 4);
    let f = figure::profile_svg(&out.rows, XAxis::Frequency, "test", 900.0, 600.0);
    assert!(f.contains(">1k<") && f.contains(">10k<") && f.contains("characteristic frequency (Hz)"));
    let dir = tempfile::tempdir().unwrap();
    let p = dir.path().join("fig.png");
    figure::write(&out.rows, XAxis::Angle, "test", &p).unwrap();
    let dec = png::Decoder::new(std::io::BufReader::new(std::fs::File::open(&p).unwrap()));
    let mut r = dec.read_info().unwrap();
    let mut buf = vec![0; r.output_buffer_size().unwrap()];
    let info = r.next_frame(&mut buf).unwrap();
    assert_eq!((info.width, info.height), (1800, 1200));
    let px = |c: [u8; 3]| buf.chunks(info.line_size / info.width as usize).filter(|q| (0..3).all(|k| (q[k] as i32 - c[k] as i32).abs() < 30)).count();
    assert!(px([0x1f, 0x77, 0xb4]) + px([0xd6, 0x27, 0x28]) > 2000, "the area curves are drawn");
    assert!(px([0, 0, 0]) + px([0x44, 0x44, 0x44]) > 2000, "text and axes are drawn");
    assert!(figure::write(&out.rows, XAxis::Angle, "test", &dir.path().join("fig.pdf")).is_err());
}

/// A tight curl (a small species' apex, a basal hook, a fit bent sharply near an end): the
/// scalae measured on the phantom's basal turn, each reaching up to about 1 mm toward the
/// modiolus, set along 300° of a helix of radius 0.5 mm, so that neighbouring section planes
/// cross inside the lumen. Lofted plane to plane as measured, the surfaces fold through
/// themselves (counted here, to show the curl is that tight); as written ([`export::unfold`])
/// they do not, they stay closed, and the JSON volume equals the enclosed one. gmsh (an outside
/// mesher) fills each with tetrahedra, which it refuses for a boundary that crosses itself.
#[test]
fn tight_curl_surfaces_do_not_fold() {
    let spec = PhantomSpec { voxel_um: [80.0; 3], ..Default::default() };
    let ph = phantom::generate(&spec, &Progress::new()).unwrap();
    let ms = MeasureSettings { step_mm: 0.1, ..Default::default() };
    let mut out = pipeline::run(&ph.stack, &ph.landmarks, &FitSettings::default(), &ms, &[], &Greenwood::preset("human").unwrap(), &Progress::new()).unwrap();
    // 43 measured basal sections, 0.1 mm apart along the helix
    out.rows.retain(|r| r.sv.area.is_some() && r.st.area.is_some());
    out.rows.truncate(43);
    let (radius, climb) = (0.8f64, 0.05f64); // mm, mm per radian
    let len = radius.hypot(climb);
    out.geoms = (0..out.rows.len())
        .map(|i| {
            let s = 0.1 * i as f64;
            let phi = s / len;
            let (sn, cs) = phi.sin_cos();
            let centre = [radius * cs, radius * sn, climb * phi];
            let t = [-radius * sn / len, radius * cs / len, climb / len];
            let u = [cs, sn, 0.0]; // outward, lamina → ligament
            let v = v3::cross(t, u);
            let w = 0.5 * out.rows[i].partition_width_mm.unwrap_or(0.5);
            ductline::section::SectionGeom { s, theta: phi, centre, t, u, v, lamina: v3::axpy(centre, -w, u), ligament: v3::axpy(centre, w, u), rmf: u }
        })
        .collect();
    for sv in [true, false] {
        // plane to plane as measured: the same loft without the unfolding
        let rings: Vec<Vec<v3::V>> = out
            .geoms
            .iter()
            .zip(&out.rows)
            .filter_map(|(g, r)| export::outline(if sv { &r.sv } else { &r.st }).map(|o| o.iter().map(|q| g.from_plane(*q)).collect()))
            .collect();
        let k = rings[0].len();
        let mut raw = export::Mesh { vertices: rings.concat(), triangles: vec![] };
        for i in 0..rings.len() - 1 {
            for j in 0..k {
                let (a, b) = ((i * k + j) as u32, (i * k + (j + 1) % k) as u32);
                raw.triangles.push([a, b, b + k as u32]);
                raw.triangles.push([a, b + k as u32, a + k as u32]);
            }
        }
        let mesh = export::loft(&out.geoms, &out.rows, sv).unwrap();
        let (folds_raw, folds) = (export::self_intersections(&raw), export::self_intersections(&mesh));
        eprintln!("sv {sv}: crossing triangle pairs {folds_raw} as measured, {folds} as written");
        assert!(folds_raw > 0, "the curl is tight enough to fold a plain loft");
        assert_eq!(folds, 0);
        let v = export::volume(&out.geoms, &out.rows, sv).unwrap();
        assert!((v / mesh.volume() - 1.0).abs() < 0.005, "volume {v} vs enclosed {}", mesh.volume());
    }
    let dir = tempfile::tempdir().unwrap();
    export::write_stl(&out, dir.path()).unwrap();
    gmsh_fills(dir.path(), 100, " (tight curl)");
}

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

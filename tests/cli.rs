//! The real `ductline` binary driven end to end in a temporary folder.

mod common;
use std::path::Path;
use std::process::{Command, Output};

fn ductline(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_ductline")).args(args).output().expect("run ductline")
}

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

fn stderr(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).to_string()
}

/// The last stderr line of a failed run: one line, starting with "error:".
fn failure(o: &Output) -> String {
    assert!(!o.status.success(), "should fail: {}", stderr(o));
    let e = stderr(o);
    let last = e.lines().last().unwrap_or("").to_string();
    assert!(last.starts_with("error: "), "{e}");
    assert!(!e.contains("panicked"), "{e}");
    last
}

fn read_csv(p: &Path) -> (Vec<String>, Vec<Vec<String>>) {
    let text = std::fs::read_to_string(p).unwrap();
    let mut lines = text.lines();
    let head = lines.next().unwrap().split(',').map(String::from).collect();
    (head, lines.map(|l| l.split(',').map(String::from).collect()).collect())
}

/// Parses a binary STL into triangles of exact f32 vertices.
fn stl(p: &Path) -> Vec<[[u32; 3]; 3]> {
    let b = std::fs::read(p).unwrap();
    let n = u32::from_le_bytes(b[80..84].try_into().unwrap()) as usize;
    assert_eq!(b.len(), 84 + 50 * n);
    (0..n)
        .map(|t| {
            let base = 84 + 50 * t + 12;
            std::array::from_fn(|v| std::array::from_fn(|c| u32::from_le_bytes(b[base + 12 * v + 4 * c..base + 12 * v + 4 * c + 4].try_into().unwrap())))
        })
        .collect()
}

#[test]
fn phantom_measure_end_to_end() {
    let dir = tempfile::tempdir().unwrap();
    let ph = dir.path().join("ph");
    let o = ductline(&["phantom", s(&ph), "--voxel-um", "80", "--seed", "3"]);
    assert!(o.status.success(), "{}", stderr(&o));
    for f in ["phantom.tif", "landmarks.csv", "truth.csv", "truth.json", "phantom.ductline.json"] {
        assert!(ph.join(f).exists(), "{f}");
    }
    let o = ductline(&["inspect", s(&ph.join("phantom.tif"))]);
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(o.status.success() && text.contains("uint16") && text.contains("80.0000 × 80.0000 × 80.0000 µm (OME-XML)"), "{text}");

    let (table, json, stl_dir) = (dir.path().join("t.csv"), dir.path().join("t.json"), dir.path().join("stl"));
    let o = ductline(&[
        "measure",
        "--stack",
        s(&ph.join("phantom.tif")),
        "--landmarks",
        s(&ph.join("landmarks.csv")),
        "--out",
        s(&table),
        "--json",
        s(&json),
        "--stl",
        s(&stl_dir),
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    let err = stderr(&o);
    assert!(err.contains("length") && err.contains("Escudé") && err.contains("Alexiades"), "summary: {err}");

    // columns exactly as DESIGN.md, in order
    let (head, rows) = read_csv(&table);
    assert_eq!(head, ductline::export::COLUMNS.map(String::from).to_vec());
    assert_eq!(
        head.join(","),
        "s_mm,angle_deg,x_mm,y_mm,z_mm,radius_mm,height_mm,curvature_radius_mm,cf_hz,sv_area_mm2,st_area_mm2,partition_width_mm,wall_mm,flags"
    );
    assert!(rows.len() > 300 && rows.iter().all(|r| r.len() == 14));
    // uniform step in s
    let s_col: Vec<f64> = rows.iter().map(|r| r[0].parse().unwrap()).collect();
    assert!(s_col.windows(2).all(|w| ((w[1] - w[0]) - 0.1).abs() < 1e-6));
    // values within the 80 µm tolerance of the truth (areas 2 % median), sections ≥ 30° from the ends
    let (_, truth) = read_csv(&ph.join("truth.csv"));
    let truth: Vec<ductline::phantom::TruthRow> = truth
        .iter()
        .map(|t| {
            let f: Vec<f64> = t.iter().map(|x| x.parse().unwrap()).collect();
            ductline::phantom::TruthRow { angle_deg: f[0], s_mm: f[1], sv_area_mm2: f[2], st_area_mm2: f[3], partition_width_mm: f[4], wall_mm: f[5] }
        })
        .collect();
    let tmax = truth.last().unwrap().angle_deg;
    let mut errs = [vec![], vec![]];
    for r in &rows {
        let a: f64 = r[1].parse().unwrap();
        if a < 30.0 || a > tmax - 30.0 {
            continue;
        }
        for (k, col) in [(0usize, 9usize), (1, 10)] {
            if let Ok(v) = r[col].parse::<f64>() {
                let t = common::truth_at(
                    &truth,
                    a,
                    if k == 0 { |x: &ductline::phantom::TruthRow| x.sv_area_mm2 } else { |x: &ductline::phantom::TruthRow| x.st_area_mm2 },
                );
                errs[k].push((v - t).abs() / t);
            }
        }
    }
    for e in &errs {
        assert!(e.len() > 300);
        assert!(common::quantile(e, 0.5) < 0.02);
    }

    // the JSON loads with no custom code and carries the metadata
    let j: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(&json).unwrap()).unwrap();
    let m = &j["metadata"];
    for key in [
        "version",
        "caution",
        "stack",
        "voxel_mm",
        "voxel_source",
        "frame",
        "species",
        "frequency_map",
        "smoothing",
        "step_mm",
        "bare_shelf",
        "units",
        "materials",
    ] {
        assert!(!m[key].is_null(), "metadata.{key}");
    }
    assert_eq!(m["bare_shelf"], false, "a spiral limbus is expected unless told otherwise");
    assert_eq!(j["rows"].as_array().unwrap().len(), rows.len());
    assert_eq!(m["frame"]["handedness"], "right");
    assert!(m["materials"]["note"].as_str().unwrap().contains("common-practice"));

    // surfaces: closed (every edge in exactly two triangles)
    for name in ["scala_vestibuli.stl", "scala_tympani.stl"] {
        let tris = stl(&stl_dir.join(name));
        let mut edges = std::collections::HashMap::new();
        for t in &tris {
            for (a, b) in [(t[0], t[1]), (t[1], t[2]), (t[2], t[0])] {
                let key = if a < b { (a, b) } else { (b, a) };
                *edges.entry(key).or_insert(0) += 1;
            }
        }
        assert!(edges.values().all(|&n| n == 2), "{name}: open or non-manifold edges");
    }

    // the project the phantom wrote measures to the same table
    let t2 = dir.path().join("t2.csv");
    let o = ductline(&["measure", s(&ph.join("phantom.ductline.json")), "--out", s(&t2)]);
    assert!(o.status.success(), "{}", stderr(&o));
    assert_eq!(std::fs::read(&table).unwrap(), std::fs::read(&t2).unwrap());
}

#[test]
fn failures_exit_non_zero_with_one_line() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("t.csv");
    // missing stack
    let lm = dir.path().join("l.csv");
    std::fs::write(&lm, "kind,x_mm,y_mm,z_mm\nlamina,1,1,1\n").unwrap();
    let e = failure(&ductline(&["measure", "--stack", "/no/such/stack.tif", "--landmarks", s(&lm), "--out", s(&out)]));
    assert!(e.contains("/no/such/stack.tif"), "{e}");
    // a bad landmark file: the line is named
    let stack = common::fixture("tiff/u16_ome.tif");
    std::fs::write(&lm, "kind,x_mm,y_mm,z_mm\nlamina,0.1,0.1,0.01\nspiral,0.1,0.1,0.01\n").unwrap();
    let e = failure(&ductline(&["measure", "--stack", s(&stack), "--landmarks", s(&lm), "--out", s(&out)]));
    assert!(e.contains("l.csv") && e.contains("line 3") && e.contains("spiral"), "{e}");
    std::fs::write(&lm, "kind,x_mm,y_mm\nlamina,0.1,0.1\n").unwrap();
    assert!(failure(&ductline(&["measure", "--stack", s(&stack), "--landmarks", s(&lm), "--out", s(&out)])).contains("z_mm"));
    std::fs::write(&lm, "kind,x_mm,y_mm,z_mm\nlamina,0.1,zero,0.01\n").unwrap();
    assert!(failure(&ductline(&["measure", "--stack", s(&stack), "--landmarks", s(&lm), "--out", s(&out)])).contains("not a number"));
    std::fs::write(&lm, "kind,x_mm,y_mm,z_mm\nlamina,50,0.1,0.01\n").unwrap();
    assert!(failure(&ductline(&["measure", "--stack", s(&stack), "--landmarks", s(&lm), "--out", s(&out)])).contains("outside the stack"));
    // a stack with no voxel size
    std::fs::write(&lm, "kind,x_mm,y_mm,z_mm\nlamina,1,1,1\n").unwrap();
    let e = failure(&ductline(&["measure", "--stack", s(&common::fixture("tiff/u8_plain.tif")), "--landmarks", s(&lm), "--out", s(&out)]));
    assert!(e.contains("voxel size") && e.contains("--voxel-um"), "{e}");
    // too few landmarks (with a voxel size given)
    std::fs::write(&lm, "kind,x_mm,y_mm,z_mm\nlamina,0.5,0.5,0.1\n").unwrap();
    let e = failure(&ductline(&["measure", "--stack", s(&common::fixture("tiff/u8_plain.tif")), "--voxel-um", "50", "--landmarks", s(&lm), "--out", s(&out)]));
    assert!(e.contains("axis_base") || e.contains("at least"), "{e}");
    assert!(!out.exists(), "no table is written on failure");
    // bad voxel size and bad species
    assert!(failure(&ductline(&["inspect", s(&stack), "--voxel-um", "0"])).contains("positive"));
    let e = failure(&ductline(&["measure", "--stack", s(&stack), "--landmarks", s(&lm), "--out", s(&out), "--species", "dragon"]));
    assert!(e.contains("dragon"), "{e}");
    // world-frame landmarks need a file with an index-to-world transform; a world point mapping
    // outside the stack is named with the frame it was read in
    std::fs::write(&lm, "kind,x_mm,y_mm,z_mm\nlamina,0.1,0.1,0.01\n").unwrap();
    let e = failure(&ductline(&["measure", "--stack", s(&stack), "--landmarks", s(&lm), "--out", s(&out), "--landmarks-frame", "world"]));
    assert!(e.contains("u16_ome.tif") && e.contains("index-to-world"), "{e}");
    let nii = common::fixture("nifti/u8_plain.nii");
    std::fs::write(&lm, "kind,x_mm,y_mm,z_mm\nlamina,-5,0.05,0.05\n").unwrap();
    let e = failure(&ductline(&["measure", "--stack", s(&nii), "--landmarks", s(&lm), "--out", s(&out), "--landmarks-frame", "world"]));
    assert!(e.contains("l.csv") && e.contains("outside the stack") && e.contains("RAS"), "{e}");
    let e = failure(&ductline(&["measure", "--stack", s(&nii), "--landmarks", s(&lm), "--out", s(&out), "--landmarks-frame", "scanner"]));
    assert!(e.contains("stack or world"), "{e}");
}

/// `batch`: two specimens measured (one listed by stack and landmarks, one by project) and one
/// broken (its landmark file missing): each good one gets its table and JSON under OUT/NAME/,
/// summary.csv has a row per specimen (in the list's order) with the broken one's error, the exit code is non-zero,
/// and the good rows agree with the specimen's own `measure` run (the JSON's volumes).
#[test]
fn batch_goes_on_past_a_broken_specimen() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let o = ductline(&["phantom", s(&d.join("a")), "--voxel-um", "90"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let o = ductline(&["phantom", s(&d.join("b")), "--voxel-um", "90", "--left"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let list = d.join("list.csv");
    std::fs::write(
        &list,
        "name,stack,landmarks,project\nears_a,a/phantom.tif,a/landmarks.csv,\nbroken,a/phantom.tif,nowhere.csv,\nears_b,,,b/phantom.ductline.json\n",
    )
    .unwrap();
    let out = d.join("out");
    let o = ductline(&["batch", "--list", s(&list), "--out-dir", s(&out), "--step-mm", "0.25"]);
    assert!(!o.status.success());
    let err = stderr(&o);
    // a progress line per specimen as each finishes (several at a time where memory allows)
    assert!(err.contains("/3] broken: failed") && err.contains("/3] ears_a: ") && err.contains("1 of 3 specimens failed"), "{err}");
    let (head, rows) = read_csv(&out.join("summary.csv"));
    for c in [
        "name",
        "length_mm",
        "depth_deg",
        "turns",
        "handedness",
        "sv_volume_mm3",
        "st_volume_mm3",
        "basal_diameter_mm",
        "sections",
        "flagged_sections",
        "error",
    ] {
        assert!(head.iter().any(|h| h == c), "column {c}");
    }
    let col = |r: &Vec<String>, c: &str| r[head.iter().position(|h| h == c).unwrap()].clone();
    assert_eq!(rows.len(), 3);
    assert!(col(&rows[1], "error").contains("nowhere.csv"));
    assert_eq!(col(&rows[0], "handedness"), "right");
    assert_eq!(col(&rows[2], "handedness"), "left");
    for r in [&rows[0], &rows[2]] {
        let name = col(r, "name");
        assert!(col(r, "error").is_empty());
        let j: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(out.join(&name).join("table.json")).unwrap()).unwrap();
        let v = j["metadata"]["volumes_mm3"]["scala_vestibuli"].as_f64().unwrap();
        assert!((col(r, "sv_volume_mm3").parse::<f64>().unwrap() - v).abs() < 1e-3, "{name}");
        assert!((col(r, "length_mm").parse::<f64>().unwrap() - j["metadata"]["length_mm"].as_f64().unwrap()).abs() < 1e-3);
        assert!(out.join(&name).join("table.csv").exists());
    }
    assert!(!out.join("broken").join("table.csv").exists());
}

/// `trace` from seven seeds writes a landmark file (seeds included, with confidence and source
/// columns) that `measure` takes as it is; bad seeds are a one-line error naming the file.
#[test]
fn trace_then_measure() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let o = ductline(&["phantom", s(&d.join("p")), "--voxel-um", "60"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let text = std::fs::read_to_string(d.join("p/landmarks.csv")).unwrap();
    let mut lines: Vec<&str> = text.lines().take(1).collect();
    for k in ["axis_base", "axis_apex", "window"] {
        lines.extend(text.lines().filter(|l| l.starts_with(k)));
    }
    for k in ["lamina", "ligament"] {
        lines.extend(text.lines().filter(|l| l.starts_with(k)).take(2));
    }
    let seeds = d.join("seeds.csv");
    std::fs::write(&seeds, lines.join("\n")).unwrap();
    let traced = d.join("traced.csv");
    let o = ductline(&["trace", "--stack", s(&d.join("p/phantom.tif")), "--seeds", s(&seeds), "--out", s(&traced)]);
    assert!(o.status.success(), "{}", stderr(&o));
    assert!(stderr(&o).contains("stopped:"), "{}", stderr(&o));
    let (head, rows) = read_csv(&traced);
    assert_eq!(head, ["kind", "x_mm", "y_mm", "z_mm", "confidence", "source"]);
    assert!(rows.len() > 150 && rows.iter().filter(|r| r[5] == "seed").count() == 7);
    let json = d.join("t.json");
    let o = ductline(&[
        "measure",
        "--stack",
        s(&d.join("p/phantom.tif")),
        "--landmarks",
        s(&traced),
        "--out",
        s(&d.join("t.csv")),
        "--step-mm",
        "0.25",
        "--bare-shelf",
        "--json",
        s(&json),
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    // the setting is recorded with the table
    let j: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(&json).unwrap()).unwrap();
    assert_eq!(j["metadata"]["bare_shelf"], true);
    // one lamina seed only: refused, named
    std::fs::write(&seeds, lines[..lines.len() - 3].join("\n")).unwrap();
    let o = ductline(&["trace", "--stack", s(&d.join("p/phantom.tif")), "--seeds", s(&seeds), "--out", s(&traced)]);
    let e = failure(&o);
    assert!(e.contains("seeds.csv") && e.contains("two lamina and two ligament"), "{e}");
}

/// World coordinates both ways: the phantom's stack written as an NRRD (LPS) with an oblique
/// index-to-world transform (index axes turned 30° about z, origin off zero), its landmarks given
/// in that world frame (`--landmarks-frame world`) and the table asked in it
/// (`--points-frame world`): the areas equal those of the TIFF measured in the stack frame, and
/// each row's point is the stack-frame point carried by the same transform, M · (p / voxel, 1)
/// (closed form), to the table's 0.01 µm print precision (1e-4 mm held).
#[test]
fn world_frame_landmarks_in_and_points_out() {
    let d = tempfile::tempdir().unwrap();
    let ph = d.path().join("p");
    let o = ductline(&["phantom", s(&ph), "--voxel-um", "80"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let st = ductline::stack::load(&ph.join("phantom.tif"), &Default::default()).unwrap();
    let ductline::stack::Samples::U16(v) = &st.samples else { panic!("the phantom is uint16") };
    let vox = 0.08;
    let (c, sn) = (30f64.to_radians().cos(), 30f64.to_radians().sin());
    let dirs = [[vox * c, vox * sn, 0.0], [-vox * sn, vox * c, 0.0], [0.0, 0.0, vox]];
    let origin = [-5.0, 12.0, 30.0];
    let world = |p: [f64; 3]| -> [f64; 3] { std::array::from_fn(|r| origin[r] + (0..3).map(|k| dirs[k][r] * p[k] / vox).sum::<f64>()) };
    let nrrd = d.path().join("p.nrrd");
    let mut bytes = format!(
        "NRRD0004\ntype: uint16\ndimension: 3\nspace: left-posterior-superior\nsizes: {} {} {}\nspace directions: ({},{},{}) ({},{},{}) ({},{},{})\nspace origin: ({},{},{})\nendian: little\nencoding: raw\n\n",
        st.dims[0], st.dims[1], st.dims[2], dirs[0][0], dirs[0][1], dirs[0][2], dirs[1][0], dirs[1][1], dirs[1][2], dirs[2][0], dirs[2][1], dirs[2][2], origin[0], origin[1], origin[2]
    )
    .into_bytes();
    bytes.extend(v.iter().flat_map(|x| x.to_le_bytes()));
    std::fs::write(&nrrd, bytes).unwrap();
    // the landmarks in the world frame
    let (head, rows) = read_csv(&ph.join("landmarks.csv"));
    let mut text = head.join(",") + "\n";
    for r in &rows {
        let p: [f64; 3] = std::array::from_fn(|k| r[k + 1].parse().unwrap());
        let w = world(p);
        text += &format!("{},{:.12},{:.12},{:.12}\n", r[0], w[0], w[1], w[2]);
    }
    let wl = d.path().join("world_landmarks.csv");
    std::fs::write(&wl, text).unwrap();
    let (t_stack, t_world) = (d.path().join("stack.csv"), d.path().join("world.csv"));
    let o =
        ductline(&["measure", "--stack", s(&ph.join("phantom.tif")), "--landmarks", s(&ph.join("landmarks.csv")), "--out", s(&t_stack), "--step-mm", "0.5"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let json = d.path().join("world.json");
    let o = ductline(&[
        "measure",
        "--stack",
        s(&nrrd),
        "--landmarks",
        s(&wl),
        "--landmarks-frame",
        "world",
        "--points-frame",
        "world",
        "--out",
        s(&t_world),
        "--json",
        s(&json),
        "--step-mm",
        "0.5",
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    let ((h1, a), (h2, b)) = (read_csv(&t_stack), read_csv(&t_world));
    assert_eq!(h1, h2);
    assert_eq!(a.len(), b.len());
    let col = |name: &str| h1.iter().position(|c| c == name).unwrap();
    for (ra, rb) in a.iter().zip(&b) {
        for name in ["sv_area_mm2", "st_area_mm2", "radius_mm", "flags"] {
            let (x, y) = (&ra[col(name)], &rb[col(name)]);
            // the table prints six decimals, and landmarks taken through the world transform and
            // back differ in their last bits: a value on a rounding edge prints one unit apart
            match (x.parse::<f64>(), y.parse::<f64>()) {
                (Ok(x), Ok(y)) => assert!((x - y).abs() <= 1.5e-6 * x.abs().max(1.0), "{name}: {x} vs {y}"),
                _ => assert_eq!(x, y, "{name}"),
            }
        }
        let p: [f64; 3] = std::array::from_fn(|k| ra[col("x_mm") + k].parse().unwrap());
        let q: [f64; 3] = std::array::from_fn(|k| rb[col("x_mm") + k].parse().unwrap());
        let w = world(p);
        assert!((0..3).all(|k| (q[k] - w[k]).abs() < 1e-4), "{q:?} vs {w:?}");
    }
    let meta: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(&json).unwrap()).unwrap();
    assert!(meta["metadata"]["points_frame"].as_str().unwrap().starts_with("LPS"), "{}", meta["metadata"]["points_frame"]);
    assert_eq!(meta["metadata"]["index_to_world"]["frame"], "LPS");
    // a TIFF has no world frame: asked for one, a one-line error
    let o = ductline(&[
        "measure",
        "--stack",
        s(&ph.join("phantom.tif")),
        "--landmarks",
        s(&ph.join("landmarks.csv")),
        "--out",
        s(&t_stack),
        "--points-frame",
        "world",
    ]);
    assert!(failure(&o).contains("index-to-world"), "{}", stderr(&o));
}

/// One phantom, every format, one table: the phantom's stack written as an OME-TIFF (the
/// phantom's own), an NRRD, a MetaImage (.mha), a NIfTI-1 file, a DICOM series and a folder of
/// single-page TIFF slices, each
/// measured from the same stack-frame landmarks at the same voxel size, gives the same table
/// (every number to 1e-9 relative, the same flags): the readers agree on the sample order and
/// the stack frame (i·vx, j·vy, k·vz) whatever the file's own world transform.
#[test]
fn one_phantom_every_format_one_table() {
    let d = tempfile::tempdir().unwrap();
    let ph = d.path().join("p");
    let o = ductline(&["phantom", s(&ph), "--voxel-um", "90"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let st = ductline::stack::load(&ph.join("phantom.tif"), &Default::default()).unwrap();
    let ductline::stack::Samples::U16(v) = &st.samples else { panic!("the phantom is uint16") };
    let raw: Vec<u8> = v.iter().flat_map(|x| x.to_le_bytes()).collect();
    let [nx, ny, nz] = st.dims;
    // NRRD with an oblique world transform (index axes turned 25° about z)
    let (c, sn, vx) = (25f64.to_radians().cos(), 25f64.to_radians().sin(), 0.09);
    let nrrd = d.path().join("p.nrrd");
    let mut b = format!(
        "NRRD0004\ntype: unsigned short\ndimension: 3\nspace: left-posterior-superior\nsizes: {nx} {ny} {nz}\nspace directions: ({},{},0) ({},{},0) (0,0,{vx})\nspace origin: (3,-4,5)\nendian: little\nencoding: raw\n\n",
        vx * c,
        vx * sn,
        -vx * sn,
        vx * c
    )
    .into_bytes();
    b.extend(&raw);
    std::fs::write(&nrrd, b).unwrap();
    // MetaImage, axis-aligned
    let mha = d.path().join("p.mha");
    let mut b = format!(
        "ObjectType = Image\nNDims = 3\nBinaryData = True\nBinaryDataByteOrderMSB = False\nDimSize = {nx} {ny} {nz}\nElementSpacing = {vx} {vx} {vx}\nOffset = 0 0 0\nElementType = MET_USHORT\nElementDataFile = LOCAL\n"
    )
    .into_bytes();
    b.extend(&raw);
    std::fs::write(&mha, b).unwrap();
    // NIfTI-1 (.nii), its sform flipping x (RAS, the first index axis toward the left); header
    // fields at the offsets of the NIfTI-1 standard (nifti1.h)
    let nii = d.path().join("p.nii");
    let mut h = vec![0u8; 352];
    let put = |h: &mut Vec<u8>, at: usize, b: &[u8]| h[at..at + b.len()].copy_from_slice(b);
    put(&mut h, 0, &348i32.to_le_bytes());
    for (k, dim) in [3i16, nx as i16, ny as i16, nz as i16, 1, 1, 1, 1].iter().enumerate() {
        put(&mut h, 40 + 2 * k, &dim.to_le_bytes());
    }
    put(&mut h, 70, &512i16.to_le_bytes()); // datatype: uint16
    put(&mut h, 72, &16i16.to_le_bytes()); // bitpix
    for (k, p) in [1f32, vx as f32, vx as f32, vx as f32].iter().enumerate() {
        put(&mut h, 76 + 4 * k, &p.to_le_bytes());
    }
    put(&mut h, 108, &352f32.to_le_bytes()); // vox_offset
    h[123] = 2; // xyzt_units: mm
    put(&mut h, 254, &1i16.to_le_bytes()); // sform_code: scanner
    for (row, at) in [([-vx as f32, 0.0, 0.0, 10.0], 280), ([0.0, vx as f32, 0.0, -2.0], 296), ([0.0, 0.0, vx as f32, 1.0], 312)] {
        for (k, x) in row.iter().enumerate() {
            put(&mut h, at + 4 * k, &x.to_le_bytes());
        }
    }
    put(&mut h, 344, b"n+1\0");
    h.extend(&raw);
    std::fs::write(&nii, h).unwrap();
    // a folder of single-page slices
    let folder = d.path().join("slices");
    std::fs::create_dir(&folder).unwrap();
    for k in 0..nz {
        let page =
            ductline::stack::Stack::from_samples([nx, ny, 1], ductline::stack::Samples::U16(v[k * nx * ny..(k + 1) * nx * ny].to_vec().into()), None).unwrap();
        ductline::stack::write::write_tiff(&page, &folder.join(format!("slice_{k}.tif")), ductline::stack::write::Packing::Deflate, false).unwrap();
    }
    // a DICOM series (written by the dicom-rs crates): one uncompressed file a slice, its world
    // frame shifted and its slice axis running toward the feet (the normal of the row and
    // column cosines points down, positions step up: DICOM PS3.3 C.7.6.2), file names in an
    // order unrelated to position, so only sorting by position along the normal gives the stack
    let dcm = d.path().join("dicom");
    std::fs::create_dir(&dcm).unwrap();
    for k in 0..nz {
        use dicom_core::{DataElement, PrimitiveValue, VR};
        use dicom_dictionary_std::{tags, uids};
        let mut o = dicom_object::InMemDicomObject::new_empty();
        let uid = format!("2.25.{}", 1000 + k);
        let text = |o: &mut dicom_object::InMemDicomObject, t, vr, v: &str| o.put(DataElement::new(t, vr, PrimitiveValue::from(v)));
        text(&mut o, tags::SOP_CLASS_UID, VR::UI, uids::CT_IMAGE_STORAGE);
        text(&mut o, tags::SOP_INSTANCE_UID, VR::UI, &uid);
        text(&mut o, tags::SERIES_INSTANCE_UID, VR::UI, "2.25.77");
        text(&mut o, tags::MODALITY, VR::CS, "CT");
        text(&mut o, tags::PHOTOMETRIC_INTERPRETATION, VR::CS, "MONOCHROME2");
        // row direction +x, column direction −y: the normal is −z, so positions run +z·(−k)
        text(&mut o, tags::IMAGE_ORIENTATION_PATIENT, VR::DS, "1\\0\\0\\0\\-1\\0");
        text(&mut o, tags::IMAGE_POSITION_PATIENT, VR::DS, &format!("-7.5\\20\\{}", 3.0 - vx * k as f64));
        text(&mut o, tags::PIXEL_SPACING, VR::DS, &format!("{vx}\\{vx}"));
        for (t, v) in
            [(tags::SAMPLES_PER_PIXEL, 1u16), (tags::ROWS, ny as u16), (tags::COLUMNS, nx as u16), (tags::BITS_ALLOCATED, 16), (tags::BITS_STORED, 16)]
        {
            o.put(DataElement::new(t, VR::US, PrimitiveValue::from(v)));
        }
        o.put(DataElement::new(tags::HIGH_BIT, VR::US, PrimitiveValue::from(15u16)));
        o.put(DataElement::new(tags::PIXEL_REPRESENTATION, VR::US, PrimitiveValue::from(0u16)));
        o.put(DataElement::new(tags::PIXEL_DATA, VR::OW, PrimitiveValue::U16(v[k * nx * ny..(k + 1) * nx * ny].iter().copied().collect())));
        let meta = dicom_object::FileMetaTableBuilder::new()
            .transfer_syntax(uids::EXPLICIT_VR_LITTLE_ENDIAN)
            .media_storage_sop_class_uid(uids::CT_IMAGE_STORAGE)
            .media_storage_sop_instance_uid(uid.as_str());
        let file = o.with_meta(meta).unwrap();
        file.write_to_file(dcm.join(format!("{:08x}.dcm", (k as u32).wrapping_mul(2_654_435_761)))).unwrap();
    }
    let lm = ph.join("landmarks.csv");
    let mut tables = vec![];
    for (name, stack) in [("tiff", ph.join("phantom.tif")), ("nrrd", nrrd), ("mha", mha), ("nifti", nii), ("slices", folder), ("dicom", dcm)] {
        let out = d.path().join(format!("{name}.csv"));
        let o = ductline(&["measure", "--stack", s(&stack), "--landmarks", s(&lm), "--voxel-um", "90", "--out", s(&out), "--step-mm", "0.5"]);
        assert!(o.status.success(), "{name}: {}", stderr(&o));
        tables.push((name, read_csv(&out)));
    }
    let (_, (head, first)) = &tables[0];
    assert!(first.len() > 50);
    for (name, (h, rows)) in &tables[1..] {
        assert_eq!(h, head, "{name}");
        assert_eq!(rows.len(), first.len(), "{name}");
        for (a, b) in first.iter().zip(rows) {
            for (col, (x, y)) in head.iter().zip(a.iter().zip(b)) {
                match (x.parse::<f64>(), y.parse::<f64>()) {
                    (Ok(x), Ok(y)) => assert!((x - y).abs() <= 1e-9 * x.abs().max(1.0), "{name} {col}: {x} vs {y}"),
                    _ => assert_eq!(x, y, "{name} {col}"),
                }
            }
        }
    }
}

/// `phantom --tissue SHARE` puts soft tissue that share of the way from the lumen to bone, as
/// truth.json records (levels: lumen, soft tissue, bone, outside); a share past 0.6 is refused
/// with the option named.
#[test]
fn phantom_tissue_share() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path().join("faint");
    let o = ductline(&["phantom", s(&d), "--variant", "0", "--voxel-um", "200", "--tissue", "0.1"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let truth: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(d.join("truth.json")).unwrap()).unwrap();
    let l: Vec<f64> = truth["spec"]["levels"].as_array().unwrap().iter().map(|x| x.as_f64().unwrap()).collect();
    assert!((l[1] - (l[0] + 0.1 * (l[2] - l[0]))).abs() < 1e-12, "levels {l:?}");
    let o = ductline(&["phantom", s(&dir.path().join("bad")), "--variant", "0", "--voxel-um", "200", "--tissue", "0.9"]);
    assert!(!o.status.success() && stderr(&o).contains("--tissue"), "{}", stderr(&o));
}
